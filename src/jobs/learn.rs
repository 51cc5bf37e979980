//! The `bank learn` job: one streaming pass over the inputs draws a uniform
//! sample of patches ([`crate::learn::sample`]), the sample is learned from
//! ([`crate::learn::learn`]), and the result is written as a bank file with
//! its provenance (the `[learned]` table), a drawn sheet of its taps beside
//! it, and on request the sample itself as `.npy` (see the module header of
//! [`crate::learn`] for what the kernels compute).
//!
//! Nothing is written when the job is stopped or no image could be read: a
//! bank learned from part of what was asked would pass for the whole.

use std::path::{Path, PathBuf};
use std::sync::Mutex;

use ndarray::{Array1, Array2};
use ndarray_npy::WriteNpyExt;

use crate::error::Error;
use crate::image_io::atomic::write_atomic;
use crate::image_io::{ColorMode, ReadOptions};
use crate::jobs::inputs::{expand_inputs, has_extension, list_digest, read_with_digest};
use crate::jobs::{for_each_parallel, thread_pool, Observer, Stop};
use crate::kernel::bankfile::bank_to_toml;
use crate::kernel::{Bank, Kernel, Op};
use crate::learn::sample::Reservoir;
use crate::learn::{learn, normalise_patch, Detail, LearnSettings, Learned, Method, PatchShape};

/// Everything `bank learn` needs.
#[derive(Debug, Clone)]
pub struct LearnJob {
    /// Files, folders and patterns as given.
    pub inputs: Vec<PathBuf>,
    /// Input handling (luma or rgb, white level, orientation, limits).
    pub read: ReadOptions,
    /// Patch rows and columns.
    pub size: (usize, usize),
    /// Patches to sample.
    pub patches: usize,
    /// ε of the patch normalisation, in the input's units.
    pub contrast_eps: f64,
    /// Method, count, whitening, iterations…
    pub settings: LearnSettings,
    /// The bank file to write.
    pub out: PathBuf,
    /// The bank's name (default: the file stem).
    pub name: Option<String>,
    /// Replace an existing bank file.
    pub force: bool,
    /// Where to draw the bank (PNG); `None`: beside the bank, `.png` for `.toml`.
    pub sheet: Option<PathBuf>,
    /// Write the normalised sample here (`.npy`), with `-mean.npy` and
    /// `-whitening.npy` beside it.
    pub keep_patches: Option<PathBuf>,
    /// Images read at once, and threads.
    pub jobs: usize,
    /// Asked to stop: nothing is written.
    pub stop: Stop,
    /// The command line, for the provenance.
    pub command_line: Vec<String>,
}

/// What `bank learn` did.
#[derive(Debug, Clone)]
pub struct LearnSummary {
    /// Images sampled from.
    pub images: usize,
    /// Inputs that failed (unreadable, too small for the patch, wrong channels).
    pub failed: usize,
    /// Valid patch positions over all images.
    pub positions: u64,
    /// Patches in the sample.
    pub patches: usize,
    /// The learned bank (also written to `out`).
    pub bank: Bank,
    /// The learned result behind it.
    pub learned: Learned,
    /// The sheet written.
    pub sheet: PathBuf,
}

/// Checks what can be checked before any image is read.
fn check(job: &LearnJob) -> Result<(), Error> {
    let (r, c) = job.size;
    if r == 0 || c == 0 {
        return Err(Error::usage("--size must be at least 1×1"));
    }
    if job.patches < 2 {
        return Err(Error::usage("--patches must be at least 2"));
    }
    if !(job.contrast_eps.is_finite() && job.contrast_eps > 0.0) {
        return Err(Error::usage(
            "--contrast-eps must be a finite number above 0",
        ));
    }
    if !(job.settings.whiten_eps.is_finite() && job.settings.whiten_eps > 0.0) {
        return Err(Error::usage("--whiten-eps must be a finite number above 0"));
    }
    if job.read.color == ColorMode::Split {
        return Err(Error::usage(
            "--color split makes one map per channel, not patches across channels; \
             learn with luma or rgb",
        ));
    }
    if !has_extension(&job.out, "toml") {
        return Err(Error::usage(format!(
            "bank learn writes a bank file; give --out a name ending in .toml (not {})",
            job.out.display()
        )));
    }
    crate::image_io::atomic::refuse_existing(&job.out, job.force)?;
    if let Some(k) = &job.keep_patches {
        if !has_extension(k, "npy") {
            return Err(Error::usage(format!(
                "--keep-patches writes NumPy; give a name ending in .npy (not {})",
                k.display()
            )));
        }
    }
    if let Some(s) = &job.sheet {
        if !has_extension(s, "png") {
            return Err(Error::usage(format!(
                "--sheet writes PNG; give a name ending in .png (not {})",
                s.display()
            )));
        }
    }
    Ok(())
}

