//! Files appear whole or not at all: each is written under a temporary name in its
//! final folder and renamed into place (a rename within one folder is atomic on
//! POSIX file systems).

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::Path;

use crate::error::Error;

/// Writes `bytes` produced by `fill` to `path` atomically (temporary file in the
/// same folder, then rename); on failure no file is left at `path`. The folder
/// is created if missing.
pub fn write_atomic(
    path: &Path,
    fill: impl FnOnce(&mut dyn Write) -> std::io::Result<()>,
) -> Result<(), Error> {
    write_atomic_file(path, |f| {
        let mut w = BufWriter::new(f);
        fill(&mut w)?;
        w.flush()
    })
}

/// As [`write_atomic`], with the temporary file itself to write to.
pub fn write_atomic_file(
    path: &Path,
    fill: impl FnOnce(&File) -> std::io::Result<()>,
) -> Result<(), Error> {
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
    let tmp = tempfile::Builder::new()
        .prefix(".tapmap-")
        .suffix(".part")
        .tempfile_in(dir)
        .map_err(|e| Error::io(dir, e))?;
    fill(tmp.as_file()).map_err(|e| Error::io(path, e))?;
    // Temporary files are created private (0600); outputs are ordinary files.
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        tmp.as_file()
            .set_permissions(std::fs::Permissions::from_mode(0o644))
            .map_err(|e| Error::io(path, e))?;
    }
    tmp.persist(path).map_err(|e| Error::io(path, e.error))?;
    Ok(())
}

/// Refuses to replace an existing file (a bank file is someone's work)
/// unless `force`: checked before any work, so nothing is computed in vain.
pub fn refuse_existing(out: &Path, force: bool) -> Result<(), Error> {
    if !force && std::fs::symlink_metadata(out).is_ok() {
        return Err(Error::usage(format!(
            "{} exists; give --force to replace it, or another -o",
            out.display()
        )));
    }
    Ok(())
}
