//! Draws tapmap's invented sample captures: glazed tiles from line A of a tile
//! plant (camera stations S1 glaze, S2 edge, S3 final) with hairline cracks,
//! chipped corners, pinholes and glaze runs. Nothing here is real data.
//!
//! Run: `cargo run --example make_samples -- sample_data`
//! The output is byte-for-byte the same on every run (fixed seeds, no clock).

use std::path::Path;

use image::{ImageBuffer, Luma, Rgb};

/// splitmix64: a tiny, well-known deterministic generator (Steele, Lea & Flood,
/// OOPSLA 2014); written here because sample drawing needs nothing more.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    /// Uniform in [0, 1).
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// A tile capture as brightness in [0, 1], row-major.
struct Canvas {
    w: usize,
    h: usize,
    v: Vec<f64>,
}

impl Canvas {
    /// Dark grout around a glazed tile with a soft lighting gradient and fine texture.
    fn tile(w: usize, h: usize, rng: &mut Rng) -> Canvas {
        let margin = 10;
        let mut v = vec![0.0; w * h];
        for y in 0..h {
            for x in 0..w {
                let inside = x >= margin && x < w - margin && y >= margin && y < h - margin;
                let base = if inside {
                    0.72 + 0.08 * (x as f64 / w as f64) - 0.05 * (y as f64 / h as f64)
                } else {
                    0.12
                };
                v[y * w + x] = base + 0.015 * (rng.unit() - 0.5);
            }
        }
        Canvas { w, h, v }
    }

    fn darken(&mut self, x: isize, y: isize, by: f64) {
        if x >= 0 && y >= 0 && (x as usize) < self.w && (y as usize) < self.h {
            let i = y as usize * self.w + x as usize;
            self.v[i] = (self.v[i] - by).max(0.0);
        }
    }

    /// A hairline crack: a wandering one-pixel path.
    fn crack(&mut self, rng: &mut Rng, (mut x, mut y): (f64, f64), steps: usize) {
        let mut dir = rng.unit() * std::f64::consts::TAU;
        for _ in 0..steps {
            self.darken(x.round() as isize, y.round() as isize, 0.35);
            dir += (rng.unit() - 0.5) * 0.6;
            x += dir.cos();
            y += dir.sin();
        }
    }

    /// Small dark discs.
    fn pinholes(&mut self, rng: &mut Rng, n: usize) {
        for _ in 0..n {
            let cx = 20.0 + rng.unit() * (self.w as f64 - 40.0);
            let cy = 20.0 + rng.unit() * (self.h as f64 - 40.0);
            let r = 1.0 + rng.unit() * 1.5;
            for dy in -3..=3 {
                for dx in -3..=3 {
                    if ((dx * dx + dy * dy) as f64) <= r * r {
                        self.darken(cx as isize + dx, cy as isize + dy, 0.45);
                    }
                }
            }
        }
    }

    /// A chipped corner: the tile's top-right corner broken off to grout level.
    fn chip(&mut self, size: usize) {
        let w = self.w;
        for y in 0..size + 10 {
            for x in (w - 10 - size)..w {
                if (x + size + 10 - w) + (size + 10 - y) > size + 10 {
                    let i = y * w + x;
                    self.v[i] = self.v[i].min(0.14);
                }
            }
        }
    }

    /// A glaze run: a brighter, soft-edged vertical streak.
    fn glaze_run(&mut self, x0: f64, top: usize, len: usize) {
        for y in top..(top + len).min(self.h - 10) {
            let fade = 1.0 - (y - top) as f64 / len as f64;
            for x in 0..self.w {
                let d = (x as f64 - x0 - 2.0 * ((y as f64) / 9.0).sin()) / 3.0;
                let i = y * self.w + x;
                self.v[i] = (self.v[i] + 0.12 * fade * (-d * d).exp()).min(1.0);
            }
        }
    }

    /// 16-bit samples holding 12-bit sensor counts (0..=4095).
    fn to_12bit(&self) -> ImageBuffer<Luma<u16>, Vec<u16>> {
        ImageBuffer::from_fn(self.w as u32, self.h as u32, |x, y| {
            Luma([
                (self.v[y as usize * self.w + x as usize].clamp(0.0, 1.0) * 4095.0).round() as u16,
            ])
        })
    }

    fn to_8bit(&self) -> ImageBuffer<Luma<u8>, Vec<u8>> {
        ImageBuffer::from_fn(self.w as u32, self.h as u32, |x, y| {
            Luma(
                [
                    (self.v[y as usize * self.w + x as usize].clamp(0.0, 1.0) * 255.0).round()
                        as u8,
                ],
            )
        })
    }

