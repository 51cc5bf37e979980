//! The diverging colour scale for signed maps, built with Moreland's method:
//! interpolate between two endpoint colours in the Msh colour space (a polar form
//! of CIELAB), passing through a near-white midpoint, so that lightness falls off
//! evenly on both sides of zero and no false bands appear (K. Moreland,
//! "Diverging Color Maps for Scientific Visualization", Advances in Visual
//! Computing, ISVC 2009, LNCS 5876, pp. 92–103, §3–4; formulas from memory).
//!
//! The endpoints are tapmap's own: a glaze teal for negative responses and a
//! kiln amber for positive ones, chosen with similar CIELAB lightness.
//! Colour conversions: sRGB transfer function (IEC 61966-2-1), sRGB primaries to
//! CIE XYZ with the D65 white point, and CIELAB (CIE 15:2004).

use std::f64::consts::PI;

/// Negative endpoint (sRGB 8-bit): glaze teal.
pub const NEGATIVE: [u8; 3] = [22, 108, 128];
/// Positive endpoint (sRGB 8-bit): kiln amber.
pub const POSITIVE: [u8; 3] = [176, 86, 24];
/// Entries in the table used for 8-bit views.
pub const LEVELS: usize = 256;

const WHITE: [f64; 3] = [0.950_47, 1.0, 1.088_83]; // D65, Y = 1

fn srgb_to_linear(c: f64) -> f64 {
    if c <= 0.04045 {
        c / 12.92
    } else {
        ((c + 0.055) / 1.055).powf(2.4)
    }
}

fn linear_to_srgb(c: f64) -> f64 {
    if c <= 0.003_130_8 {
        12.92 * c
    } else {
        1.055 * c.powf(1.0 / 2.4) - 0.055
    }
}

fn lab_f(t: f64) -> f64 {
    let d = 6.0 / 29.0;
    if t > d * d * d {
        t.cbrt()
    } else {
        t / (3.0 * d * d) + 4.0 / 29.0
    }
}

fn lab_f_inv(t: f64) -> f64 {
    let d = 6.0 / 29.0;
    if t > d {
        t * t * t
    } else {
        3.0 * d * d * (t - 4.0 / 29.0)
    }
}

/// sRGB (0–1) to CIELAB.
pub fn srgb_to_lab(rgb: [f64; 3]) -> [f64; 3] {
    let [r, g, b] = rgb.map(srgb_to_linear);
    let x = 0.412_456_4 * r + 0.357_576_1 * g + 0.180_437_5 * b;
    let y = 0.212_672_9 * r + 0.715_152_2 * g + 0.072_175_0 * b;
    let z = 0.019_333_9 * r + 0.119_192_0 * g + 0.950_304_1 * b;
    let (fx, fy, fz) = (
        lab_f(x / WHITE[0]),
        lab_f(y / WHITE[1]),
        lab_f(z / WHITE[2]),
    );
    [116.0 * fy - 16.0, 500.0 * (fx - fy), 200.0 * (fy - fz)]
}

/// CIELAB to sRGB (0–1, clipped).
pub fn lab_to_srgb(lab: [f64; 3]) -> [f64; 3] {
    let fy = (lab[0] + 16.0) / 116.0;
    let fx = fy + lab[1] / 500.0;
    let fz = fy - lab[2] / 200.0;
    let (x, y, z) = (
        WHITE[0] * lab_f_inv(fx),
        WHITE[1] * lab_f_inv(fy),
        WHITE[2] * lab_f_inv(fz),
    );
    let r = 3.240_454_2 * x - 1.537_138_5 * y - 0.498_531_4 * z;
    let g = -0.969_266_0 * x + 1.876_010_8 * y + 0.041_556_0 * z;
    let b = 0.055_643_4 * x - 0.204_025_9 * y + 1.057_225_2 * z;
    [r, g, b].map(|c| linear_to_srgb(c.clamp(0.0, 1.0)).clamp(0.0, 1.0))
}

fn lab_to_msh([l, a, b]: [f64; 3]) -> [f64; 3] {
    let m = (l * l + a * a + b * b).sqrt();
    let s = if m > 0.0 {
        (l / m).clamp(-1.0, 1.0).acos()
    } else {
        0.0
    };
    [m, s, b.atan2(a)]
}

