//! The command line: parse flags, turn them into a checked job before any image
//! is read, call the library, print, and map the outcome to an exit status
//! (0 all good, 1 some inputs failed, 2 usage or set-up error, 128 + signal
//! when a signal stopped the run). Each command's flags and its call into the
//! library are in a file of their own.
//!
//! Nothing here prints with `print!` or `eprintln!`, which panic when the
//! stream is closed or full: [`say!`] writes to stdout and [`tell!`] to
//! stderr. A closed pipe (`| head -1`) ends the printing quietly; any other
//! failure to write stdout (a full disk) is reported on stderr at the end and
//! makes the exit status at least 1. Files are written before anything is
//! printed about them, so printing never loses results.

/// Prints to stdout without ever panicking (see the module header).
macro_rules! say {
    ($($t:tt)*) => { $crate::cli::to_stdout(format_args!($($t)*)) };
}

/// Prints one line to stderr without ever panicking; a failure is ignored
/// (there is nowhere left to say it).
macro_rules! tell {
    ($($t:tt)*) => { $crate::cli::to_stderr(format_args!($($t)*)) };
}

mod apply;
mod args;
mod bank;
mod borders;
mod learn;
mod merge;
mod probe;
mod reckon;

use std::io::Write;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use clap::{Parser, Subcommand};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use tapmap::error::Error;
use tapmap::jobs::{Observer, Stop, STOP_ASKED};

/// Exit status: everything worked.
pub const EXIT_OK: i32 = 0;
/// Exit status: some inputs failed; the others were written.
pub const EXIT_SOME_FAILED: i32 = 1;
/// Exit status: usage or set-up error before any work.
pub const EXIT_USAGE: i32 = 2;

#[derive(Parser)]
#[command(
    name = "tapmap",
    version,
    about = "Apply banks of convolution kernels to images; write feature maps.",
    after_help = "Exit status: 0 all good, 1 some inputs failed (the rest were written) or the results could not all be written or printed, 2 usage or set-up error, 128+N stopped by signal N."
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Run a bank or recipe over images, folders and globs; write maps, views, sheets, stats, manifest.
    #[command(after_help = apply::AFTER_HELP)]
    Apply(apply::ApplyArgs),
    /// Print each stage's output size, padding, receptive field and cost for an input size.
    #[command(after_help = reckon::AFTER_HELP)]
    Reckon(reckon::ReckonArgs),
    /// Compare pad modes on real images: band where modes disagree, deviation figures,
    /// difference views, and (with --crop) which mode best stands in for missing pixels.
    #[command(after_help = borders::AFTER_HELP)]
    Borders(borders::BordersArgs),
    /// The strongest responses of each kernel across images, with the patches they see.
    #[command(after_help = probe::AFTER_HELP)]
    Probe(probe::ProbeArgs),
    /// Combine the shards of a job (OUT/shard-K-of-N) into the tables one run would write.
    #[command(after_help = merge::AFTER_HELP)]
    Merge(merge::MergeArgs),
    /// Built-in kernels and bank files: list, show, make, import, draw.
    #[command(subcommand)]
    Bank(bank::BankCommand),
    /// Print a shell completion script (bash, zsh or fish).
    #[command(after_help = "Examples:\n  \
        source <(tapmap completions bash)\n  \
        tapmap completions zsh > ~/.zfunc/_tapmap\n  \
        tapmap completions fish > ~/.config/fish/completions/tapmap.fish")]
    Completions {
        /// The shell.
        #[arg(value_name = "SHELL")]
        shell: clap_complete::Shell,
    },
    /// Print the manual page (roff) of tapmap, or of one command (`tapmap man apply`).
    #[command(after_help = "Examples:\n  \
        tapmap man | man -l -\n  \
        tapmap man bank make | man -l -\n  \
        tapmap man apply > /usr/local/share/man/man1/tapmap-apply.1")]
    Man {
        /// The command, with its subcommand for `bank` (e.g. `bank make`).
        #[arg(value_name = "COMMAND")]
        command: Vec<String>,
    },
}

