//! A corpus of bad and odd inputs for `tapmap apply`: empty, truncated and
//! corrupt files, impossible headers, odd sizes and names, folders and links
//! where files are expected, unreadable files, non-finite samples and set-up
//! mistakes.
//!
//! Every case runs in its own temp folder beside the same three good images, and
//! is compared with a baseline run of those good images alone (one baseline per
//! set of options). A failed input must be named on stderr with its problem, get
//! a `failed` row in `images.csv`, and leave every other output byte for byte as
//! in the baseline; an odd but valid input must be processed; a set-up mistake
//! must stop the run with exit status 2 before anything is written. No case may
//! panic, leave temporary files, or touch its inputs.
//!
//! All cases run from one test, which reports every failing case at the end.

use std::collections::{BTreeMap, HashMap};
use std::ffi::{OsStr, OsString};
use std::io::Cursor;
use std::os::unix::ffi::OsStrExt;
use std::os::unix::fs::{MetadataExt, PermissionsExt};
use std::path::{Path, PathBuf};
use std::process::Output;

use assert_cmd::cargo::cargo_bin_cmd;
use image::{ImageBuffer, ImageFormat, Luma, Rgb};
use ndarray::Array3;
use ndarray_npy::ReadNpyExt;
use tempfile::TempDir;

// ---------------------------------------------------------------------------
// Good images and generators for bad ones
// ---------------------------------------------------------------------------

/// The good images every case runs beside, relative to the input folder. All are
/// at least 27 pixels a side, so they survive the stride-and-pool case too.
const GOOD: [&str; 3] = ["g1.png", "g2.png", "sub/g3.png"];

/// A deterministic, busy sample value (so compressed files are not tiny).
fn busy(x: u32, y: u32, seed: u32) -> u32 {
    let v = x
        .wrapping_mul(2_654_435_761)
        .wrapping_add(y.wrapping_mul(40_503))
        .wrapping_add(seed.wrapping_mul(97_531));
    (v ^ (v >> 13)).wrapping_mul(31) ^ (x * y)
}

fn grey8_image(w: u32, h: u32, seed: u32) -> ImageBuffer<Luma<u8>, Vec<u8>> {
    ImageBuffer::from_fn(w, h, |x, y| Luma([(busy(x, y, seed) % 256) as u8]))
}

fn grey16_image(w: u32, h: u32, seed: u32) -> ImageBuffer<Luma<u16>, Vec<u16>> {
    ImageBuffer::from_fn(w, h, |x, y| Luma([(busy(x, y, seed) % 65536) as u16]))
}

fn rgb8_image(w: u32, h: u32, seed: u32) -> ImageBuffer<Rgb<u8>, Vec<u8>> {
    ImageBuffer::from_fn(w, h, |x, y| {
        let v = busy(x, y, seed);
        Rgb([(v % 256) as u8, (x * 8) as u8, (y * 8) as u8])
    })
}

/// Encodes an image buffer in `format` to bytes.
fn encode<P, C>(img: &ImageBuffer<P, C>, format: ImageFormat) -> Vec<u8>
where
    P: image::PixelWithColorType,
    [P::Subpixel]: image::EncodableLayout,
    C: std::ops::Deref<Target = [P::Subpixel]>,
{
    let mut c = Cursor::new(Vec::new());
    img.write_to(&mut c, format).unwrap();
    c.into_inner()
}

fn write(path: &Path, bytes: &[u8]) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    std::fs::write(path, bytes).unwrap();
}

fn write_good(inp: &Path) {
    write(
        &inp.join(GOOD[0]),
        &encode(&grey8_image(32, 28, 1), ImageFormat::Png),
    );
    write(
        &inp.join(GOOD[1]),
        &encode(&grey16_image(29, 35, 2), ImageFormat::Png),
    );
    write(
        &inp.join(GOOD[2]),
        &encode(&rgb8_image(40, 30, 3), ImageFormat::Png),
    );
}

/// The 8-bit grey PNG (24 × 20) that the PNG cases cut up.
fn sample_png() -> Vec<u8> {
    encode(&grey8_image(24, 20, 7), ImageFormat::Png)
}

/// The colour JPEG (48 × 40) that the JPEG cases cut up.
fn sample_jpeg() -> Vec<u8> {
    use image::{codecs::jpeg::JpegEncoder, ImageEncoder};
    let img = rgb8_image(48, 40, 8);
    let mut bytes = Vec::new();
    JpegEncoder::new_with_quality(&mut bytes, 90)
        .write_image(img.as_raw(), 48, 40, image::ExtendedColorType::Rgb8)
        .unwrap();
    bytes
}

/// The 16-bit grey TIFF (20 × 16) that the TIFF cases cut up.
fn sample_tiff() -> Vec<u8> {
    encode(&grey16_image(20, 16, 9), ImageFormat::Tiff)
}

/// CRC-32 as PNG chunks use it (ISO 3309 polynomial, reflected).
fn crc32(bytes: &[u8]) -> u32 {
    let mut c = 0xFFFF_FFFFu32;
    for &b in bytes {
        c ^= u32::from(b);
        for _ in 0..8 {
            c = if c & 1 != 0 {
                0xEDB8_8320 ^ (c >> 1)
            } else {
                c >> 1
            };
        }
    }
    !c
}

/// A PNG whose IHDR says `w × h`, with the IHDR CRC fixed so only the size is wrong.
fn png_claiming(w: u32, h: u32) -> Vec<u8> {
    let mut b = sample_png();
    assert_eq!(&b[12..16], b"IHDR");
    b[16..20].copy_from_slice(&w.to_be_bytes());
    b[20..24].copy_from_slice(&h.to_be_bytes());
    let crc = crc32(&b[12..29]);
    b[29..33].copy_from_slice(&crc.to_be_bytes());
    b
}

