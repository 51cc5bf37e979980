//! The pad mode a conv stage takes when the recipe and the flags do not name
//! one, and why it took the mode it has.
//!
//! Trained weights keep zero padding, what the network saw while it learned
//! (frameworks' convolution layers pad with zeros by default; common
//! practice, no source). Built-in and hand-written banks take
//! [`DEFAULT_PAD`], the mode tapmap's own border study ranks best on the line
//! captures (README, "Border study": zero padding errs some 300 times more
//! than the mirror modes near the frame and draws false edges along it). A
//! bank file may name its own mode (`pad = "…"`), which then wins over the
//! default. Library callers that build a [`crate::engine::ConvOptions`] give
//! the mode themselves; this rule belongs to recipe files and flags.

use std::fmt;

use crate::border::PadMode;
use crate::kernel::Bank;

/// The pad mode of built-in and hand-written banks when nothing names one.
pub const DEFAULT_PAD: PadMode = PadMode::Symmetric;

/// Why a conv stage pads the way it does (shown by `reckon`, kept in the manifest).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PadReason {
    /// `--pad` on the command line.
    Flag,
    /// The recipe file's stage names it.
    Recipe,
    /// The bank file names it.
    Bank,
    /// The bank holds trained weights: zero, what the network saw.
    Learned,
    /// Nothing names it: [`DEFAULT_PAD`].
    Default,
}

impl fmt::Display for PadReason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            PadReason::Flag => "--pad",
            PadReason::Recipe => "the recipe names it",
            PadReason::Bank => "the bank file names it",
            PadReason::Learned => "trained weights keep zero, what the network saw",
            PadReason::Default => {
                "default for built-in and hand-written banks, the mode the border study ranks \
                 best on the line captures; zero draws false edges along the frame"
            }
        })
    }
}

/// The mode and reason for a stage of `bank` that names no pad mode.
pub fn default_pad(bank: &Bank) -> (PadMode, PadReason) {
    match bank.pad {
        Some(PadMode::Zero) if is_learned(bank) => (PadMode::Zero, PadReason::Learned),
        Some(m) => (m, PadReason::Bank),
        None => (DEFAULT_PAD, PadReason::Default),
    }
}

/// Whether a bank was made from trained weights (by `bank import`, or a
/// weight file given as `--bank`).
fn is_learned(bank: &Bank) -> bool {
    bank.description
        .as_deref()
        .is_some_and(|d| d.starts_with("imported from "))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn learned_banks_keep_zero_and_the_rest_take_the_default() {
        let mut b = crate::kernel::builtin::resolve_bank("edges").unwrap();
        assert_eq!(default_pad(&b), (DEFAULT_PAD, PadReason::Default));
        b.pad = Some(PadMode::Wrap);
        assert_eq!(default_pad(&b), (PadMode::Wrap, PadReason::Bank));
        b.pad = Some(PadMode::Zero);
        b.description = Some("imported from w.npy tensor w".into());
        assert_eq!(default_pad(&b), (PadMode::Zero, PadReason::Learned));
    }
}