/// The first failure to write stdout other than a closed pipe.
static STDOUT_FAILURE: Mutex<Option<String>> = Mutex::new(None);
/// Whether stdout was found closed: nothing more is written to it.
static STDOUT_CLOSED: AtomicBool = AtomicBool::new(false);

pub(crate) fn to_stdout(args: std::fmt::Arguments) {
    if STDOUT_CLOSED.load(Ordering::Relaxed) {
        return;
    }
    let mut out = std::io::stdout().lock();
    if let Err(e) = out.write_fmt(args).and_then(|()| out.flush()) {
        if e.kind() == std::io::ErrorKind::BrokenPipe {
            STDOUT_CLOSED.store(true, Ordering::Relaxed);
        } else {
            STDOUT_FAILURE
                .lock()
                .unwrap_or_else(|p| p.into_inner())
                .get_or_insert(e.to_string());
        }
    }
}

pub(crate) fn to_stderr(args: std::fmt::Arguments) {
    let mut err = std::io::stderr().lock();
    let _ = writeln!(err, "{args}");
}

/// Runs the command line; returns the exit status.
pub fn main() -> i32 {
    let code = run_command();
    match STDOUT_FAILURE
        .lock()
        .unwrap_or_else(|p| p.into_inner())
        .take()
    {
        Some(e) => {
            tell!("tapmap: error: could not write to standard output ({e}); files written are complete");
            code.max(EXIT_SOME_FAILED)
        }
        None => code,
    }
}

fn run_command() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) if e.use_stderr() => {
            // The one message style: `tapmap: error: what is wrong`, then clap's
            // usage line and hint of what to do.
            let text = e.render().to_string();
            let text = text.strip_prefix("error: ").unwrap_or(&text);
            tell!("tapmap: error: {}", text.trim_end());
            return EXIT_USAGE;
        }
        Err(e) => {
            // --help and --version.
            say!("{}", e.render());
            return EXIT_OK;
        }
    };
    let outcome = match cli.command {
        Command::Apply(a) => apply::run(a),
        Command::Reckon(p) => reckon::run(p),
        Command::Borders(b) => borders::run(b),
        Command::Probe(p) => probe::run(p),
        Command::Merge(m) => merge::run(m),
        Command::Bank(b) => bank::run(b),
        Command::Completions { shell } => {
            let mut text = Vec::new();
            let mut cmd = <Cli as clap::CommandFactory>::command();
            clap_complete::generate(shell, &mut cmd, "tapmap", &mut text);
            say!("{}", String::from_utf8_lossy(&text));
            Ok(EXIT_OK)
        }
        Command::Man { command } => man_page(&command),
    };
    match outcome {
        Ok(code) => code,
        Err(e) => {
            tell!("tapmap: error: {e}");
            EXIT_USAGE
        }
    }
}

/// The manual page of tapmap, or of one of its commands (`tapmap-bank-make`).
fn man_page(command: &[String]) -> Result<i32, Error> {
    let mut cmd = <Cli as clap::CommandFactory>::command();
    let mut name = "tapmap".to_string();
    for part in command {
        let Some(sub) = cmd.find_subcommand(part).cloned() else {
            return Err(Error::usage(format!(
                "'{part}' is not a command of {name}; `{} --help` lists them",
                name.replace('-', " ")
            )));
        };
        name = format!("{name}-{part}");
        cmd = sub.name(name.clone());
    }
    let mut text = Vec::new();
    clap_mangen::Man::new(cmd)
        .render(&mut text)
        .map_err(|e| Error::usage(format!("cannot draw the manual page: {e}")))?;
    say!("{}", String::from_utf8_lossy(&text));
    Ok(EXIT_OK)
}

/// A rate with three significant digits (two from 10 to 100, none above):
/// `25.5 images/s`, `0.412 images/s`, `134 images/s`.
fn rate_text(per_second: f64, what: &str) -> String {
    if !per_second.is_finite() {
        return format!("- {what}/s");
    }
    let digits = if per_second >= 100.0 {
        0
    } else if per_second >= 10.0 {
        1
    } else if per_second >= 1.0 {
        2
    } else {
        3
    };
    format!("{per_second:.digits$} {what}/s")
}