fn msh_to_lab([m, s, h]: [f64; 3]) -> [f64; 3] {
    [m * s.cos(), m * s.sin() * h.cos(), m * s.sin() * h.sin()]
}

/// Moreland's hue spin for interpolating towards an unsaturated colour.
fn adjust_hue([m, s, h]: [f64; 3], m_unsat: f64) -> f64 {
    if m >= m_unsat {
        return h;
    }
    let spin = s * (m_unsat * m_unsat - m * m).sqrt() / (m * s.sin());
    if h > -PI / 3.0 {
        h + spin
    } else {
        h - spin
    }
}

/// Colour at `t` in [0, 1] between `c1` (t = 0) and `c2` (t = 1), sRGB 0–1.
pub fn diverging(c1: [f64; 3], c2: [f64; 3], t: f64) -> [f64; 3] {
    let mut a = lab_to_msh(srgb_to_lab(c1));
    let mut b = lab_to_msh(srgb_to_lab(c2));
    let mut t = t.clamp(0.0, 1.0);
    // Two distinct saturated hues: pass through an unsaturated white midpoint.
    if a[1] > 0.05 && b[1] > 0.05 && (a[2] - b[2]).abs() > PI / 3.0 {
        let m_mid = a[0].max(b[0]).max(88.0);
        if t < 0.5 {
            b = [m_mid, 0.0, 0.0];
            t *= 2.0;
        } else {
            a = [m_mid, 0.0, 0.0];
            t = 2.0 * t - 1.0;
        }
    }
    if a[1] < 0.05 && b[1] > 0.05 {
        a[2] = adjust_hue(b, a[0]);
    } else if b[1] < 0.05 && a[1] > 0.05 {
        b[2] = adjust_hue(a, b[0]);
    }
    let mix = |x: f64, y: f64| (1.0 - t) * x + t * y;
    lab_to_srgb(msh_to_lab([
        mix(a[0], b[0]),
        mix(a[1], b[1]),
        mix(a[2], b[2]),
    ]))
}

/// The 8-bit table for signed views: entry 0 is the most negative value, entry
/// 255 the most positive; zero lies between entries 127 and 128.
pub fn table() -> Vec<[u8; 3]> {
    let c1 = NEGATIVE.map(|v| v as f64 / 255.0);
    let c2 = POSITIVE.map(|v| v as f64 / 255.0);
    (0..LEVELS)
        .map(|i| {
            diverging(c1, c2, i as f64 / (LEVELS - 1) as f64).map(|v| (v * 255.0).round() as u8)
        })
        .collect()
}

/// Anchors of the cyclic scale for orientations (sRGB 8-bit), in order round
/// the circle: kiln amber, glaze green, teal, slate violet, then back to amber.
/// tapmap's own choice, of similar CIELAB lightness so that no direction
/// stands out (common practice for cyclic scales, no source).
pub const CYCLIC_ANCHORS: [[u8; 3]; 4] = [
    [196, 112, 44],
    [112, 150, 58],
    [38, 132, 158],
    [142, 96, 172],
];

/// The 8-bit table for cyclic views: entry i stands for the fraction i/256 of
/// the way round, entry 0 for both ends; consecutive anchors are joined by
/// straight lines in CIELAB, so the scale closes without a seam.
pub fn cyclic_table() -> Vec<[u8; 3]> {
    let lab: Vec<[f64; 3]> = CYCLIC_ANCHORS
        .iter()
        .map(|c| srgb_to_lab(c.map(|v| v as f64 / 255.0)))
        .collect();
    let n = lab.len();
    (0..LEVELS)
        .map(|i| {
            let t = i as f64 / LEVELS as f64 * n as f64;
            let k = (t.floor() as usize).min(n - 1);
            let f = t - k as f64;
            let (a, b) = (lab[k], lab[(k + 1) % n]);
            let mixed = [0, 1, 2].map(|c| (1.0 - f) * a[c] + f * b[c]);
            lab_to_srgb(mixed).map(|v| (v.clamp(0.0, 1.0) * 255.0).round() as u8)
        })
        .collect()
}