/// The first 64 bits of a hex digest, which key an image's positions.
fn image_key(sha: &str) -> u64 {
    u64::from_str_radix(sha.get(..16).unwrap_or("0"), 16).unwrap_or(0)
}

/// The files beside `--keep-patches FILE.npy`: FILE-mean.npy, FILE-whitening.npy.
pub fn kept_names(file: &Path) -> (PathBuf, PathBuf) {
    let stem = file
        .file_stem()
        .map_or_else(|| "patches".into(), |s| s.to_string_lossy().into_owned());
    (
        file.with_file_name(format!("{stem}-mean.npy")),
        file.with_file_name(format!("{stem}-whitening.npy")),
    )
}

/// Runs `bank learn` (see the module header).
pub fn run_learn(
    job: &LearnJob,
    obs: &dyn Observer,
    progress: &(dyn Fn(&str) + Sync),
) -> Result<LearnSummary, Error> {
    check(job)?;
    let (rows, cols) = job.size;
    let shape = PatchShape {
        channels: job.read.color.bank_channels(),
        rows,
        cols,
    };
    let d = shape.dim();
    let items = expand_inputs(&job.inputs, &job.out)?;
    let pool = thread_pool(job.jobs)?;
    let reservoir = Reservoir::new(job.patches, d, job.settings.seed);
    let failures: Mutex<Vec<(usize, Error)>> = Mutex::new(Vec::new());
    let seen: Mutex<Vec<(Option<String>, u64)>> = Mutex::new(vec![(None, 0); items.len()]);
    obs.begin(items.len());
    for_each_parallel(&items, job.jobs, &job.stop, |i, item| {
        let result = pool.install(|| -> Result<(), Error> {
            let (sha, img) = read_with_digest(item, &job.read);
            seen.lock().unwrap_or_else(|p| p.into_inner())[i].0 = sha.clone();
            let img = img?;
            let (ch, h, w) = img.data.dim();
            if ch != shape.channels {
                return Err(Error::decode(
                    &item.source,
                    format!(
                        "has {ch} channel(s) as read with --color {}; the patches take {}",
                        job.read.color, shape.channels
                    ),
                ));
            }
            if h < rows || w < cols {
                return Err(Error::decode(
                    &item.source,
                    format!("is {w}×{h} pixels, smaller than the {rows}×{cols} patch"),
                ));
            }
            let (ph, pw) = ((h - rows + 1) as u64, (w - cols + 1) as u64);
            let data = img.data.as_slice().expect("images are standard layout");
            let key = image_key(sha.as_deref().unwrap_or_default());
            let eps = job.contrast_eps;
            reservoir.offer(key, i as u32, ph * pw, |pos, slot| {
                let (y, x) = ((pos / pw) as usize, (pos % pw) as usize);
                for c in 0..ch {
                    for r in 0..rows {
                        let at = (c * h + y + r) * w + x;
                        let to = (c * rows + r) * cols;
                        slot[to..to + cols].copy_from_slice(&data[at..at + cols]);
                    }
                }
                normalise_patch(slot, eps);
            });
            seen.lock().unwrap_or_else(|p| p.into_inner())[i].1 = ph * pw;
            Ok(())
        });
        crate::jobs::settle(obs, &failures, i, &item.source, result);
    });
    obs.end();
    let failures = failures.into_inner().unwrap_or_else(|p| p.into_inner());
    let seen = seen.into_inner().unwrap_or_else(|p| p.into_inner());
    let positions: u64 = seen.iter().map(|s| s.1).sum();
    let images = items.len() - failures.len();
    if job.stop.requested().is_some() {
        return Err(Error::usage(
            "stopped before every image was sampled; no bank written",
        ));
    }
    if images == 0 {
        return Err(Error::usage(format!(
            "none of the {} input(s) could be sampled; no bank written",
            items.len()
        )));
    }
    let drawn = reservoir.into_drawn();
    let n = drawn.inputs.len();
    if n < job.patches {
        progress(&format!(
            "tapmap: warning: the images have only {positions} patch positions; all of them were taken, not {}",
            job.patches
        ));
    }
    let learned = pool.install(|| {
        learn(&drawn.data, shape, &job.settings, &|start, t, j| {
            let of = if job.settings.restarts > 1 {
                format!("start {}/{}, ", start + 1, job.settings.restarts)
            } else {
                String::new()
            };
            progress(&format!(
                "{} {of}iteration {t}/{}: objective {j:.6e}",
                job.settings.method, job.settings.iterations
            ));
        })
    })?;
    let mut per_input = vec![0usize; items.len()];
    for i in &drawn.inputs {
        per_input[*i as usize] += 1;
    }
    let name = job.name.clone().unwrap_or_else(|| {
        job.out
            .file_stem()
            .map_or_else(|| "learned".into(), |s| s.to_string_lossy().into_owned())
    });
    let digests: Vec<Option<String>> = seen.iter().map(|s| s.0.clone()).collect();
    let inputs = crate::jobs::study::outcomes(&items, digests, &failures);
    let mut records = Vec::with_capacity(inputs.len());
    for (k, rec) in inputs.iter().enumerate() {
        let mut t = toml::Table::try_from(rec)
            .map_err(|e| Error::bank(format!("cannot record input: {e}")))?;
        t.insert("positions".into(), (seen[k].1 as i64).into());
        t.insert("patches".into(), (per_input[k] as i64).into());
        records.push(toml::Value::Table(t));
    }
    let mut prov = provenance(job, shape, n, positions, &learned);
    prov.insert("images".into(), (images as i64).into());
    prov.insert("failed".into(), (failures.len() as i64).into());
    prov.insert("list_sha256".into(), list_digest(&items).into());
    prov.insert("input".into(), toml::Value::Array(records));
    let bank = bank_of(&name, shape, &learned, job, n, images, prov)?;
    let text = bank_to_toml(&bank)?;
    if let Some(file) = &job.keep_patches {
        write_kept(file, &drawn.data, d, &learned)?;
    }
    write_atomic(&job.out, |w| w.write_all(text.as_bytes()))?;
    let sheet = job
        .sheet
        .clone()
        .unwrap_or_else(|| job.out.with_extension("png"));
    let img = crate::render::taps::draw_bank_with(&bank, false);
    crate::render::write_rgb(&sheet, &img)?;
    Ok(LearnSummary {
        images,
        failed: failures.len(),
        positions,
        patches: n,
        bank,
        learned,
        sheet,
    })
}

