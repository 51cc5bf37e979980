//! `apply --follow`: an `apply` run that keeps watching its input folders and
//! patterns and processes each image as it is complete, with every promise a
//! batch makes.
//!
//! **Order of work.** The watch starts before the folders are listed, so no
//! file that arrives meanwhile is missed. Files are noticed through the
//! operating system's file events (`notify`; inotify on Linux), or by looking
//! every `--poll` interval (network mounts, where events do not reach us); a
//! file is taken when complete ([`settle`]). Complete files wait in a backlog
//! of names; `jobs` workers take them through a channel that holds at most
//! one file per worker, so however far behind the run falls, at most `jobs`
//! images are in memory and the backlog is a list of names (reported).
//!
//! **Exactly once.** Each result is recorded as a batch records it: outputs
//! written under temporary names and renamed, then one journal line (flushed
//! to the disk), then its rows appended to the tables ([`live`]). A restart of
//! the same command takes up the journal like `--resume`: a result stands
//! when its outputs are in place and the input's bytes are unchanged, so
//! nothing is done twice and nothing is lost but the images in hand. A file
//! that changes after its result (new size or modification time, and new
//! bytes) is processed again and its new rows say `redone`; one touched
//! without new bytes is left alone.
//!
//! **Stopping.** A stop request (SIGINT, SIGTERM) lets the workers finish the
//! images in hand; the journal, tables and manifest are then written in table
//! order, exactly as a batch run over the same files writes them, and the
//! run ends normally. Files still waiting are taken by the next start. A
//! second signal ends the process at once; the journal holds whole lines.

mod live;
mod roots;
mod settle;

