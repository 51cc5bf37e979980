//! Turning the command line's inputs into a sorted list of image files, each with
//! the relative path its outputs mirror.
//!
//! - a **file** given alone lands at the top of the output folder;
//! - a **folder** is walked recursively; outputs mirror paths below it;
//! - a **glob pattern** (`*`, `?`, `[…]`, `**`) is expanded here, so a quoted pattern
//!   works in every shell; outputs mirror paths below the pattern's fixed prefix.
//!
//! Folders and patterns keep only image extensions; a file named explicitly is
//! always tried (and reported if it is not an image). NumPy `.npy` arrays are read
//! when named or matched by a pattern that itself ends in `.npy`, never picked up
//! from a folder walk (folders of captures often hold weight files beside them). The output folder is never
//! read, even inside an input folder. The list is sorted by relative path; the
//! same file reached twice is kept once; two inputs that would write the same
//! output name are an error before any work starts.

use std::collections::BTreeMap;
use std::path::{Component, Path, PathBuf};

use crate::error::Error;

/// Extensions read from folders and patterns (compared without case).
pub const IMAGE_EXTENSIONS: &[&str] = &[
    "png", "jpg", "jpeg", "tif", "tiff", "bmp", "pnm", "pgm", "ppm", "pbm", "pam",
];

/// One input file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct InputItem {
    /// Where to read it.
    pub source: PathBuf,
    /// Its path relative to its root: outputs mirror this, CSVs name it.
    pub rel: PathBuf,
    /// A problem found while listing (broken link, unreadable folder); the file
    /// is then reported as failed without being read.
    pub problem: Option<String>,
}

impl InputItem {
    /// `rel` without its extension: the stem that outputs are named after.
    pub fn stem_path(&self) -> PathBuf {
        self.rel.with_extension("")
    }

    /// The output file `folder/<stem path>.<ext>`. The extension is added, never
    /// swapped, so `tile.v2.png` gives `tile.v2.npy`, not `tile.npy`.
    pub fn output_file(&self, folder: &Path, ext: &str) -> PathBuf {
        let mut name = folder.join(self.stem_path()).into_os_string();
        name.push(".");
        name.push(ext);
        PathBuf::from(name)
    }

    /// `rel` with `/` separators, for CSVs and the manifest, without loss:
    /// see [`path_text`].
    pub fn rel_string(&self) -> String {
        path_text(&self.rel)
    }
}

/// A path as text for tables, readable and without loss: components joined
/// with `/`; bytes that are not UTF-8 written `\xNN` and a backslash written
/// `\\`, so two names that differ only in such bytes never read alike.
pub fn path_text(p: &Path) -> String {
    let mut out = String::new();
    for c in p.components() {
        if !(out.is_empty() || out.ends_with('/')) {
            out.push('/');
        }
        match c {
            Component::RootDir => out.push('/'),
            c => out.push_str(&component_text(c.as_os_str())),
        }
    }
    out
}

#[cfg(unix)]
fn component_text(s: &std::ffi::OsStr) -> String {
    use std::fmt::Write;
    use std::os::unix::ffi::OsStrExt;
    let mut out = String::new();
    for chunk in s.as_bytes().utf8_chunks() {
        out.push_str(&chunk.valid().replace('\\', "\\\\"));
        for b in chunk.invalid() {
            let _ = write!(out, "\\x{b:02x}");
        }
    }
    out
}

/// The path that [`path_text`] wrote as `text` (its inverse); `None` for text
/// it cannot have written.
#[cfg(unix)]
pub fn path_from_text(text: &str) -> Option<PathBuf> {
    use std::os::unix::ffi::OsStringExt;
    let mut bytes = Vec::with_capacity(text.len());
    let mut rest = text.as_bytes();
    while let Some((&b, tail)) = rest.split_first() {
        rest = tail;
        if b != b'\\' {
            bytes.push(b);
            continue;
        }
        match rest {
            [b'\\', tail @ ..] => {
                bytes.push(b'\\');
                rest = tail;
            }
            [b'x', h, l, tail @ ..] => {
                let hex = std::str::from_utf8(&[*h, *l]).ok()?.to_string();
                bytes.push(u8::from_str_radix(&hex, 16).ok()?);
                rest = tail;
            }
            _ => return None,
        }
    }
    Some(PathBuf::from(std::ffi::OsString::from_vec(bytes)))
}

/// The path that [`path_text`] wrote as `text` (its inverse).
#[cfg(not(unix))]
pub fn path_from_text(text: &str) -> Option<PathBuf> {
    Some(PathBuf::from(text.replace("\\\\", "\\")))
}