/// A PNG with one byte in the middle of its first IDAT's data flipped (CRC left stale).
fn png_with_bad_idat() -> Vec<u8> {
    let mut b = sample_png();
    let at = b.windows(4).position(|w| w == b"IDAT").unwrap();
    let len = u32::from_be_bytes(b[at - 4..at].try_into().unwrap()) as usize;
    b[at + 4 + len / 2] ^= 0x5A;
    b
}

/// A JPEG with an EXIF block whose orientation is `orientation`.
fn jpeg_with_orientation(orientation: u16) -> Vec<u8> {
    use exif::{experimental::Writer, Field, In, Tag, Value};
    use image::{codecs::jpeg::JpegEncoder, ImageEncoder};
    let field = Field {
        tag: Tag::Orientation,
        ifd_num: In::PRIMARY,
        value: Value::Short(vec![orientation]),
    };
    let mut w = Writer::new();
    w.push_field(&field);
    let mut block = Cursor::new(Vec::new());
    w.write(&mut block, false).unwrap();
    let img = rgb8_image(32, 16, 4);
    let mut bytes = Vec::new();
    let mut enc = JpegEncoder::new_with_quality(&mut bytes, 95);
    enc.set_exif_metadata(block.into_inner()).unwrap();
    enc.write_image(img.as_raw(), 32, 16, image::ExtendedColorType::Rgb8)
        .unwrap();
    bytes
}

/// A one-channel 32-bit float TIFF (6 × 5) with `odd` at one sample.
fn float_tiff_with(odd: f32) -> Vec<u8> {
    use tiff::encoder::{colortype::Gray32Float, TiffEncoder};
    let mut data: Vec<f32> = (0..30).map(|i| i as f32 / 30.0).collect();
    data[17] = odd;
    let mut c = Cursor::new(Vec::new());
    TiffEncoder::new(&mut c)
        .unwrap()
        .write_image::<Gray32Float>(6, 5, &data)
        .unwrap();
    c.into_inner()
}

/// A float32 H × W `.npy` array, header written by hand (format version 1.0).
fn npy_f32(h: usize, w: usize, data: &[f32]) -> Vec<u8> {
    assert_eq!(data.len(), h * w);
    let mut header =
        format!("{{'descr': '<f4', 'fortran_order': False, 'shape': ({h}, {w}), }}").into_bytes();
    // magic (6) + version (2) + length (2) + header, padded to a multiple of 64 with '\n' last
    while (10 + header.len() + 1) % 64 != 0 {
        header.push(b' ');
    }
    header.push(b'\n');
    let mut b = b"\x93NUMPY\x01\x00".to_vec();
    b.extend_from_slice(&(header.len() as u16).to_le_bytes());
    b.extend_from_slice(&header);
    for v in data {
        b.extend_from_slice(&v.to_le_bytes());
    }
    b
}

// ---------------------------------------------------------------------------
// The harness
// ---------------------------------------------------------------------------

/// Where a case puts its files: `inp` is the folder named on the command line
/// (walked, holding the good images); `side` is a folder that is not walked, for
/// files the case names explicitly.
struct Ctx {
    inp: PathBuf,
    side: PathBuf,
}

/// What a case must produce.
enum Expect {
    /// Exit 1; the input whose `images.csv` path is `row` failed, stderr names it
    /// and contains every one of `says` (compared without case; `a|b` accepts
    /// either wording).
    Fail {
        row: String,
        says: Vec<&'static str>,
    },
    /// Exit 0; the input `row` was processed into `maps/<stem>.npy` of shape `dims`
    /// (channels, height, width) and one view per channel.
    Ok {
        row: String,
        stem: PathBuf,
        dims: (usize, usize, usize),
    },
    /// Exit 0 and exactly the baseline's outputs: nothing in the odd entry is an input.
    Ignored,
    /// Exit 2 before any work; stderr contains every one of `says`; nothing written.
    Setup { says: Vec<&'static str> },
}

type Make = Box<dyn Fn(&Ctx) -> Vec<OsString>>;

/// One case: a name, options before the inputs, a closure that makes the bad
/// file(s) and returns further command-line words (explicit inputs, options),
/// and what must happen.
struct Case {
    name: &'static str,
    opts: &'static [&'static str],
    make: Make,
    expect: Expect,
    /// Run the binary as an unprivileged user (for permission cases under root).
    unprivileged: bool,
}

const EDGES: &[&str] = &["--bank", "edges"];
const SAVE: &[&str] = &["--save", "maps,views,stats,manifest", "-q", "-j", "2"];

fn case(
    name: &'static str,
    opts: &'static [&'static str],
    expect: Expect,
    make: impl Fn(&Ctx) -> Vec<OsString> + 'static,
) -> Case {
    Case {
        name,
        opts,
        make: Box::new(make),
        expect,
        unprivileged: false,
    }
}