/// Exit status after a run over inputs: 1 when any failed.
fn status(failed: usize) -> i32 {
    if failed > 0 {
        EXIT_SOME_FAILED
    } else {
        EXIT_OK
    }
}

/// What a job tells the terminal: a progress bar on stderr (hidden when stderr
/// is not a terminal, or with `--quiet`), each failed input as it happens, and
/// per-image text on stdout unless quiet.
struct Terminal {
    bar: ProgressBar,
    quiet: bool,
}

impl Terminal {
    fn new(quiet: bool, what: &str) -> Self {
        let bar = if quiet {
            ProgressBar::hidden()
        } else {
            let b = ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr());
            let unit = what.to_string();
            b.set_style(
                ProgressStyle::with_template(&format!(
                    "{{bar:30}} {{pos}}/{{len}} {what}  {{rate}}  eta {{eta}}"
                ))
                .expect("valid template")
                .with_key(
                    "rate",
                    move |s: &indicatif::ProgressState, w: &mut dyn std::fmt::Write| {
                        let _ = w.write_str(&rate_text(s.per_sec(), &unit));
                    },
                ),
            );
            b
        };
        Terminal { bar, quiet }
    }

    /// For `apply --follow`: one status line, replaced at each interval, instead
    /// of a bar towards a known total.
    fn following(quiet: bool) -> Self {
        let bar = if quiet {
            ProgressBar::hidden()
        } else {
            let b = ProgressBar::with_draw_target(None, ProgressDrawTarget::stderr());
            b.set_style(ProgressStyle::with_template("{msg}").expect("valid template"));
            b.set_message("following: listing the inputs");
            b
        };
        Terminal { bar, quiet }
    }
}

impl Observer for Terminal {
    fn begin(&self, total: usize) {
        self.bar.set_length(total as u64);
    }
    fn advance(&self) {
        self.bar.inc(1);
    }
    fn input_failed(&self, error: &Error) {
        self.bar.suspend(|| tell!("tapmap: error: {error}"));
    }
    fn report(&self, text: &str) {
        if !self.quiet {
            self.bar.suspend(|| say!("{text}"));
        }
    }
    fn status(&self, line: &str) {
        self.bar.set_message(line.to_string());
    }
    fn end(&self) {
        self.bar.finish_and_clear();
    }
}

/// SIGINT and SIGTERM ask a run to stop: images in flight are finished, no new
/// ones are started, tables are written for what is done, and the exit status is
/// 128 + the signal (130, 143). A second signal ends the process at once.
fn watch_stop_signals(stop: &Stop) -> Result<(), Error> {
    use signal_hook::consts::{SIGINT, SIGTERM};
    let armed = Arc::new(AtomicBool::new(false));
    for sig in [SIGINT, SIGTERM] {
        let e = |e: std::io::Error| Error::usage(format!("cannot watch signal {sig}: {e}"));
        // Order matters: the exit check runs before the flag is set, so only a
        // second signal finds it armed.
        signal_hook::flag::register_conditional_shutdown(sig, 128 + sig, Arc::clone(&armed))
            .map_err(e)?;
        signal_hook::flag::register(sig, Arc::clone(&armed)).map_err(e)?;
        signal_hook::flag::register_usize(sig, stop.flag(), STOP_ASKED | sig as usize)
            .map_err(e)?;
    }
    Ok(())
}

/// The command line as given, for manifests.
fn command_line() -> Vec<String> {
    // Arguments that are not UTF-8 are kept without loss, their odd bytes
    // written \xNN (as in the tables).
    std::env::args_os()
        .map(|a| match a.to_str() {
            Some(t) => t.to_string(),
            None => tapmap::jobs::inputs::path_text(std::path::Path::new(&a)),
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::rate_text;

    #[test]
    fn rates_have_two_or_three_significant_digits() {
        assert_eq!(rate_text(25.4991, "images"), "25.5 images/s");
        assert_eq!(rate_text(134.49, "images"), "134 images/s");
        assert_eq!(rate_text(3.456, "images"), "3.46 images/s");
        assert_eq!(rate_text(0.41234, "images"), "0.412 images/s");
        assert_eq!(rate_text(f64::INFINITY, "images"), "- images/s");
    }
}
