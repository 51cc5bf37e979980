//! Wider vectors where the CPU has them, chosen at run time: the release binary
//! is built for any x86-64 (SSE2, 4 lanes), and on a CPU with AVX2 the hot loops
//! run from copies compiled for 8 lanes. The copies do the same operations in the
//! same order (a multiply, then an add: no fused multiply-add), so results are
//! bit-identical whichever copy runs, on x86-64 and on aarch64 alike.

/// `out[i] += t · src[i]` for every i (the slices have one length).
#[inline(always)]
fn axpy_body(out: &mut [f32], t: f32, src: &[f32]) {
    for (o, s) in out.iter_mut().zip(src) {
        *o += t * s;
    }
}

/// `out[i] += t · src[i]` for every i, with the widest vectors this CPU has.
pub fn axpy(out: &mut [f32], t: f32, src: &[f32]) {
    #[cfg(target_arch = "x86_64")]
    if avx2() {
        // SAFETY: the CPU has AVX2 (checked at run time just above).
        return unsafe { axpy_avx2(out, t, src) };
    }
    axpy_body(out, t, src)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn axpy_avx2(out: &mut [f32], t: f32, src: &[f32]) {
    axpy_body(out, t, src)
}

/// Whether this CPU has AVX2 (detected once).
#[cfg(target_arch = "x86_64")]
pub fn avx2() -> bool {
    static HAS: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *HAS.get_or_init(|| std::is_x86_feature_detected!("avx2"))
}

/// Whether this CPU has AVX2 (never, off x86-64).
#[cfg(not(target_arch = "x86_64"))]
pub fn avx2() -> bool {
    false
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn both_copies_give_the_same_bits() {
        let src: Vec<f32> = (0..1037)
            .map(|i| ((i * 37 % 101) as f32 - 50.0) / 7.0)
            .collect();
        let mut a: Vec<f32> = (0..1037).map(|i| (i as f32).sin()).collect();
        let mut b = a.clone();
        axpy(&mut a, 0.3, &src);
        axpy_body(&mut b, 0.3, &src);
        assert!(a.iter().zip(&b).all(|(x, y)| x.to_bits() == y.to_bits()));
    }
}
