//! The `apply` job: run a recipe over image files and write one `.npy` of maps per
//! image, `OUT/<file stem>.npy` (float32, C × H × W, C = output channels).
//!
//! Set-up problems (no inputs, two inputs with one output name, an output folder
//! that cannot be written) fail before any image is read. A bad image is reported
//! and skipped; the others are still written.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use crate::engine::Engine;
use crate::error::Error;
use crate::io::{npy::write_npy, read::read_luma};
use crate::stage::Recipe;

/// Everything an `apply` run needs.
#[derive(Debug, Clone)]
pub struct ApplyJob {
    /// What to compute.
    pub recipe: Recipe,
    /// How to compute conv stages.
    pub engine: Engine,
    /// Output folder.
    pub out_dir: PathBuf,
    /// Image files.
    pub inputs: Vec<PathBuf>,
}

/// The result for one input.
#[derive(Debug)]
pub struct Outcome {
    /// The input file.
    pub input: PathBuf,
    /// The map file written, or why not.
    pub result: Result<PathBuf, Error>,
}

/// Counts of a finished run.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct Summary {
    /// Inputs written.
    pub written: usize,
    /// Inputs that failed.
    pub failed: usize,
}

/// Output path of each input: `out_dir/<stem>.npy`. Two inputs with one stem are
/// an error naming both.
pub fn output_paths(inputs: &[PathBuf], out_dir: &Path) -> Result<Vec<PathBuf>, Error> {
    let mut seen: BTreeMap<PathBuf, &Path> = BTreeMap::new();
    let mut outs = Vec::with_capacity(inputs.len());
    for input in inputs {
        let stem = input.file_stem().ok_or_else(|| {
            Error::Stage(format!(
                "{}: has no file name to name its output after",
                input.display()
            ))
        })?;
        let mut name = stem.to_os_string();
        name.push(".npy");
        let out = out_dir.join(name);
        if let Some(first) = seen.insert(out.clone(), input) {
            return Err(Error::Stage(format!(
                "{} and {} would both write {}; rename one or run them separately",
                first.display(),
                input.display(),
                out.display()
            )));
        }
        outs.push(out);
    }
    Ok(outs)
}

/// Creates the output folder and proves it writable with a probe file.
pub fn prepare_out_dir(out_dir: &Path) -> Result<(), Error> {
    std::fs::create_dir_all(out_dir).map_err(|e| Error::io(out_dir, e))?;
    tempfile::Builder::new()
        .prefix(".tapmap-probe")
        .tempfile_in(out_dir)
        .map(drop)
        .map_err(|e| Error::io(out_dir, e))
}

/// Runs the job, calling `report` after each input, in input order.
pub fn run_apply(job: &ApplyJob, mut report: impl FnMut(&Outcome)) -> Result<Summary, Error> {
    if job.inputs.is_empty() {
        return Err(Error::Stage("no input images given".into()));
    }
    let outs = output_paths(&job.inputs, &job.out_dir)?;
    prepare_out_dir(&job.out_dir)?;
    let mut summary = Summary::default();
    for (input, out) in job.inputs.iter().zip(outs) {
        let result = process_one(job, input, &out).map(|()| out);
        match result {
            Ok(_) => summary.written += 1,
            Err(_) => summary.failed += 1,
        }
        report(&Outcome {
            input: input.clone(),
            result,
        });
    }
    Ok(summary)
}

fn process_one(job: &ApplyJob, input: &Path, out: &Path) -> Result<(), Error> {
    let img = read_luma(input)?;
    let maps = job
        .recipe
        .run(img.data, job.engine)
        .map_err(|e| Error::Image {
            path: input.to_path_buf(),
            message: e.to_string(),
        })?;
    write_npy(out, &maps)
}