#[cfg(not(unix))]
fn component_text(s: &std::ffi::OsStr) -> String {
    s.to_string_lossy().replace('\\', "\\\\")
}

pub(crate) fn has_image_extension(p: &Path) -> bool {
    p.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| IMAGE_EXTENSIONS.iter().any(|x| x.eq_ignore_ascii_case(e)))
}

/// Whether `p` ends in `.ext`, in any case.
pub fn has_extension(p: &Path, ext: &str) -> bool {
    p.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| e.eq_ignore_ascii_case(ext))
}

pub(crate) fn is_npy(p: &Path) -> bool {
    has_extension(p, "npy")
}

pub(crate) fn is_pattern(s: &str) -> bool {
    s.contains(['*', '?', '['])
}

/// The fixed leading folders of a glob pattern (before the first component with a
/// wildcard), or `.` when the pattern starts with one.
pub(crate) fn pattern_root(pattern: &str) -> PathBuf {
    let mut root = PathBuf::new();
    for c in Path::new(pattern).components() {
        let s = c.as_os_str().to_string_lossy();
        if is_pattern(&s) {
            break;
        }
        root.push(c.as_os_str());
    }
    // The last fixed component may be the file itself only if there was no wildcard.
    if root.as_os_str().is_empty() {
        PathBuf::from(".")
    } else {
        root
    }
}

/// Absolute, lexically normalised form of a path (no file system access), used
/// to recognise the output folder.
fn absolute(p: &Path) -> PathBuf {
    let abs = std::path::absolute(p).unwrap_or_else(|_| p.to_path_buf());
    let mut out = PathBuf::new();
    for c in abs.components() {
        match c {
            Component::ParentDir => {
                out.pop();
            }
            Component::CurDir => {}
            other => out.push(other.as_os_str()),
        }
    }
    out
}

pub(crate) struct Excluder {
    lexical: PathBuf,
    canonical: Option<PathBuf>,
}

/// Whether `dir` holds a run of tapmap's: a `journal.jsonl` or a
/// `manifest.json` that says it is tapmap's (its first bytes name the format:
/// an apply run's, a merge's, a probe's or a border study's).
pub fn is_run_folder(dir: &Path) -> bool {
    // One read of each file's first bytes, checked for every format it may name.
    let names = |file: &str, formats: &[&str]| {
        use std::io::Read;
        let mut head = [0u8; 256];
        std::fs::File::open(dir.join(file))
            .and_then(|mut f| f.read(&mut head))
            .is_ok_and(|n| {
                let text = String::from_utf8_lossy(&head[..n]);
                formats.iter().any(|f| text.contains(f))
            })
    };
    names("journal.jsonl", &["tapmap-journal"])
        || names(
            "manifest.json",
            &["tapmap-manifest", "tapmap-probe", "tapmap-borders"],
        )
}

/// Whether a folder between `root` (not included: it was checked before) and
/// the file `p` holds a tapmap run; `seen` remembers each folder's answer.
pub(crate) fn below_run_folder(
    p: &Path,
    root: &Path,
    seen: &mut std::collections::HashMap<PathBuf, bool>,
) -> bool {
    let mut dir = p.parent();
    while let Some(d) = dir {
        if d == root || d.as_os_str().is_empty() {
            return false;
        }
        let run = *seen
            .entry(d.to_path_buf())
            .or_insert_with(|| is_run_folder(d));
        if run {
            return true;
        }
        dir = d.parent();
    }
    false
}

/// The folder of a tapmap run that `path` lies in, if any (checked up to the
/// file system's root).
fn run_folder_above(path: &Path) -> Option<PathBuf> {
    let abs = absolute(path);
    let start = if abs.is_dir() {
        Some(abs.as_path())
    } else {
        abs.parent()
    };
    let mut dir = start;
    while let Some(d) = dir {
        if is_run_folder(d) {
            return Some(d.to_path_buf());
        }
        dir = d.parent();
    }
    None
}

impl Excluder {
    pub(crate) fn new(out_dir: &Path) -> Self {
        Excluder {
            lexical: absolute(out_dir),
            canonical: out_dir.canonicalize().ok(),
        }
    }
    pub(crate) fn excludes(&self, p: &Path) -> bool {
        absolute(p).starts_with(&self.lexical)
            || self
                .canonical
                .as_ref()
                .is_some_and(|c| p.canonicalize().is_ok_and(|pc| pc.starts_with(c)))
    }
}