/// The `[learned]` table: every parameter and what came of it.
fn provenance(
    job: &LearnJob,
    shape: PatchShape,
    n: usize,
    positions: u64,
    l: &Learned,
) -> toml::Table {
    use toml::Value;
    let s = &job.settings;
    let floats = |v: &[f64]| Value::Array(v.iter().map(|x| Value::Float(*x)).collect());
    let ints = |v: &[usize]| Value::Array(v.iter().map(|x| Value::Integer(*x as i64)).collect());
    let mut t = toml::Table::new();
    t.insert(
        "tool".into(),
        format!("tapmap {}", env!("CARGO_PKG_VERSION")).into(),
    );
    t.insert(
        "command_line".into(),
        Value::Array(job.command_line.iter().map(|a| a.clone().into()).collect()),
    );
    t.insert("method".into(), s.method.name().into());
    t.insert("count".into(), (s.count as i64).into());
    t.insert("size".into(), ints(&[shape.rows, shape.cols]));
    t.insert("channels".into(), (shape.channels as i64).into());
    t.insert("color".into(), job.read.color.to_string().into());
    if let Some(w) = job.read.white {
        t.insert("white".into(), (w as i64).into());
    }
    t.insert("orientation".into(), job.read.apply_orientation.into());
    t.insert("seed".into(), (s.seed as i64).into());
    t.insert("patches_asked".into(), (job.patches as i64).into());
    t.insert("patches".into(), (n as i64).into());
    t.insert("positions".into(), (positions as i64).into());
    t.insert("contrast_eps".into(), job.contrast_eps.into());
    t.insert("whiten".into(), s.whiten.name().into());
    if l.whitening.is_some() {
        t.insert("whiten_eps".into(), s.whiten_eps.into());
    }
    match &l.detail {
        Detail::Pca { variance, total } => {
            t.insert("explained_variance".into(), floats(variance));
            let ratio: Vec<f64> = variance.iter().map(|v| v / total).collect();
            t.insert("explained_ratio".into(), floats(&ratio));
            t.insert("total_variance".into(), (*total).into());
        }
        Detail::Clusters {
            sizes,
            objective,
            starts,
            updates,
        } => {
            t.insert("iterations".into(), (s.iterations as i64).into());
            t.insert("tolerance".into(), s.tolerance.into());
            t.insert("restarts".into(), (s.restarts as i64).into());
            t.insert("updates".into(), (*updates as i64).into());
            t.insert("cluster_sizes".into(), ints(sizes));
            t.insert("objective".into(), floats(objective));
            t.insert("start_objectives".into(), floats(starts));
        }
    }
    t
}