use std::collections::{BTreeMap, HashMap, HashSet, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::mpsc::{self, RecvTimeoutError, TrySendError};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use notify::event::{AccessKind, AccessMode, CreateKind, ModifyKind, RenameMode};
use notify::{EventKind, RecursiveMode, Watcher};

use crate::error::Error;
use crate::jobs::apply::outputs::process;
use crate::jobs::apply::session::{Ending, Session};
use crate::jobs::apply::{ApplyJob, Summary};
use crate::jobs::inputs::{list_inputs, path_order_key};
use crate::jobs::manifest::FollowRecord;
use crate::jobs::tables::Finished;
use crate::jobs::{thread_pool, Observer};

use live::{LiveTables, Status};
pub use live::{StatusLine, REDONE};
use roots::Roots;
use settle::{Ready, Settler, Stamp};

/// How to follow.
#[derive(Debug, Clone)]
pub struct FollowOptions {
    /// Look every this long instead of listening for file events.
    pub poll: Option<Duration>,
    /// How long a file's size and modification time must stay the same.
    pub settle: Duration,
    /// How often the status is shown and logged.
    pub status_every: Duration,
    /// Append the status as one JSON line per interval to this file.
    pub status_log: Option<PathBuf>,
}

impl Default for FollowOptions {
    fn default() -> Self {
        FollowOptions {
            poll: None,
            settle: Duration::from_secs(3),
            status_every: Duration::from_secs(2),
            status_log: None,
        }
    }
}

/// The main loop wakes at least this often.
const TICK: Duration = Duration::from_millis(50);

/// One file for a worker.
struct Task {
    ready: Ready,
    /// The result it had before, when it is done again.
    before: Option<Finished>,
}

/// What a worker did with a file.
enum Outcome {
    /// Processed (or failed), recorded.
    Done { result: Finished, redone: bool },
    /// An earlier result stands (a restart, or a file touched but unchanged).
    Kept(Finished),
    /// The file was gone when its turn came.
    Vanished,
    /// Recording failed (journal or tables): the run stops.
    Fatal(Error),
}

struct Report {
    ready: Ready,
    outcome: Outcome,
    at: Instant,
}

/// Runs `job` following its inputs until a stop is requested (see the module
/// header).
pub fn run_follow(
    job: &ApplyJob,
    opts: &FollowOptions,
    obs: &dyn Observer,
) -> Result<Summary, Error> {
    job.check()?;
    if job.shard.is_some() {
        return Err(Error::usage(
            "--follow runs on one machine: it cannot take a shard of the inputs (--shard)",
        ));
    }
    let roots = Roots::new(&job.inputs, &job.out_dir)?;
    let pool = thread_pool(job.jobs)?;
    let session = Session::open(job, true)?;
    let start = Instant::now();

    // The watch first, then the listing: nothing arrives unseen in between.
    let (event_tx, events) = mpsc::channel();
    let mut watcher: Box<dyn Watcher> = match opts.poll {
        Some(every) => Box::new(
            notify::PollWatcher::new(
                event_tx,
                notify::Config::default().with_poll_interval(every),
            )
            .map_err(|e| Error::usage(format!("cannot poll the inputs: {e}")))?,
        ),
        None => Box::new(notify::recommended_watcher(event_tx).map_err(|e| {
            Error::usage(format!(
                "cannot watch the inputs for file events: {e}; --poll DURATION looks instead"
            ))
        })?),
    };
    for (dir, deep) in roots.watch_points() {
        let mode = if deep {
            RecursiveMode::Recursive
        } else {
            RecursiveMode::NonRecursive
        };
        watcher.watch(&dir, mode).map_err(|e| {
            Error::usage(format!(
                "cannot watch {}: {e}{}",
                dir.display(),
                if opts.poll.is_none() {
                    " (on a network mount, --poll DURATION looks instead)"
                } else {
                    ""
                }
            ))
        })?;
    }

    let mut settler = Settler::new(opts.settle);
    for item in list_inputs(&job.inputs, &job.out_dir, true)? {
        settler.listed(item, start, true);
    }
    let mut results: HashMap<String, Finished> = session
        .earlier
        .iter()
        .map(|(k, v)| (k.clone(), v.clone()))
        .collect();
    let live = LiveTables::start(&session.dir, &in_table_order(&results), job.save.stats)?;
    let mut log = match &opts.status_log {
        Some(p) => Some(
            std::fs::OpenOptions::new()
                .create(true)
                .append(true)
                .open(p)
                .map_err(|e| Error::io(p, e))?,
        ),
        None => None,
    };

    let cx = session.context();
    let (task_tx, task_rx) = mpsc::sync_channel::<Task>(job.jobs);
    let task_rx = Mutex::new(task_rx);
    let (report_tx, reports) = mpsc::channel::<Report>();
    let mut status = Status::new(start);
    let mut fatal: Option<Error> = None;
    let mut redone: Vec<String> = Vec::new();
    let mut backlog: VecDeque<Ready> = VecDeque::new();

    std::thread::scope(|scope| {
        for _ in 0..job.jobs {
            let report_tx = report_tx.clone();
            let (task_rx, session, cx, pool, live) = (&task_rx, &session, &cx, &pool, &live);
            scope.spawn(move || loop {
                let Ok(task) = task_rx.lock().unwrap_or_else(|p| p.into_inner()).recv() else {
                    break;
                };
                if job.stop.requested().is_some() {
                    break;
                }
                let outcome = work(session, cx, pool, live, &task);
                let _ = report_tx.send(Report {
                    ready: task.ready,
                    outcome,
                    at: Instant::now(),
                });
            });
        }
        drop(report_tx);

        // What was done at which stamp, and what is with a worker now.
        let mut known: HashMap<PathBuf, Stamp> = HashMap::new();
        let mut in_flight: HashSet<PathBuf> = HashSet::new();
        // Output stems already taken, and by which input (two inputs that
        // would write the same outputs: the later one is refused).
        let mut stems: HashMap<PathBuf, PathBuf> = results
            .keys()
            .filter_map(|k| crate::jobs::inputs::path_from_text(k))
            .map(|rel| (rel.with_extension(""), rel))
            .collect();
        let mut next_status = start + opts.status_every;
        let mut watch_failed = false;
        loop {
            if job.stop.requested().is_some() || fatal.is_some() {
                break;
            }
            // Events: wait one tick for the first, then take all there are.
            let mut first = events.recv_timeout(TICK);
            loop {
                match first {
                    Ok(Ok(event)) => notice(&event, &roots, &mut settler, job, Instant::now()),
                    Ok(Err(e)) => {
                        if !watch_failed {
                            obs.input_failed(&Error::usage(format!(
                                "watching the inputs: {e}; looking at every folder again"
                            )));
                            watch_failed = true;
                        }
                        relist(job, &mut settler);
                    }
                    Err(RecvTimeoutError::Timeout) => break,
                    Err(RecvTimeoutError::Disconnected) => {
                        fatal.get_or_insert(Error::usage("the file watch ended unexpectedly"));
                        break;
                    }
                }
                first = events.try_recv().map_err(|e| match e {
                    mpsc::TryRecvError::Empty => RecvTimeoutError::Timeout,
                    mpsc::TryRecvError::Disconnected => RecvTimeoutError::Disconnected,
                });
            }
            let now = Instant::now();
            for r in reports.try_iter() {
                settle_report(
                    r,
                    obs,
                    &mut status,
                    &mut results,
                    &mut known,
                    &mut in_flight,
                    &mut redone,
                    &mut fatal,
                );
            }
            for r in settler.take_ready(now) {
                if known.get(&r.item.source) == Some(&r.stamp) {
                    continue; // unchanged since its result
                }
                let rel = r.item.rel.clone();
                let stem = rel.with_extension("");
                match stems.get(&stem) {
                    Some(owner) if *owner != rel => {
                        obs.input_failed(&Error::decode(
                            &r.item.source,
                            format!(
                                "would write the same outputs as {}; skipped (rename one of them)",
                                owner.display()
                            ),
                        ));
                        continue;
                    }
                    _ => {
                        stems.insert(stem, rel);
                    }
                }
                if !r.initial {
                    status.arrived += 1;
                }
                backlog.retain(|b| b.item.source != r.item.source);
                backlog.push_back(r);
            }
            // Hand complete files to the workers, one in flight per file.
            let mut waiting = VecDeque::new();
            while let Some(r) = backlog.pop_front() {
                if in_flight.contains(&r.item.source) {
                    waiting.push_back(r);
                    continue;
                }
                let before = results.get(&r.item.rel_string()).cloned();
                let source = r.item.source.clone();
                match task_tx.try_send(Task { ready: r, before }) {
                    Ok(()) => {
                        in_flight.insert(source);
                    }
                    Err(TrySendError::Full(t) | TrySendError::Disconnected(t)) => {
                        waiting.push_back(t.ready);
                        waiting.extend(backlog.drain(..));
                    }
                }
            }
            backlog = waiting;
            status.most_queued = status.most_queued.max(backlog.len());
            if now >= next_status {
                next_status = now + opts.status_every;
                let line = status.line(now, backlog.len(), settler.len(), in_flight.len());
                obs.status(&line.text());
                if let Some(f) = log.as_mut() {
                    write_log(f, &line, opts.status_log.as_deref(), obs);
                }
            }
        }
        // The stop: no new files; the workers finish what they hold.
        drop(task_tx);
        for r in reports.iter() {
            settle_report(
                r,
                obs,
                &mut status,
                &mut results,
                &mut known,
                &mut in_flight,
                &mut redone,
                &mut fatal,
            );
        }
    });
    drop(watcher);
    obs.end();
    let (lag_p50_s, lag_p99_s) = status.run_lags();
    let record = FollowRecord {
        watch: if opts.poll.is_some() {
            "poll"
        } else {
            "events"
        }
        .into(),
        poll_s: opts.poll.map(|d| d.as_secs_f64()),
        settle_s: opts.settle.as_secs_f64(),
        arrived: status.arrived,
        redone,
        lag_p50_s,
        lag_p99_s,
        most_queued: status.most_queued,
        left_waiting: backlog.len() + settler.len(),
    };
    let ending = Ending {
        listed: None,
        resumed: status.resumed,
        not_run: 0,
        signal: None,
        follow: Some(record),
    };
    drop(live);
    let summary = session.finish(in_table_order(&results), ending);
    match fatal {
        Some(e) => Err(e),
        None => Ok(summary),
    }
}

/// One file, on a worker (see the module header's order of work).
fn work(
    session: &Session,
    cx: &crate::jobs::apply::outputs::ImageContext,
    pool: &rayon::ThreadPool,
    live: &LiveTables,
    task: &Task,
) -> Outcome {
    let item = &task.ready.item;
    if item.problem.is_none() && Stamp::of(&item.source).is_none() {
        return Outcome::Vanished;
    }
    if let Some(prev) = session.reusable(item) {
        return Outcome::Kept(prev.clone());
    }
    if let Some(before) = &task.before {
        if crate::jobs::apply::session::still_valid(before, item, &session.dir, cx.spec) {
            return Outcome::Kept(before.clone());
        }
    }
    let result = pool.install(|| process(cx, item));
    let redone = task.before.is_some();
    let recorded = session
        .journal
        .append_synced(&result)
        .and_then(|()| live.append(&result, redone));
    match recorded {
        Ok(()) => Outcome::Done { result, redone },
        Err(e) => Outcome::Fatal(e),
    }
}

/// Takes a worker's report into the run's state.
#[allow(clippy::too_many_arguments)]
fn settle_report(
    r: Report,
    obs: &dyn Observer,
    status: &mut Status,
    results: &mut HashMap<String, Finished>,
    known: &mut HashMap<PathBuf, Stamp>,
    in_flight: &mut HashSet<PathBuf>,
    redone: &mut Vec<String>,
    fatal: &mut Option<Error>,
) {
    in_flight.remove(&r.ready.item.source);
    let rel = r.ready.item.rel_string();
    match r.outcome {
        Outcome::Done {
            result,
            redone: again,
        } => {
            if let Some(problem) = &result.image.error {
                obs.input_failed(&Error::decode(&r.ready.item.source, problem.clone()));
            }
            let lag = (!r.ready.initial).then(|| r.at.duration_since(r.ready.arrived));
            status.done(r.at, result.ok(), lag);
            if again {
                redone.push(rel.clone());
            }
            known.insert(r.ready.item.source.clone(), r.ready.stamp);
            results.insert(rel, result);
        }
        Outcome::Kept(prev) => {
            status.resumed += 1;
            known.insert(r.ready.item.source.clone(), r.ready.stamp);
            results.insert(rel, prev);
        }
        Outcome::Vanished => {}
        Outcome::Fatal(e) => {
            fatal.get_or_insert(e);
        }
    }
    obs.advance();
}

/// Takes one file event into the pending set.
fn notice(
    event: &notify::Event,
    roots: &Roots,
    settler: &mut Settler,
    job: &ApplyJob,
    now: Instant,
) {
    if event.need_rescan() {
        relist(job, settler);
        return;
    }
    let paths: Vec<PathBuf> = event.paths.iter().map(|p| roots.local(p)).collect();
    let item = |p: &Path| roots.item_for(p);
    match event.kind {
        // A folder that arrives whole (made, or moved in) may hold files
        // already: list it.
        EventKind::Create(CreateKind::Folder) => paths.iter().for_each(|d| {
            list_folder(d, roots, settler, now);
        }),
        EventKind::Modify(ModifyKind::Name(RenameMode::To)) => {
            for p in &paths {
                if p.is_dir() {
                    list_folder(p, roots, settler, now);
                } else if let Some(i) = item(p) {
                    settler.completed(i, now);
                }
            }
        }
        EventKind::Modify(ModifyKind::Name(RenameMode::From)) | EventKind::Remove(_) => {
            paths.iter().for_each(|p| settler.removed(p));
        }
        // A rename seen whole also came as From and To.
        EventKind::Modify(ModifyKind::Name(RenameMode::Both)) => {}
        EventKind::Access(AccessKind::Close(AccessMode::Write)) => {
            paths.iter().filter_map(|p| item(p)).for_each(|i| {
                settler.completed(i, now);
            });
        }
        EventKind::Access(_) => {}
        _ => paths.iter().for_each(|p| {
            if p.is_dir() {
                list_folder(p, roots, settler, now);
            } else if let Some(i) = item(p) {
                settler.changed(i, now);
            }
        }),
    }
}

/// Lists every input again (after a lost event): files with a result at
/// their stamp are left alone by the caller.
fn relist(job: &ApplyJob, settler: &mut Settler) {
    let now = Instant::now();
    if let Ok(items) = list_inputs(&job.inputs, &job.out_dir, true) {
        items
            .into_iter()
            .for_each(|i| settler.listed(i, now, false));
    }
}

fn list_folder(dir: &Path, roots: &Roots, settler: &mut Settler, now: Instant) {
    for e in walkdir::WalkDir::new(dir)
        .follow_links(true)
        .into_iter()
        .flatten()
    {
        if e.file_type().is_file() {
            if let Some(i) = roots.item_for(e.path()) {
                settler.listed(i, now, false);
            }
        }
    }
}

fn write_log(f: &mut std::fs::File, line: &StatusLine, path: Option<&Path>, obs: &dyn Observer) {
    use std::io::Write;
    let text = serde_json::to_string(line).expect("plain fields") + "\n";
    if let Err(e) = f.write_all(text.as_bytes()) {
        obs.input_failed(&Error::io(path.unwrap_or(Path::new("status log")), e));
    }
}

/// Results in the order of every table: by relative path.
fn in_table_order(results: &HashMap<String, Finished>) -> Vec<Finished> {
    let sorted: BTreeMap<Vec<&str>, &Finished> = results
        .iter()
        .map(|(k, v)| (path_order_key(k), v))
        .collect();
    sorted.into_values().cloned().collect()
}
