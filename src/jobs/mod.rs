//! Jobs: each command's work as a library function that knows nothing of
//! terminals or exit codes. [`apply`] runs a recipe over many images,
//! [`borders`] studies pad modes, [`probe`] finds the strongest responses,
//! [`shard`] and [`merge`] split a job over a cluster and join it again. What
//! they share is here: which outputs to write, how views are drawn, the
//! [`Observer`] that hears about progress and failures, the [`Stop`] request,
//! the job's own thread pool and the worker loop.
//!
//! `apply`'s output layout under `--out DIR`, mirroring each input's relative
//! path `P` (without its extension):
//!
//! ```text
//! DIR/maps/P.npy                 float32 C×H×W
//! DIR/tiff/P/NN-<channel>.tif    32-bit float, one file per channel (optional)
//! DIR/views/P/NN-<channel>.png   one picture per map
//! DIR/sheets/P.png               all maps of the image beside its source
//! DIR/stats.csv                  one row per image and channel
//! DIR/images.csv                 one row per input, failures included
//! DIR/manifest.json              everything needed to repeat the run
//! ```

pub mod apply;
pub mod borders;
pub mod follow;
pub mod inputs;
pub mod learn;
pub mod manifest;
pub mod merge;
pub mod probe;
pub mod shard;
pub mod study;
pub mod tables;

use std::fmt;
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;

use crate::error::Error;

/// Which outputs a run writes (`images.csv` is always written).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Save {
    /// `.npy` maps.
    pub maps: bool,
    /// 32-bit float TIFF per channel.
    pub tiff: bool,
    /// PNG view per map.
    pub views: bool,
    /// PNG sheet per image.
    pub sheets: bool,
    /// `stats.csv`.
    pub stats: bool,
    /// `manifest.json`.
    pub manifest: bool,
    /// A picture per map for people: its view with the map's name and colour
    /// key (`keys/P/NN-name.png`; views stay plain level-per-pixel pictures).
    pub keys: bool,
}

impl Default for Save {
    fn default() -> Self {
        Save {
            maps: true,
            tiff: false,
            views: true,
            sheets: false,
            stats: true,
            manifest: true,
            keys: false,
        }
    }
}

const SAVE_NAMES: [&str; 7] = [
    "maps", "tiff", "views", "sheets", "stats", "manifest", "keys",
];

impl Save {
    fn flags(&self) -> [bool; 7] {
        [
            self.maps,
            self.tiff,
            self.views,
            self.sheets,
            self.stats,
            self.manifest,
            self.keys,
        ]
    }
}

impl FromStr for Save {
    type Err = String;
    /// A comma-separated list of maps, tiff, views, sheets, stats, manifest,
    /// keys, or `all`.
    fn from_str(s: &str) -> Result<Self, String> {
        let mut f = [false; 7];
        for part in s.split(',').map(str::trim).filter(|p| !p.is_empty()) {
            if part == "all" {
                f = [true; 7];
                continue;
            }
            let i = SAVE_NAMES.iter().position(|n| *n == part).ok_or_else(|| {
                format!(
                    "unknown output '{part}'; choose from {} or all",
                    SAVE_NAMES.join(", ")
                )
            })?;
            f[i] = true;
        }
        Ok(Save {
            maps: f[0],
            tiff: f[1],
            views: f[2],
            sheets: f[3],
            stats: f[4],
            manifest: f[5],
            keys: f[6],
        })
    }
}

impl fmt::Display for Save {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let on: Vec<&str> = SAVE_NAMES
            .iter()
            .zip(self.flags())
            .filter(|(_, b)| *b)
            .map(|(n, _)| *n)
            .collect();
        f.write_str(&on.join(","))
    }
}

/// How views are drawn.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct ViewOptions {
    /// Fixed value range for every view; `None`: per map.
    pub range: Option<(f32, f32)>,
    /// 16-bit grey views.
    pub depth16: bool,
    /// How view PNGs are compressed.
    pub png: crate::render::ViewPng,
}

pub use apply::{run_apply, ApplyJob, Summary};