fn fail(row: &str, says: &[&'static str]) -> Expect {
    Expect::Fail {
        row: row.to_string(),
        says: says.to_vec(),
    }
}

fn ok(row: &str, stem: &str, dims: (usize, usize, usize)) -> Expect {
    Expect::Ok {
        row: row.to_string(),
        stem: PathBuf::from(stem),
        dims,
    }
}

fn setup(says: &[&'static str]) -> Expect {
    Expect::Setup {
        says: says.to_vec(),
    }
}

/// Writes `bytes` as `name` in the walked folder; no further arguments.
fn put(name: &'static str, bytes: Vec<u8>) -> impl Fn(&Ctx) -> Vec<OsString> {
    move |c: &Ctx| {
        write(&c.inp.join(name), &bytes);
        Vec::new()
    }
}

fn is_root() -> bool {
    // SAFETY: geteuid has no preconditions and cannot fail.
    unsafe { libc::geteuid() == 0 }
}

/// Runs tapmap with `args`; as user/group 65534 when asked and running as root
/// (where file permissions would otherwise not apply).
fn run_tapmap(args: &[OsString], unprivileged: bool) -> Output {
    if unprivileged && is_root() {
        std::process::Command::new("setpriv")
            .args(["--reuid=65534", "--regid=65534", "--clear-groups"])
            .arg(env!("CARGO_BIN_EXE_tapmap"))
            .args(args)
            .output()
            .expect("setpriv runs")
    } else {
        cargo_bin_cmd!("tapmap").args(args).output().unwrap()
    }
}

fn apply_args(opts: &[&str], out: &Path, inp: &Path, extra: &[OsString]) -> Vec<OsString> {
    let mut a: Vec<OsString> = vec!["apply".into()];
    a.extend(opts.iter().map(OsString::from));
    a.extend(SAVE.iter().map(OsString::from));
    a.push("-o".into());
    a.push(out.into());
    a.push(inp.into());
    a.extend(extra.iter().cloned());
    a
}

/// Every entry below `root` (not following links): kind, mode, mtime and content
/// (a link's target), keyed by relative path.
fn snapshot(root: &Path) -> BTreeMap<PathBuf, String> {
    let mut m = BTreeMap::new();
    for e in walkdir::WalkDir::new(root).follow_links(false) {
        let e = e.unwrap();
        let md = e.path().symlink_metadata().unwrap();
        let what = if md.file_type().is_symlink() {
            format!("link to {:?}", std::fs::read_link(e.path()).unwrap())
        } else if md.is_dir() {
            "folder".to_string()
        } else {
            let bytes = std::fs::read(e.path()).unwrap_or_default();
            format!("file {} bytes, crc {:08x}", bytes.len(), crc32(&bytes))
        };
        let rel = e.path().strip_prefix(root).unwrap().to_path_buf();
        m.insert(
            rel,
            format!(
                "{what}, mode {:o}, mtime {}.{}",
                md.mode(),
                md.mtime(),
                md.mtime_nsec()
            ),
        );
    }
    m
}

/// Files below `root` (relative path to bytes), or empty when `root` is missing.
fn files_below(root: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    let mut m = BTreeMap::new();
    if !root.exists() {
        return m;
    }
    for e in walkdir::WalkDir::new(root) {
        let e = e.unwrap();
        if e.file_type().is_file() {
            let rel = e.path().strip_prefix(root).unwrap().to_path_buf();
            m.insert(rel, std::fs::read(e.path()).unwrap());
        }
    }
    m
}

/// Names under `root` that look like temporary or partial files.
fn leftovers(root: &Path) -> Vec<PathBuf> {
    if !root.exists() {
        return Vec::new();
    }
    walkdir::WalkDir::new(root)
        .min_depth(1)
        .into_iter()
        .map(|e| e.unwrap())
        .filter(|e| {
            let n = e.file_name().to_string_lossy();
            n.starts_with('.') || n.ends_with(".tmp") || n.ends_with(".part")
        })
        .map(|e| e.path().to_path_buf())
        .collect()
}

/// A CSV file as its header and rows.
fn csv_table(path: &Path) -> Result<(Vec<String>, Vec<Vec<String>>), String> {
    let bytes = std::fs::read(path).map_err(|e| format!("{}: {e}", path.display()))?;
    parse_csv(&bytes)
}

fn column(header: &[String], name: &str) -> Result<usize, String> {
    header
        .iter()
        .position(|h| h == name)
        .ok_or_else(|| format!("no column '{name}' in {header:?}"))
}

/// The outputs of a run of the good images alone.
struct Baseline {
    images: (Vec<String>, Vec<Vec<String>>),
    stats: Vec<u8>,
    /// Files under the output folder, tables and manifest excepted.
    files: BTreeMap<PathBuf, Vec<u8>>,
}

/// Baseline runs, one per set of options, made when first needed.
struct Baselines {
    dir: TempDir,
    runs: HashMap<Vec<String>, Baseline>,
}

impl Baselines {
    fn new() -> Self {
        let dir = TempDir::new().unwrap();
        write_good(&dir.path().join("in"));
        Baselines {
            dir,
            runs: HashMap::new(),
        }
    }

    fn get(&mut self, opts: &[&str]) -> Result<&Baseline, String> {
        let key: Vec<String> = opts.iter().map(|s| s.to_string()).collect();
        if !self.runs.contains_key(&key) {
            let out = self.dir.path().join(format!("out{}", self.runs.len()));
            let inp = self.dir.path().join("in");
            let o = run_tapmap(&apply_args(opts, &out, &inp, &[]), false);
            if o.status.code() != Some(0) {
                return Err(format!(
                    "baseline with {opts:?} exited {:?}: {}",
                    o.status.code(),
                    String::from_utf8_lossy(&o.stderr)
                ));
            }
            let images = csv_table(&out.join("images.csv"))?;
            if images.1.len() != GOOD.len() {
                return Err(format!("baseline with {opts:?}: rows {:?}", images.1));
            }
            let stats = std::fs::read(out.join("stats.csv")).map_err(|e| e.to_string())?;
            let files = output_files(&out);
            for g in GOOD {
                let map = Path::new("maps").join(g).with_extension("npy");
                if !files.contains_key(&map) {
                    return Err(format!("baseline with {opts:?} has no {}", map.display()));
                }
            }
            self.runs.insert(
                key.clone(),
                Baseline {
                    images,
                    stats,
                    files,
                },
            );
        }
        Ok(&self.runs[&key])
    }
}

const TABLES: [&str; 3] = ["images.csv", "stats.csv", "manifest.json"];

/// Files under an output folder other than the tables and the manifest.
fn output_files(out: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    let mut m = files_below(out);
    m.retain(|p, _| !TABLES.iter().any(|t| p == Path::new(t)));
    m
}

/// Collects the problems of one case.
#[derive(Default)]
struct Problems(Vec<String>);

impl Problems {
    fn check(&mut self, ok: bool, what: impl FnOnce() -> String) {
        if !ok {
            self.0.push(what());
        }
    }
}

/// Whether `hay` contains `needle` without regard to case; `a|b` accepts either.
fn contains_nocase(hay: &str, needle: &str) -> bool {
    let hay = hay.to_lowercase();
    needle.split('|').any(|n| hay.contains(&n.to_lowercase()))
}

/// Plain words for "the file stops before its data does" (any one will do).
const SHORT: &str = "end of file|truncated|ends early|ends before|not enough bytes|too short";

/// Runs one case; returns its problems (empty when it behaved).
fn run_case(c: &Case, baselines: &mut Baselines) -> Vec<String> {
    let t = TempDir::new().unwrap();
    let ctx = Ctx {
        inp: t.path().join("in"),
        side: t.path().join("side"),
    };
    write_good(&ctx.inp);
    std::fs::create_dir_all(&ctx.side).unwrap();
    let extra = (c.make)(&ctx);
    if c.unprivileged {
        // The unprivileged run must still read the good files and write OUT.
        for d in [t.path(), &ctx.inp, &ctx.inp.join("sub"), &ctx.side] {
            std::fs::set_permissions(d, std::fs::Permissions::from_mode(0o777)).unwrap();
        }
    }
    let before = (snapshot(&ctx.inp), snapshot(&ctx.side));
    let out = t.path().join("out");
    let o = run_tapmap(&apply_args(c.opts, &out, &ctx.inp, &extra), c.unprivileged);
    let stderr = String::from_utf8_lossy(&o.stderr).into_owned();
    let code = o.status.code();
    // Shown with --nocapture: what each case got.
    println!("[{}] exit {code:?}\n{}", c.name, stderr.trim_end());
    let mut p = Problems::default();

    p.check(!stderr.contains("panicked"), || "tapmap panicked".into());
    p.check((snapshot(&ctx.inp), snapshot(&ctx.side)) == before, || {
        "an input file or folder changed".into()
    });
    let left = leftovers(&out);
    p.check(left.is_empty(), || {
        format!("temporary or hidden files left: {left:?}")
    });

    match &c.expect {
        Expect::Setup { says } => {
            p.check(code == Some(2), || format!("exit {code:?}, want 2"));
            for s in says {
                p.check(contains_nocase(&stderr, s), || {
                    format!("stderr does not say '{s}'")
                });
            }
            let written = files_below(&out);
            p.check(written.is_empty(), || {
                format!(
                    "files written before a set-up error: {:?}",
                    written.keys().collect::<Vec<_>>()
                )
            });
        }
        expect => {
            let base = match baselines.get(c.opts) {
                Ok(b) => b,
                Err(e) => return vec![e],
            };
            if let Err(e) = compare_with_baseline(expect, code, &stderr, &out, base, &mut p) {
                p.0.push(e);
            }
        }
    }
    if !p.0.is_empty() {
        p.0.push(format!(
            "exit status {code:?}; stderr:\n{}",
            stderr.trim_end()
        ));
    }
    p.0
}

fn compare_with_baseline(
    expect: &Expect,
    code: Option<i32>,
    stderr: &str,
    out: &Path,
    base: &Baseline,
    p: &mut Problems,
) -> Result<(), String> {
    let want_code = if matches!(expect, Expect::Fail { .. }) {
        1
    } else {
        0
    };
    p.check(code == Some(want_code), || {
        format!("exit {code:?}, want {want_code}")
    });
    let (header, rows) = csv_table(&out.join("images.csv"))?;
    p.check(header == base.images.0, || {
        format!("images.csv header {header:?}")
    });
    let (path_col, status_col, error_col) = (
        column(&header, "path")?,
        column(&header, "status")?,
        column(&header, "error")?,
    );
    let odd_row = match expect {
        Expect::Fail { row, .. } | Expect::Ok { row, .. } => Some(row.as_str()),
        _ => None,
    };
    let (odd, others): (Vec<_>, Vec<_>) = rows
        .iter()
        .cloned()
        .partition(|r| Some(r[path_col].as_str()) == odd_row);
    p.check(others == base.images.1, || {
        format!(
            "images.csv rows of the good images differ from the baseline:\n  got  {others:?}\n  want {:?}",
            base.images.1
        )
    });
    let stats = std::fs::read(out.join("stats.csv")).map_err(|e| format!("stats.csv: {e}"))?;
    let files = output_files(out);
    for (path, bytes) in &base.files {
        // Maps and views must match byte for byte; other run files (such as a
        // journal) must exist.
        let same = if path.starts_with("maps") || path.starts_with("views") {
            files.get(path) == Some(bytes)
        } else {
            files.contains_key(path)
        };
        p.check(same, || {
            format!("{} missing or different from the baseline", path.display())
        });
    }
    let extra: Vec<&PathBuf> = files
        .keys()
        .filter(|k| !base.files.contains_key(*k))
        .collect();

    match expect {
        Expect::Fail { row, says } => {
            let name = Path::new(row).file_name().unwrap().to_string_lossy();
            p.check(stderr.contains(&*name), || {
                format!("stderr does not name {name}")
            });
            for s in says {
                p.check(contains_nocase(stderr, s), || {
                    format!("stderr does not say '{s}'")
                });
            }
            p.check(odd.len() == 1, || {
                format!("want one images.csv row for {row}, got {odd:?}")
            });
            if let Some(r) = odd.first() {
                p.check(r[status_col] == "failed", || {
                    format!("status '{}', want failed", r[status_col])
                });
                p.check(!r[error_col].is_empty(), || "empty error column".into());
            }
            p.check(stats == base.stats, || {
                "stats.csv differs from the baseline".into()
            });
            p.check(extra.is_empty(), || {
                format!("outputs beyond the baseline: {extra:?}")
            });
        }
        Expect::Ok { row, stem, dims } => {
            p.check(stderr.is_empty(), || "stderr is not empty".into());
            p.check(odd.len() == 1, || {
                format!("want one images.csv row for {row}, got {odd:?}")
            });
            if let Some(r) = odd.first() {
                p.check(r[status_col] == "ok", || {
                    format!("status '{}', want ok", r[status_col])
                });
            }
            // stats.csv: the baseline's rows, plus one per channel for the odd input.
            let (sh, srows) = csv_table(&out.join("stats.csv"))?;
            let (_, brows) = parse_csv(&base.stats)?;
            let sp = column(&sh, "path")?;
            let (mine, rest): (Vec<_>, Vec<_>) = srows.into_iter().partition(|r| r[sp] == *row);
            p.check(rest == brows, || {
                "stats.csv rows of the good images differ from the baseline".into()
            });
            let (w_col, h_col) = (column(&sh, "width")?, column(&sh, "height")?);
            p.check(mine.len() == dims.0, || {
                format!("{} stats rows for {row}, want {}", mine.len(), dims.0)
            });
            for r in &mine {
                p.check(
                    r[h_col] == dims.1.to_string() && r[w_col] == dims.2.to_string(),
                    || format!("stats row {r:?}, want {}×{}", dims.2, dims.1),
                );
            }
            // Outputs: maps/<stem>.npy with the right shape and one view per channel.
            let map = Path::new("maps").join(stem).with_extension("npy");
            let views = Path::new("views").join(stem);
            let n_views = extra.iter().filter(|e| e.starts_with(&views)).count();
            p.check(extra.iter().any(|e| **e == map), || {
                format!("no {}", map.display())
            });
            p.check(n_views == dims.0, || {
                format!("{n_views} views under {}, want {}", views.display(), dims.0)
            });
            p.check(
                extra.iter().all(|e| **e == map || e.starts_with(&views)),
                || format!("unexpected outputs: {extra:?}"),
            );
            if let Ok(f) = std::fs::File::open(out.join(&map)) {
                match Array3::<f32>::read_npy(f) {
                    Ok(a) => p.check(a.dim() == *dims, || {
                        format!("map shape {:?}, want {dims:?}", a.dim())
                    }),
                    Err(e) => p.0.push(format!("{}: {e}", map.display())),
                }
            }
        }
        Expect::Ignored => {
            p.check(stderr.is_empty(), || "stderr is not empty".into());
            p.check(stats == base.stats, || {
                "stats.csv differs from the baseline".into()
            });
            p.check(extra.is_empty(), || {
                format!("outputs beyond the baseline: {extra:?}")
            });
        }
        Expect::Setup { .. } => unreachable!("set-up cases have no baseline"),
    }
    Ok(())
}

fn parse_csv(bytes: &[u8]) -> Result<(Vec<String>, Vec<Vec<String>>), String> {
    let mut r = csv::Reader::from_reader(bytes);
    let header = r
        .headers()
        .map_err(|e| e.to_string())?
        .iter()
        .map(String::from)
        .collect();
    let rows = r
        .records()
        .map(|rec| rec.map(|r| r.iter().map(String::from).collect::<Vec<_>>()))
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| e.to_string())?;
    Ok((header, rows))
}

// ---------------------------------------------------------------------------
// The cases
// ---------------------------------------------------------------------------

fn cut(bytes: &[u8], at: usize) -> Vec<u8> {
    bytes[..at].to_vec()
}

fn cases() -> Vec<Case> {
    let png = sample_png();
    let jpg = sample_jpeg();
    let tif = sample_tiff();
    let (pl, jl, tl) = (png.len(), jpg.len(), tif.len());
    let mut v = vec![
        // A zero-byte file is reported as empty.
        case(
            "empty file",
            EDGES,
            fail("empty.png", &["empty"]),
            put("empty.png", Vec::new()),
        ),
        // A PNG cut right after its signature.
        case(
            "png cut at 8",
            EDGES,
            fail("cut-8.png", &[SHORT]),
            put("cut-8.png", cut(&png, 8)),
        ),
        // A PNG cut right after its IHDR chunk (no image data at all).
        case(
            "png cut at 33",
            EDGES,
            fail("cut-33.png", &[SHORT]),
            put("cut-33.png", cut(&png, 33)),
        ),
        // A PNG cut a little way into its first IDAT chunk.
        case(
            "png cut at 60",
            EDGES,
            fail("cut-60.png", &[SHORT]),
            put("cut-60.png", cut(&png, 60)),
        ),
        // A PNG cut in the middle of its image data.
        case(
            "png cut at half",
            EDGES,
            fail("cut-half.png", &[SHORT]),
            put("cut-half.png", cut(&png, pl / 2)),
        ),
        // A PNG missing its final 12 bytes (the IEND chunk): the file is not whole.
        case(
            "png cut at len-12",
            EDGES,
            fail("cut-end.png", &[SHORT]),
            put("cut-end.png", cut(&png, pl - 12)),
        ),
        // A JPEG cut right after its start-of-image marker: too little to recognise.
        case(
            "jpeg cut at 2",
            EDGES,
            fail("cut-2.jpg", &["not an image"]),
            put("cut-2.jpg", cut(&jpg, 2)),
        ),
        // A JPEG cut inside its tables, before any frame header.
        case(
            "jpeg cut at 100",
            EDGES,
            fail("cut-100.jpg", &[SHORT]),
            put("cut-100.jpg", cut(&jpg, 100)),
        ),
        // A JPEG cut in the middle of its entropy-coded scan: half the pixels are missing.
        case(
            "jpeg cut at half",
            EDGES,
            fail("cut-half.jpg", &[SHORT]),
            put("cut-half.jpg", cut(&jpg, jl / 2)),
        ),
        // A TIFF cut inside its 8-byte header.
        case(
            "tiff cut at 6",
            EDGES,
            fail("cut-6.tif", &[SHORT]),
            put("cut-6.tif", cut(&tif, 6)),
        ),
        // A TIFF cut in the middle of its strip data (its directory is lost).
        case(
            "tiff cut at half",
            EDGES,
            fail("cut-half.tif", &[SHORT]),
            put("cut-half.tif", cut(&tif, tl / 2)),
        ),
        // A TIFF missing the last 20 bytes of its image directory.
        case(
            "tiff cut at len-20",
            EDGES,
            fail("cut-end.tif", &[SHORT]),
            put("cut-end.tif", cut(&tif, tl - 20)),
        ),
        // One flipped byte of IDAT data: the chunk's CRC no longer matches.
        case(
            "png idat crc mismatch",
            EDGES,
            fail("flipped.png", &["crc"]),
            put("flipped.png", png_with_bad_idat()),
        ),
        // A header claiming 100000 × 100000 pixels is refused before decoding.
        case(
            "png claims 100000x100000",
            EDGES,
            fail("huge.png", &["pixels", "limit"]),
            put("huge.png", png_claiming(100_000, 100_000)),
        ),
        // A 1 × 1 image: one output pixel per channel under the default `same` extent.
        case(
            "1x1 image",
            EDGES,
            ok("one.png", "one", (3, 1, 1)),
            put("one.png", encode(&grey8_image(1, 1, 5), ImageFormat::Png)),
        ),
        // One column, nine rows.
        case(
            "1xN image",
            EDGES,
            ok("column.png", "column", (3, 9, 1)),
            put(
                "column.png",
                encode(&grey8_image(1, 9, 5), ImageFormat::Png),
            ),
        ),
        // Nine columns, one row.
        case(
            "Nx1 image",
            EDGES,
            ok("row.png", "row", (3, 1, 9)),
            put("row.png", encode(&grey8_image(9, 1, 5), ImageFormat::Png)),
        ),
        // A 2 × 2 image cannot hold a 3 × 3 kernel without padding.
        case(
            "smaller than the kernel, valid extent",
            &["--bank", "edges", "--extent", "valid"],
            fail(
                "tiny.png",
                &["kernel height 3 is larger than the padded input height 2"],
            ),
            put("tiny.png", encode(&grey8_image(2, 2, 5), ImageFormat::Png)),
        ),
        // Content decides the format: a PNG named .tif is read as a PNG.
        case(
            "png named .tif",
            EDGES,
            ok("png-inside.tif", "png-inside", (3, 20, 24)),
            put("png-inside.tif", png.clone()),
        ),
        // A text file with an image extension.
        case(
            "text named .png",
            EDGES,
            fail("notes.png", &["not an image"]),
            put(
                "notes.png",
                b"shift notes: station 2 lamp replaced\n".to_vec(),
            ),
        ),
        // A folder named like an image inside a walked folder is walked (here: empty).
        case(
            "folder named x.png, walked",
            EDGES,
            Expect::Ignored,
            |c: &Ctx| {
                std::fs::create_dir(c.inp.join("x.png")).unwrap();
                Vec::new()
            },
        ),
        // A folder named like an image, named on the command line: it holds no images.
        case(
            "folder named x.png, named explicitly",
            EDGES,
            setup(&["x.png", "holds no image files"]),
            |c: &Ctx| {
                std::fs::create_dir(c.side.join("x.png")).unwrap();
                vec![c.side.join("x.png").into()]
            },
        ),
        // A link to its own folder is reported once, not followed for ever.
        case(
            "symlink loop",
            EDGES,
            fail("loop", &["loops back"]),
            |c: &Ctx| {
                std::os::unix::fs::symlink(".", c.inp.join("loop")).unwrap();
                Vec::new()
            },
        ),
        // A link whose target does not exist.
        case(
            "broken symlink",
            EDGES,
            fail(
                "gone.png",
                &["symbolic link to missing.png", "does not exist"],
            ),
            |c: &Ctx| {
                std::os::unix::fs::symlink("missing.png", c.inp.join("gone.png")).unwrap();
                Vec::new()
            },
        ),
        // A name that is not UTF-8 is processed and its outputs keep the name's bytes.
        case(
            "non-UTF-8 file name",
            EDGES,
            Expect::Ok {
                row: "caf\\xe9.png".into(),
                stem: PathBuf::from(OsStr::from_bytes(b"caf\xe9")),
                dims: (3, 5, 7),
            },
            |c: &Ctx| {
                let name = OsStr::from_bytes(b"caf\xe9.png");
                write(
                    &c.inp.join(name),
                    &encode(&grey8_image(7, 5, 6), ImageFormat::Png),
                );
                Vec::new()
            },
        ),
        // Spaces in a name are kept in the outputs' names.
        case(
            "name with spaces",
            EDGES,
            ok("line a tile 7.png", "line a tile 7", (3, 5, 7)),
            put(
                "line a tile 7.png",
                encode(&grey8_image(7, 5, 6), ImageFormat::Png),
            ),
        ),
        // Two files given alone with one stem would overwrite each other's outputs.
        case(
            "duplicate stems",
            EDGES,
            setup(&[
                "would be written by more than one input: x",
                "a/x.png",
                "b/x.tif",
            ]),
            |c: &Ctx| {
                let (a, b) = (c.side.join("a/x.png"), c.side.join("b/x.tif"));
                write(&a, &encode(&grey8_image(8, 8, 1), ImageFormat::Png));
                write(&b, &encode(&grey16_image(8, 8, 2), ImageFormat::Tiff));
                vec![a.into(), b.into()]
            },
        ),
        // EXIF orientation 9 is not a defined value: the image cannot be turned upright.
        case(
            "exif orientation 9",
            EDGES,
            fail("turned.jpg", &["orientation 9"]),
            put("turned.jpg", jpeg_with_orientation(9)),
        ),
        // With orientation ignored, the same file reads as stored.
        case(
            "exif orientation 9, ignored",
            &["--bank", "edges", "--ignore-orientation"],
            ok("turned.jpg", "turned", (3, 16, 32)),
            put("turned.jpg", jpeg_with_orientation(9)),
        ),
        // 65535 in a 16-bit PNG is full scale, not a bad value.
        case(
            "16-bit full scale",
            EDGES,
            ok("bright.png", "bright", (3, 6, 8)),
            put(
                "bright.png",
                encode(
                    &ImageBuffer::from_fn(8, 6, |x, _| Luma([if x < 4 { 65535u16 } else { 0 }])),
                    ImageFormat::Png,
                ),
            ),
        ),
        // A float TIFF with a NaN sample.
        case(
            "float tiff with NaN",
            EDGES,
            fail("nan.tif", &["not finite"]),
            put("nan.tif", float_tiff_with(f32::NAN)),
        ),
        // A float TIFF with +infinity.
        case(
            "float tiff with +inf",
            EDGES,
            fail("inf.tif", &["not finite"]),
            put("inf.tif", float_tiff_with(f32::INFINITY)),
        ),
        // A float32 array with a NaN, named explicitly (arrays are never walked).
        case(
            "npy with NaN",
            EDGES,
            fail("nan.npy", &["not finite"]),
            |c: &Ctx| {
                let mut data: Vec<f32> = (0..20).map(|i| i as f32 * 0.05).collect();
                data[7] = f32::NAN;
                let p = c.side.join("nan.npy");
                write(&p, &npy_f32(4, 5, &data));
                vec![p.into()]
            },
        ),
        // A bank file with a NaN tap is refused before any image is read.
        case(
            "bank file with NaN tap",
            &[],
            setup(&["nan-bank.toml", "finite"]),
            |c: &Ctx| {
                let p = c.side.join("nan-bank.toml");
                write(
                    &p,
                    b"name = \"holes\"\nop = \"correlate\"\n\n[[kernel]]\nname = \"centre\"\n\
                      taps = [[0, 1, 0], [1, nan, 1], [0, 1, 0]]\n",
                );
                vec!["--bank".into(), p.into()]
            },
        ),
        // Stride 8 then a 4 × 4 pool leaves a 9 × 9 image nothing to pool, while the
        // larger good images still get maps; the message gives the sizes.
        case(
            "stride and pool leave nothing",
            &[
                "--bank",
                "edges",
                "--stride",
                "8",
                "--extent",
                "valid",
                "--pool",
                "max",
                "--pool-size",
                "4",
            ],
            fail("nine.png", &["pool max 4×4", "input height 1"]),
            put("nine.png", encode(&grey8_image(9, 9, 5), ImageFormat::Png)),
        ),
        // Only the 8-byte PNG signature.
        case(
            "png signature only",
            EDGES,
            fail("signature.png", &[SHORT]),
            put("signature.png", cut(&png, 8)),
        ),
        // 4 KiB of zeros named .jpg: no format starts like that.
        case(
            "zero-filled .jpg",
            EDGES,
            fail("zeros.jpg", &["not an image"]),
            put("zeros.jpg", vec![0u8; 4096]),
        ),
        // A BMP whose pixel array stops half way.
        case(
            "bmp with truncated pixels",
            EDGES,
            fail("short.bmp", &[SHORT]),
            {
                let bmp = encode(&rgb8_image(16, 12, 2), ImageFormat::Bmp);
                let at = 54 + (bmp.len() - 54) / 2;
                put("short.bmp", cut(&bmp, at))
            },
        ),
        // A PGM whose header promises 8 × 8 samples but only 20 follow.
        case(
            "pgm with fewer samples than its header",
            EDGES,
            fail("short.pgm", &[SHORT]),
            put("short.pgm", {
                let mut b = b"P5\n8 8\n255\n".to_vec();
                b.extend((0..20u8).map(|i| i * 12));
                b
            }),
        ),
    ];
    // A file nobody may read (mode 000); run unprivileged, since root reads anything.
    let mut locked = case(
        "unreadable file",
        EDGES,
        fail("locked.png", &["permission"]),
        |c: &Ctx| {
            let p = c.inp.join("locked.png");
            write(&p, &encode(&grey8_image(8, 8, 3), ImageFormat::Png));
            std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o000)).unwrap();
            Vec::new()
        },
    );
    locked.unprivileged = true;
    v.push(locked);
    v
}