/// The bank: one kernel per learned direction, best first.
fn bank_of(
    name: &str,
    shape: PatchShape,
    l: &Learned,
    job: &LearnJob,
    n: usize,
    images: usize,
    provenance: toml::Table,
) -> Result<Bank, Error> {
    let prefix = match job.settings.method {
        Method::Pca => "pc",
        Method::Kmeans | Method::Lloyd => "k",
    };
    let width = l.taps.len().to_string().len().max(2);
    let plane = shape.rows * shape.cols;
    let kernels = l
        .taps
        .iter()
        .zip(&l.biases)
        .enumerate()
        .map(|(j, (t, b))| Kernel {
            name: format!("{prefix}{:0width$}", j + 1),
            rows: shape.rows,
            cols: shape.cols,
            planes: t.chunks(plane).map(<[f64]>::to_vec).collect(),
            scale: 1.0,
            bias: *b,
            origin: None,
            angle: None,
        })
        .collect();
    let bank = Bank {
        name: name.to_string(),
        op: Op::Correlate,
        description: Some(format!(
            "learned by tapmap bank learn: {} ({} whitening), {} kernels of {}×{}×{} from {n} \
             patches of {images} image(s), seed {}",
            job.settings.method,
            job.settings.whiten.name(),
            l.taps.len(),
            shape.channels,
            shape.rows,
            shape.cols,
            job.settings.seed
        )),
        kernels,
        normalize: None,
        contrast: Some(job.contrast_eps),
        provenance: Some(Box::new(provenance)),
        pad: None,
    };
    bank.validate()?;
    Ok(bank)
}

/// Writes the sample (`n × d` float32), its mean (float64) and the whitening
/// matrix (float64, when one is used).
fn write_kept(file: &Path, data: &[f32], d: usize, l: &Learned) -> Result<(), Error> {
    let npy = |e: ndarray_npy::WriteNpyError| std::io::Error::other(e.to_string());
    let a = crate::learn::linalg::rows(data, d);
    write_atomic(file, |w| a.write_npy(w).map_err(npy))?;
    let (mean_file, white_file) = kept_names(file);
    let m = Array1::from(l.mean.clone());
    write_atomic(&mean_file, |w| m.write_npy(w).map_err(npy))?;
    if let Some(wm) = &l.whitening {
        let wa =
            Array2::from_shape_vec((d, d), wm.clone()).map_err(|e| Error::shape(e.to_string()))?;
        write_atomic(&white_file, |w| wa.write_npy(w).map_err(npy))?;
    }
    Ok(())
}