pub(crate) fn walk_folder(root: &Path, base: &Path, ex: &Excluder, out: &mut Vec<InputItem>) {
    let walker = walkdir::WalkDir::new(root)
        .follow_links(true)
        .sort_by_file_name();
    let mut it = walker.into_iter();
    loop {
        let entry = match it.next() {
            None => break,
            Some(Ok(e)) => e,
            Some(Err(e)) => {
                let path = e
                    .path()
                    .map(Path::to_path_buf)
                    .unwrap_or_else(|| root.to_path_buf());
                let link = std::fs::read_link(&path).ok();
                let msg = if e.loop_ancestor().is_some() {
                    "is a symbolic link that loops back to a folder above it".to_string()
                } else if let (Some(t), Some(std::io::ErrorKind::NotFound)) =
                    (link, e.io_error().map(std::io::Error::kind))
                {
                    format!(
                        "is a symbolic link to {}, which does not exist",
                        t.display()
                    )
                } else {
                    e.io_error()
                        .map_or_else(|| e.to_string(), |io| io.to_string())
                };
                let rel = rel_below(&path, base);
                out.push(InputItem {
                    source: path,
                    rel,
                    problem: Some(msg),
                });
                continue;
            }
        };
        if entry.file_type().is_dir() {
            // The output folder, and any folder of an earlier tapmap run, is
            // never input.
            if ex.excludes(entry.path()) || is_run_folder(entry.path()) {
                it.skip_current_dir();
            }
            continue;
        }
        if !has_image_extension(entry.path()) || ex.excludes(entry.path()) {
            continue;
        }
        let rel = rel_below(entry.path(), base);
        out.push(InputItem {
            source: entry.path().to_path_buf(),
            rel,
            problem: None,
        });
    }
}

/// `p` relative to `root`, or `p`'s own plain components when it is not below it.
/// Only plain names survive (no root, `..` or `.`), so an output path built from
/// it always stays inside the output folder.
pub(crate) fn rel_below(p: &Path, root: &Path) -> PathBuf {
    let rel = p.strip_prefix(root).unwrap_or(p);
    let clean: PathBuf = rel
        .components()
        .filter_map(|c| match c {
            Component::Normal(n) => Some(n),
            _ => None,
        })
        .collect();
    if clean.as_os_str().is_empty() {
        p.file_name()
            .map_or_else(|| PathBuf::from("input"), PathBuf::from)
    } else {
        clean
    }
}

/// The order of inputs in every table: relative path compared component by
/// component (`a/b.png` before `a-c.png`), the same key [`crate::jobs::merge`]
/// sorts shard results by.
pub fn path_order_key(rel: &str) -> Vec<&str> {
    rel.split('/').collect()
}

/// Expands the inputs (see the module header). Errors, before anything is
/// written: a bad pattern, a pattern or folder that matches nothing, inputs
/// that do not exist, inputs inside the output folder or inside a folder of an
/// earlier tapmap run, and inputs that would write the same output names (all
/// of these listed at once).
pub fn expand_inputs(args: &[PathBuf], out_dir: &Path) -> Result<Vec<InputItem>, Error> {
    list_inputs(args, out_dir, false)
}