/// What a job tells whoever runs it while it works: how far it is, which inputs
/// failed, and text for people. The command line shows these on the terminal;
/// an embedding program may log them or ignore them ([`Quiet`]). Jobs call
/// these from several threads.
pub trait Observer: Sync {
    /// The job will work through `total` inputs.
    fn begin(&self, _total: usize) {}
    /// One more input is done (processed, failed or taken over).
    fn advance(&self) {}
    /// An input failed with this error; the job goes on with the others.
    fn input_failed(&self, _error: &Error) {}
    /// Text for people about one finished input (the border study's table).
    fn report(&self, _text: &str) {}
    /// The job has finished its inputs.
    fn end(&self) {}
    /// A followed run's status, every interval (one line of text).
    fn status(&self, _line: &str) {}
}

/// Ends one input of a study job: a failure is named with its file, shown
/// and kept (with the input's index) for the summary; either way the
/// observer hears that one more input is done.
pub fn settle(
    obs: &dyn Observer,
    failures: &std::sync::Mutex<Vec<(usize, Error)>>,
    index: usize,
    source: &std::path::Path,
    result: Result<(), Error>,
) {
    if let Err(e) = result {
        let e = e.in_file(source);
        obs.input_failed(&e);
        failures
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .push((index, e));
    }
    obs.advance();
}

/// An observer that shows nothing.
pub struct Quiet;

impl Observer for Quiet {}

/// A request to stop, shared between whoever asks (a signal handler, another
/// thread) and the job, which finishes the inputs in flight, starts no new
/// ones and writes its tables for what is done. Holds the signal number that
/// asked, or 0 for none.
#[derive(Debug, Clone, Default)]
pub struct Stop(Arc<AtomicUsize>);

impl Stop {
    /// A stop that nobody has asked for yet.
    pub fn new() -> Self {
        Stop::default()
    }

    /// Asks the job to stop; `signal` is recorded (use 0 when no signal asked,
    /// which still stops but reads as `Some(0)`).
    pub fn request(&self, signal: i32) {
        self.0
            .store(signal.max(0) as usize | STOP_ASKED, Ordering::SeqCst);
    }

    /// The signal that asked for a stop, if one was asked for.
    pub fn requested(&self) -> Option<i32> {
        let v = self.0.load(Ordering::SeqCst);
        (v & STOP_ASKED != 0).then_some((v & !STOP_ASKED) as i32)
    }

    /// The shared flag, for registering with a signal handler that stores
    /// `STOP_ASKED | signal` into it.
    pub fn flag(&self) -> Arc<AtomicUsize> {
        Arc::clone(&self.0)
    }
}

/// The bit a stop request sets beside the signal number.
pub const STOP_ASKED: usize = 1 << 16;

/// A thread pool of `threads` threads for one job's parallel work. The job runs
/// its computations inside it, so an embedding program's own global pool is
/// left alone.
pub fn thread_pool(threads: usize) -> Result<rayon::ThreadPool, Error> {
    let most = max_jobs();
    if threads > most {
        return Err(Error::usage(format!(
            "{threads} threads asked for; at most {most} ({MAX_JOBS_PER_CORE} per core) are \
             started: more only wait on each other and take memory"
        )));
    }
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads.max(1))
        .thread_name(|i| format!("tapmap-{i}"))
        .build()
        .map_err(|e| Error::usage(format!("cannot start {threads} threads: {e}")))
}

/// Threads (and images in flight) allowed per core.
pub const MAX_JOBS_PER_CORE: usize = 8;

/// The most threads a job starts: [`MAX_JOBS_PER_CORE`] per core.
pub fn max_jobs() -> usize {
    MAX_JOBS_PER_CORE * std::thread::available_parallelism().map_or(1, |n| n.get())
}

/// Calls `f(index, item)` for every item on `workers` threads that take items
/// from a shared counter one at a time, so at most `workers` items are in
/// flight; takes no new item once `stop` has been requested. Work inside `f`
/// may run on the job's thread pool; the workers are plain threads, so they
/// never pick up another item while waiting for that work.
pub fn for_each_parallel<T: Sync>(
    items: &[T],
    workers: usize,
    stop: &Stop,
    f: impl Fn(usize, &T) + Sync,
) {
    let next = AtomicUsize::new(0);
    let workers = workers.clamp(1, items.len().max(1));
    std::thread::scope(|scope| {
        for _ in 0..workers {
            scope.spawn(|| loop {
                if stop.requested().is_some() {
                    break;
                }
                let i = next.fetch_add(1, Ordering::Relaxed);
                let Some(item) = items.get(i) else { break };
                f(i, item);
            });
        }
    });
}

