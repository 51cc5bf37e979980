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

    /// `rel` with `/` separators, for CSVs and the manifest.
    pub fn rel_string(&self) -> String {
        let parts: Vec<String> = self
            .rel
            .components()
            .map(|c| c.as_os_str().to_string_lossy().into_owned())
            .collect();
        parts.join("/")
    }
}

fn has_image_extension(p: &Path) -> bool {
    p.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| IMAGE_EXTENSIONS.iter().any(|x| x.eq_ignore_ascii_case(e)))
}

fn is_npy(p: &Path) -> bool {
    p.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| e.eq_ignore_ascii_case("npy"))
}

fn is_pattern(s: &str) -> bool {
    s.contains(['*', '?', '['])
}

/// The fixed leading folders of a glob pattern (before the first component with a
/// wildcard), or `.` when the pattern starts with one.
fn pattern_root(pattern: &str) -> PathBuf {
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

struct Excluder {
    lexical: PathBuf,
    canonical: Option<PathBuf>,
}

impl Excluder {
    fn new(out_dir: &Path) -> Self {
        Excluder {
            lexical: absolute(out_dir),
            canonical: out_dir.canonicalize().ok(),
        }
    }
    fn excludes(&self, p: &Path) -> bool {
        absolute(p).starts_with(&self.lexical)
            || self
                .canonical
                .as_ref()
                .is_some_and(|c| p.canonicalize().is_ok_and(|pc| pc.starts_with(c)))
    }
}

fn walk_folder(root: &Path, base: &Path, ex: &Excluder, out: &mut Vec<InputItem>) {
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
            if ex.excludes(entry.path()) {
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
fn rel_below(p: &Path, root: &Path) -> PathBuf {
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

/// Expands the inputs (see the module header). Errors: a bad pattern, nothing to
/// read, two inputs with one output name.
pub fn expand_inputs(args: &[PathBuf], out_dir: &Path) -> Result<Vec<InputItem>, Error> {
    let ex = Excluder::new(out_dir);
    let mut items = Vec::new();
    for arg in args {
        let s = arg.to_string_lossy();
        if !arg.exists() && is_pattern(&s) {
            let root = pattern_root(&s);
            let npy_pattern = s.to_ascii_lowercase().ends_with(".npy");
            let paths = glob::glob(&s).map_err(|e| Error::Usage(format!("pattern '{s}': {e}")))?;
            let before = items.len();
            for p in paths {
                match p {
                    Ok(p) if p.is_dir() => walk_folder(&p, &root, &ex, &mut items),
                    Ok(p)
                        if (has_image_extension(&p) || (npy_pattern && is_npy(&p)))
                            && !ex.excludes(&p) =>
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
            if items.len() == before {
                return Err(Error::Usage(format!(
                    "pattern '{s}' matches no image files"
                )));
            }
        } else if arg.is_dir() {
            let before = items.len();
            walk_folder(arg, arg, &ex, &mut items);
            if items.len() == before {
                return Err(Error::Usage(format!(
                    "folder {} holds no image files ({})",
                    arg.display(),
                    IMAGE_EXTENSIONS.join(", ")
                )));
            }
        } else {
            let name = arg
                .file_name()
                .map(PathBuf::from)
                .ok_or_else(|| Error::Usage(format!("{}: not a file name", arg.display())))?;
            items.push(InputItem {
                source: arg.clone(),
                rel: name,
                problem: None,
            });
        }
    }
    if items.is_empty() {
        return Err(Error::Usage("no input images given".into()));
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
    let mut names: BTreeMap<PathBuf, &InputItem> = BTreeMap::new();
    for item in &items {
        if let Some(first) = names.insert(item.stem_path(), item) {
            return Err(Error::Usage(format!(
                "{} and {} would both write outputs named {}; rename one, or run them separately",
                first.source.display(),
                item.source.display(),
                item.stem_path().display()
            )));
        }
    }
    Ok(items)
}