/// [`expand_inputs`], where with `empty_ok` a folder or pattern that holds no
/// image files yet is no error (a folder that is being followed fills later).
pub fn list_inputs(
    args: &[PathBuf],
    out_dir: &Path,
    empty_ok: bool,
) -> Result<Vec<InputItem>, Error> {
    let ex = Excluder::new(out_dir);
    let mut missing = Vec::new();
    for arg in args {
        let s = arg.to_string_lossy();
        let is_glob = !arg.exists() && is_pattern(&s);
        let named = if is_glob {
            pattern_root(&s)
        } else {
            arg.clone()
        };
        if !is_glob && std::fs::symlink_metadata(arg).is_err() {
            missing.push(arg.display().to_string());
            continue;
        }
        if ex.excludes(&named) {
            return Err(Error::usage(format!(
                "input {} lies inside the output folder {}; tapmap never reads its own \
                 outputs: give another --out, or move the inputs",
                arg.display(),
                out_dir.display()
            )));
        }
        if let Some(run) = run_folder_above(&named) {
            return Err(Error::usage(format!(
                "input {} lies inside {}, the folder of a tapmap run (it holds its manifest or \
                 journal); tapmap never reads a run's outputs as input",
                arg.display(),
                run.display()
            )));
        }
    }
    if !missing.is_empty() {
        return Err(Error::usage(format!(
            "no such file or folder: {}",
            missing.join(", ")
        )));
    }
    let mut items = Vec::new();
    for arg in args {
        let s = arg.to_string_lossy();
        if !arg.exists() && is_pattern(&s) {
            let root = pattern_root(&s);
            let npy_pattern = s.to_ascii_lowercase().ends_with(".npy");
            let paths = glob::glob(&s).map_err(|e| Error::usage(format!("pattern '{s}': {e}")))?;
            let mut run_folders = std::collections::HashMap::new();
            let before = items.len();
            for p in paths {
                match p {
                    Ok(p) if p.is_dir() => {
                        if !ex.excludes(&p) && !is_run_folder(&p) {
                            walk_folder(&p, &root, &ex, &mut items)
                        }
                    }
                    Ok(p)
                        if (has_image_extension(&p) || (npy_pattern && is_npy(&p)))
                            && !ex.excludes(&p)
                            && !below_run_folder(&p, &root, &mut run_folders) =>
                    {
                        let rel = rel_below(&p, &root);
                        items.push(InputItem {
                            source: p,
                            rel,
                            problem: None,
                        });
                    }
                    Ok(_) => {}
                    Err(e) => {
                        let p = e.path().to_path_buf();
                        let rel = rel_below(&p, &root);
                        items.push(InputItem {
                            source: p,
                            rel,
                            problem: Some(e.error().to_string()),
                        });
                    }
                }
            }
            if items.len() == before && !empty_ok {
                return Err(Error::usage(format!(
                    "pattern '{s}' matches no image files"
                )));
            }
        } else if arg.is_dir() {
            let before = items.len();
            walk_folder(arg, arg, &ex, &mut items);
            if items.len() == before && !empty_ok {
                return Err(Error::usage(format!(
                    "folder {} holds no image files ({})",
                    arg.display(),
                    IMAGE_EXTENSIONS.join(", ")
                )));
            }
        } else {
            let name = arg
                .file_name()
                .map(PathBuf::from)
                .ok_or_else(|| Error::usage(format!("{}: not a file name", arg.display())))?;
            items.push(InputItem {
                source: arg.clone(),
                rel: name,
                problem: None,
            });
        }
    }
    if items.is_empty() && !empty_ok {
        return Err(Error::usage("no input images given"));
    }
    items.sort_by(|a, b| {
        let (ra, rb) = (a.rel_string(), b.rel_string());
        path_order_key(&ra)
            .cmp(&path_order_key(&rb))
            .then_with(|| a.source.cmp(&b.source))
    });
    // The same file reached twice (a folder and a pattern, say) is read once.
    let mut seen = std::collections::HashSet::new();
    items.retain(|i| {
        seen.insert((
            i.rel.clone(),
            i.source.canonicalize().unwrap_or_else(|_| i.source.clone()),
        ))
    });
    let mut names: BTreeMap<PathBuf, Vec<&InputItem>> = BTreeMap::new();
    for item in &items {
        names.entry(item.stem_path()).or_default().push(item);
    }
    let clashes: Vec<String> = names
        .iter()
        .filter(|(_, v)| v.len() > 1)
        .map(|(stem, v)| {
            let files: Vec<String> = v.iter().map(|i| i.source.display().to_string()).collect();
            format!("{} (from {})", stem.display(), files.join(", "))
        })
        .collect();
    if !clashes.is_empty() {
        return Err(Error::usage(format!(
            "{} output name(s) would be written by more than one input: {}; rename them, or \
             run them separately",
            clashes.len(),
            clashes.join("; ")
        )));
    }
    Ok(items)
}

/// A digest of the whole sorted input list (each input's relative path and
/// where it was read from), which every shard of a job records, so that merge
/// can refuse shards that saw different inputs.
pub fn list_digest(items: &[InputItem]) -> String {
    let mut text = String::new();
    for i in items {
        text.push_str(&i.rel_string());
        text.push('\0');
        text.push_str(&path_text(&absolute(&i.source)));
        text.push('\n');
    }
    crate::digest::sha256_hex(text.as_bytes())
}

/// Reads an input's bytes once and decodes them, the SHA-256 of the same
/// bytes computed on another core meanwhile. The digest is there whenever the
/// bytes could be read, even if they do not decode.
pub fn read_with_digest(
    item: &InputItem,
    input: &crate::image_io::ReadOptions,
) -> (Option<String>, Result<crate::image_io::LoadedImage, Error>) {
    if let Some(p) = &item.problem {
        return (None, Err(Error::decode(&item.source, p.clone())));
    }
    let bytes = match crate::image_io::read_input(&item.source, &input.limits) {
        Ok(b) => b,
        Err(e) => return (None, Err(e)),
    };
    let (sha, img) = rayon::join(
        || crate::digest::sha256_hex(&bytes),
        || crate::image_io::decode_image(&bytes, &item.source, input),
    );
    (Some(sha), img)
}