/// Makes a name safe as one file-name component: letters, digits and `-_.@=+`
/// only, no leading dot and no `..` anywhere.
pub fn safe_name(name: &str) -> String {
    let mut prev = ' ';
    let s: String = name
        .chars()
        .map(|c| {
            let c = if (c.is_ascii_alphanumeric() || "-_.@=+".contains(c))
                && !(c == '.' && prev == '.')
            {
                c
            } else {
                '_'
            };
            prev = c;
            c
        })
        .collect();
    let s = s.trim_start_matches('.').to_string();
    if s.is_empty() {
        "map".into()
    } else {
        s
    }
}

/// Makes a job's output folder, with plain words for an `--out` that is a
/// symbolic link to nothing or a file.
pub fn make_out_dir(dir: &Path) -> Result<(), Error> {
    if let (Ok(m), Err(_)) = (std::fs::symlink_metadata(dir), std::fs::metadata(dir)) {
        if m.file_type().is_symlink() {
            let to = std::fs::read_link(dir).map(|t| t.display().to_string());
            return Err(Error::usage(format!(
                "--out {} is a symbolic link to {}, which does not exist; make its target or \
                 give another folder",
                dir.display(),
                to.unwrap_or_else(|_| "somewhere".into())
            )));
        }
    }
    if dir.exists() && !dir.is_dir() {
        return Err(Error::usage(format!(
            "--out {} is a file, not a folder",
            dir.display()
        )));
    }
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))
}

/// The lock one job holds on its output folder while it writes there: an
/// advisory lock (`flock`) on `.tapmap.lock`, which holds the owner's process
/// id. The kernel lets go of it when the process ends, however it ends, so a
/// lock left by a dead process is never mistaken for a live one. The file is
/// removed when the job lets go.
pub struct OutLock {
    file: std::fs::File,
    path: PathBuf,
}

/// The lock file's name in an output folder.
pub const LOCK_FILE: &str = ".tapmap.lock";

impl OutLock {
    /// Takes the lock on `dir`, or says which process holds it.
    pub fn take(dir: &Path) -> Result<OutLock, Error> {
        use std::io::{Read, Seek, Write};
        let path = dir.join(LOCK_FILE);
        // A holder removes the file as it lets go; a lock taken on a file that
        // was removed meanwhile is worth nothing, so it is taken again.
        for _ in 0..16 {
            let mut file = std::fs::OpenOptions::new()
                .read(true)
                .write(true)
                .create(true)
                .truncate(false)
                .open(&path)
                .map_err(|e| Error::io(&path, e))?;
            #[cfg(unix)]
            {
                use std::os::fd::AsRawFd;
                use std::os::unix::fs::MetadataExt;
                // SAFETY: flock only reads the descriptor, which `file` keeps open.
                let got =
                    unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) } == 0;
                if !got {
                    let mut owner = String::new();
                    let _ = file.read_to_string(&mut owner);
                    let owner = owner.trim();
                    return Err(Error::usage(format!(
                        "another tapmap{} is writing into {}; wait for it to finish, or give \
                         another --out",
                        if owner.is_empty() {
                            String::new()
                        } else {
                            format!(" (process {owner})")
                        },
                        dir.display()
                    )));
                }
                let same = match (file.metadata(), std::fs::metadata(&path)) {
                    (Ok(a), Ok(b)) => a.ino() == b.ino() && a.dev() == b.dev(),
                    _ => false,
                };
                if !same {
                    continue;
                }
            }
            file.set_len(0).map_err(|e| Error::io(&path, e))?;
            file.rewind().map_err(|e| Error::io(&path, e))?;
            write!(file, "{}", std::process::id()).map_err(|e| Error::io(&path, e))?;
            return Ok(OutLock { file, path });
        }
        Err(Error::usage(format!(
            "could not take the lock {}: other runs keep taking and leaving it",
            path.display()
        )))
    }
}

impl Drop for OutLock {
    fn drop(&mut self) {
        // Removed while still held, so no other process can have taken it.
        let _ = std::fs::remove_file(&self.path);
        let _ = &self.file;
    }
}