#[test]
fn bad_inputs_fail_alone_and_odd_inputs_pass() {
    let cases = cases();
    assert!(cases.len() >= 30, "{} cases", cases.len());
    let mut names = std::collections::HashSet::new();
    assert!(
        cases.iter().all(|c| names.insert(c.name)),
        "case names unique"
    );
    let mut baselines = Baselines::new();
    let mut report = Vec::new();
    for c in &cases {
        let problems = run_case(c, &mut baselines);
        if !problems.is_empty() {
            report.push(format!("case '{}':\n  {}", c.name, problems.join("\n  ")));
        }
    }
    assert!(
        report.is_empty(),
        "{} of {} cases failed:\n\n{}",
        report.len(),
        cases.len(),
        report.join("\n\n")
    );
}

/// A file that disappears between listing and reading fails alone: listed with
/// the library, deleted, then run.
#[test]
fn file_deleted_after_listing_fails_alone() {
    use std::sync::Mutex;
    use tapmap::engine::{ConvOptions, ConvStage, Engine};
    use tapmap::image_io::ReadOptions;
    use tapmap::jobs::apply::{run_items, ApplyJob};
    use tapmap::jobs::inputs::expand_inputs;
    use tapmap::kernel::builtin::resolve_bank;
    use tapmap::stage::RecipeSpec;
    use tapmap::stage::{Recipe, Stage};

    let t = TempDir::new().unwrap();
    let inp = t.path().join("in");
    write_good(&inp);
    let doomed = inp.join("doomed.png");
    write(&doomed, &encode(&grey8_image(10, 10, 4), ImageFormat::Png));
    let out = t.path().join("out");
    let items = expand_inputs(std::slice::from_ref(&inp), &out).unwrap();
    assert_eq!(items.len(), GOOD.len() + 1);
    std::fs::remove_file(&doomed).unwrap();

    let job = ApplyJob {
        spec: RecipeSpec {
            input: ReadOptions::default(),
            recipe: Recipe {
                stages: vec![Stage::Conv(ConvStage {
                    bank: resolve_bank("edges").unwrap(),
                    // What `--bank edges` on the command line pads with.
                    options: ConvOptions {
                        pad: tapmap::stage::DEFAULT_PAD,
                        ..ConvOptions::default()
                    },
                })],
            },
            pads: Vec::new(),
        },
        engine: Engine::Auto,
        out_dir: out.clone(),
        inputs: vec![inp.clone()],
        save: "maps,views,stats,manifest".parse().unwrap(),
        view: Default::default(),
        threshold: None,
        connectivity: tapmap::regions::Connectivity::Eight,
        inset: 0,
        jobs: 2,
        command_line: Vec::new(),
        shard: None,
        resume: false,
        stop: Default::default(),
    };
    struct Collect(Mutex<Vec<String>>);
    impl tapmap::jobs::Observer for Collect {
        fn input_failed(&self, e: &tapmap::Error) {
            self.0.lock().unwrap().push(e.to_string());
        }
    }
    let collect = Collect(Mutex::new(Vec::new()));
    let summary = run_items(&job, items, &collect).unwrap();
    let messages = collect.0;
    assert_eq!((summary.processed, summary.failed), (GOOD.len(), 1));
    let messages = messages.into_inner().unwrap();
    assert_eq!(messages.len(), 1, "{messages:?}");
    assert!(
        messages[0].contains("doomed.png") && contains_nocase(&messages[0], "no longer exists"),
        "{messages:?}"
    );
    // Its row failed; the good images' outputs match a command-line run of them alone.
    let (header, rows) = csv_table(&out.join("images.csv")).unwrap();
    let (path, status, error) = (
        column(&header, "path").unwrap(),
        column(&header, "status").unwrap(),
        column(&header, "error").unwrap(),
    );
    let row = rows.iter().find(|r| r[path] == "doomed.png").unwrap();
    assert_eq!(row[status], "failed");
    assert!(!row[error].is_empty());
    let mut baselines = Baselines::new();
    let base = baselines.get(EDGES).unwrap();
    let others: Vec<_> = rows
        .iter()
        .filter(|r| r[path] != "doomed.png")
        .cloned()
        .collect();
    assert_eq!(others, base.images.1);
    assert_eq!(std::fs::read(out.join("stats.csv")).unwrap(), base.stats);
    let files = output_files(&out);
    let outputs = |m: &BTreeMap<PathBuf, Vec<u8>>| -> BTreeMap<PathBuf, Vec<u8>> {
        m.iter()
            .filter(|(p, _)| p.starts_with("maps") || p.starts_with("views"))
            .map(|(p, b)| (p.clone(), b.clone()))
            .collect()
    };
    assert_eq!(outputs(&files), outputs(&base.files));
    assert!(leftovers(&out).is_empty(), "{:?}", leftovers(&out));
}