    /// A warm-glazed colour version for the handheld camera.
    fn to_rgb(&self) -> ImageBuffer<Rgb<u8>, Vec<u8>> {
        ImageBuffer::from_fn(self.w as u32, self.h as u32, |x, y| {
            let v = self.v[y as usize * self.w + x as usize].clamp(0.0, 1.0);
            let c = |f: f64| (v * f * 255.0).round().clamp(0.0, 255.0) as u8;
            Rgb([c(1.05), c(0.95), c(0.80)])
        })
    }
}

/// An EXIF block (TIFF structure) with orientation, capture time and exposure time.
fn exif_block(orientation: u16, captured: &str, exposure: (u32, u32)) -> Vec<u8> {
    use exif::{experimental::Writer, Field, In, Rational, Tag, Value};
    let fields = [
        Field {
            tag: Tag::Orientation,
            ifd_num: In::PRIMARY,
            value: Value::Short(vec![orientation]),
        },
        Field {
            tag: Tag::DateTimeOriginal,
            ifd_num: In::PRIMARY,
            value: Value::Ascii(vec![captured.as_bytes().to_vec()]),
        },
        Field {
            tag: Tag::ExposureTime,
            ifd_num: In::PRIMARY,
            value: Value::Rational(vec![Rational {
                num: exposure.0,
                denom: exposure.1,
            }]),
        },
    ];
    let mut w = Writer::new();
    for f in &fields {
        w.push_field(f);
    }
    let mut buf = std::io::Cursor::new(Vec::new());
    w.write(&mut buf, false).expect("EXIF block in memory");
    buf.into_inner()
}

/// Saves a colour JPEG whose stored pixels, turned by EXIF `orientation`, show `upright`.
fn save_oriented_jpeg(
    path: &Path,
    upright: &image::RgbImage,
    orientation: u16,
    captured: &str,
) -> Result<(), Box<dyn std::error::Error>> {
    use image::{codecs::jpeg::JpegEncoder, imageops, ImageEncoder};
    // Stored = inverse of the display transform applied to the upright scene.
    let stored = match orientation {
        1 => upright.clone(),
        3 => imageops::rotate180(upright),
        6 => imageops::rotate270(upright),
        8 => imageops::rotate90(upright),
        o => return Err(format!("orientation {o} not drawn here").into()),
    };
    let mut bytes = Vec::new();
    let mut enc = JpegEncoder::new_with_quality(&mut bytes, 90);
    enc.set_exif_metadata(exif_block(orientation, captured, (1, 250)))?;
    enc.write_image(
        stored.as_raw(),
        stored.width(),
        stored.height(),
        image::ExtendedColorType::Rgb8,
    )?;
    std::fs::write(path, bytes)?;
    Ok(())
}

/// An invented "learned" first layer: 8 one-channel 7×7 filters, oriented
/// band-pass (Gabor-like) at four angles and two phases with a little fixed
/// noise, zero mean, as a small trained network might hold. Returns (weights
/// out×in×kh×kw, bias).
fn learned_bank() -> (Vec<f32>, Vec<f32>) {
    let mut rng = Rng(0x1EA2_0001);
    let mut w = Vec::with_capacity(8 * 49);
    for n in 0..8 {
        let theta = (n % 4) as f64 * std::f64::consts::PI / 4.0;
        let phase = if n < 4 {
            0.0
        } else {
            std::f64::consts::FRAC_PI_2
        };
        let mut k: Vec<f64> = (0..49)
            .map(|i| {
                let (y, x) = ((i / 7) as f64 - 3.0, (i % 7) as f64 - 3.0);
                let xp = x * theta.cos() + y * theta.sin();
                let yp = -x * theta.sin() + y * theta.cos();
                (-(xp * xp + 0.5 * yp * yp) / 8.0).exp()
                    * (2.0 * std::f64::consts::PI * xp / 5.0 + phase).cos()
                    + 0.04 * (rng.unit() - 0.5)
            })
            .collect();
        let mean = k.iter().sum::<f64>() / 49.0;
        k.iter_mut().for_each(|v| *v = (*v - mean) * 0.35);
        w.extend(k.into_iter().map(|v| v as f32));
    }
    let bias = (0..8)
        .map(|n| [0.01f32, -0.02, 0.0, 0.015][n % 4])
        .collect();
    (w, bias)
}

