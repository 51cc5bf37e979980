//! Decoder and file-system errors in plain words, for the cases a batch meets.

use std::path::Path;

use crate::error::Error;

/// A decoder's error in plain words: files cut short and damaged checksums are
/// named as such, with the decoder's own words after them.
pub(crate) fn decode_message(e: &image::ImageError) -> String {
    let eof = matches!(e, image::ImageError::IoError(io) if io.kind() == std::io::ErrorKind::UnexpectedEof);
    plain_decode_error(&e.to_string(), eof)
}

/// [`decode_message`] from a decoder's message text.
pub(crate) fn plain_decode_error(text: &str, eof: bool) -> String {
    let lower = text.to_ascii_lowercase();
    let cut = eof
        || [
            "end of file",
            "fill whole buffer",
            "not enough bytes",
            "unexpected eof",
            "truncated",
        ]
        .iter()
        .any(|w| lower.contains(w));
    let detail = text.split_whitespace().collect::<Vec<_>>().join(" ");
    let detail = detail.trim_end_matches('.');
    if cut {
        format!("is truncated: the file ends before its image data does (decoder: {detail})")
    } else if lower.contains("crc") || lower.contains("checksum") {
        format!("is damaged: a checksum does not match its data (decoder: {detail})")
    } else {
        format!("cannot decode: {detail}")
    }
}

/// An error opening an input, in plain words for the cases a batch meets: a
/// broken symbolic link, a file that went away after it was listed.
pub fn explain_open_error(path: &Path, e: std::io::Error) -> Error {
    match (
        e.kind(),
        std::fs::symlink_metadata(path),
        std::fs::read_link(path),
    ) {
        (std::io::ErrorKind::NotFound, Ok(m), Ok(target)) if m.file_type().is_symlink() => {
            Error::decode(
                path,
                format!(
                    "is a symbolic link to {}, which does not exist",
                    target.display()
                ),
            )
        }
        (std::io::ErrorKind::NotFound, Err(_), _) => Error::decode(
            path,
            "is gone: it was listed but no longer exists (moved or deleted during the run?)",
        ),
        _ => Error::io(path, e),
    }
}