/// A NumPy .npy file (format 1.0, little-endian float32, C order).
fn npy_f32(shape: &[usize], data: &[f32]) -> Vec<u8> {
    let dims: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
    let shape_txt = if dims.len() == 1 {
        format!("({},)", dims[0])
    } else {
        format!("({})", dims.join(", "))
    };
    let mut header = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': {shape_txt}, }}");
    // The preamble and header together are padded to a multiple of 64 bytes.
    while (10 + header.len() + 1) % 64 != 0 {
        header.push(' ');
    }
    header.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend((header.len() as u16).to_le_bytes());
    out.extend(header.as_bytes());
    for v in data {
        out.extend(v.to_le_bytes());
    }
    out
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let out = std::env::args()
        .nth(1)
        .unwrap_or_else(|| "sample_data".into());
    let out = Path::new(&out);
    let (w, h) = (256, 192);
    let line = out.join("line-a");
    for d in ["s1-glaze", "s2-edge", "s3-final"] {
        std::fs::create_dir_all(line.join(d))?;
    }
    std::fs::create_dir_all(out.join("handheld"))?;

    // Station S1 (glaze): 12-bit sensor counts in 16-bit PNG and TIFF.
    let mut rng = Rng(0x5A11_0001);
    let mut c = Canvas::tile(w, h, &mut rng);
    c.crack(&mut rng, (60.0, 40.0), 170);
    c.to_12bit()
        .save(line.join("s1-glaze/tile-0001-crack.png"))?;

    let mut rng = Rng(0x5A11_0002);
    let mut c = Canvas::tile(w, h, &mut rng);
    c.pinholes(&mut rng, 9);
    c.to_12bit()
        .save(line.join("s1-glaze/tile-0002-pinholes.tif"))?;

    let mut rng = Rng(0x5A11_0005);
    let mut c = Canvas::tile(w, h, &mut rng);
    c.glaze_run(90.0, 20, 140);
    c.to_12bit().save(line.join("s1-glaze/tile-0003-run.png"))?;

    // Station S2 (edge): chipped corners.
    let mut rng = Rng(0x5A11_0003);
    let mut c = Canvas::tile(w, h, &mut rng);
    c.chip(28);
    c.to_12bit().save(line.join("s2-edge/tile-0004-chip.png"))?;

    let mut rng = Rng(0x5A11_0006);
    let mut c = Canvas::tile(w, h, &mut rng);
    c.chip(12);
    c.crack(&mut rng, (200.0, 60.0), 80);
    c.to_12bit()
        .save(line.join("s2-edge/tile-0005-chip-crack.tif"))?;

    // Station S3 (final): a clean tile and a pinhole tile, 8-bit grey.
    let mut rng = Rng(0x5A11_0007);
    Canvas::tile(w, h, &mut rng)
        .to_8bit()
        .save(line.join("s3-final/tile-0006-clean.png"))?;
    let mut rng = Rng(0x5A11_0008);
    let mut c = Canvas::tile(w, h, &mut rng);
    c.pinholes(&mut rng, 4);
    c.to_8bit()
        .save(line.join("s3-final/tile-0007-pinholes.png"))?;

    // Handheld camera: one upright scene stored under EXIF orientations 1, 3, 6 and 8.
    let mut rng = Rng(0x5A11_0004);
    let mut c = Canvas::tile(w, h, &mut rng);
    c.glaze_run(170.0, 25, 120);
    c.crack(&mut rng, (40.0, 150.0), 90);
    let upright = c.to_rgb();
    for (i, o) in [1u16, 3, 6, 8].into_iter().enumerate() {
        let name = format!("handheld/photo-{:04}-orient{o}.jpg", 11 + i);
        save_oriented_jpeg(
            &out.join(name),
            &upright,
            o,
            &format!("2026:11:30 22:{:02}:05", 14 + i),
        )?;
    }

    // An invented learned first layer, as .npy and as safetensors (with bias).
    std::fs::create_dir_all(out.join("learned"))?;
    let (w, bias) = learned_bank();
    std::fs::write(
        out.join("learned/first-layer.npy"),
        npy_f32(&[8, 1, 7, 7], &w),
    )?;
    let wb: Vec<u8> = w.iter().flat_map(|v| v.to_le_bytes()).collect();
    let bb: Vec<u8> = bias.iter().flat_map(|v| v.to_le_bytes()).collect();
    use safetensors::tensor::TensorView;
    let views = vec![
        (
            "conv1.weight".to_string(),
            TensorView::new(safetensors::Dtype::F32, vec![8, 1, 7, 7], &wb)?,
        ),
        (
            "conv1.bias".to_string(),
            TensorView::new(safetensors::Dtype::F32, vec![8], &bb)?,
        ),
    ];
    std::fs::write(
        out.join("learned/first-layer.safetensors"),
        safetensors::serialize(views, None)?,
    )?;

    println!(
        "wrote 11 sample captures and a learned bank under {}",
        out.display()
    );
    Ok(())
}
