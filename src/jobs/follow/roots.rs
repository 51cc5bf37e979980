//! Which files a followed run's inputs cover, asked of one path at a time as
//! the file system reports it: the same answer, and the same relative path,
//! that listing the inputs afresh would give ([`crate::jobs::inputs`]).

use std::path::{Path, PathBuf};

use glob::{MatchOptions, Pattern};

use crate::error::Error;
use crate::jobs::inputs::{
    below_run_folder, has_image_extension, is_npy, is_pattern, pattern_root, rel_below, Excluder,
    InputItem,
};

/// One command-line input.
enum Root {
    /// A folder, followed with everything below it.
    Folder(PathBuf),
    /// A glob pattern below its fixed leading folders.
    Pattern {
        pattern: Pattern,
        root: PathBuf,
        npy: bool,
    },
    /// One file.
    File(PathBuf),
}

/// The inputs of a followed run.
pub(crate) struct Roots {
    roots: Vec<Root>,
    ex: Excluder,
    /// Each watched folder as the file system names it in events (absolute,
    /// links resolved) and as the command line gave it, longest first.
    aliases: Vec<(PathBuf, PathBuf)>,
}

/// As `glob::glob` walks: `*` never crosses a `/`.
const MATCH: MatchOptions = MatchOptions {
    case_sensitive: true,
    require_literal_separator: true,
    require_literal_leading_dot: false,
};

impl Roots {
    /// The roots of `args`; a pattern's fixed folders must exist (they are
    /// watched), as must every folder and file.
    pub fn new(args: &[PathBuf], out_dir: &Path) -> Result<Roots, Error> {
        let mut roots = Vec::new();
        for arg in args {
            let text = arg.to_string_lossy();
            if !arg.exists() && is_pattern(&text) {
                let root = pattern_root(&text);
                if !root.is_dir() {
                    return Err(Error::usage(format!(
                        "pattern '{text}': its folder {} does not exist, so it cannot be followed",
                        root.display()
                    )));
                }
                let pattern = Pattern::new(&text)
                    .map_err(|e| Error::usage(format!("pattern '{text}': {e}")))?;
                let npy = text.to_ascii_lowercase().ends_with(".npy");
                roots.push(Root::Pattern { pattern, root, npy });
            } else if arg.is_dir() {
                roots.push(Root::Folder(arg.clone()));
            } else if arg.is_file() {
                roots.push(Root::File(arg.clone()));
            } else {
                return Err(Error::usage(format!(
                    "no such file or folder: {}",
                    arg.display()
                )));
            }
        }
        let mut r = Roots {
            roots,
            ex: Excluder::new(out_dir),
            aliases: Vec::new(),
        };
        r.aliases = r
            .watch_points()
            .into_iter()
            .filter_map(|(given, _)| Some((given.canonicalize().ok()?, given)))
            .collect();
        r.aliases
            .sort_by_key(|(canon, _)| std::cmp::Reverse(canon.components().count()));
        Ok(r)
    }

    /// `path` from a file event, in the form a listing of the inputs as given
    /// on the command line names it (events name files below the resolved,
    /// absolute folder; a relative input would otherwise never match).
    pub fn local(&self, path: &Path) -> PathBuf {
        for (canon, given) in &self.aliases {
            if let Ok(rest) = path.strip_prefix(canon) {
                return if rest.as_os_str().is_empty() {
                    given.clone()
                } else {
                    given.join(rest)
                };
            }
        }
        path.to_path_buf()
    }

    /// Folders to watch, each with whether everything below it is watched.
    pub fn watch_points(&self) -> Vec<(PathBuf, bool)> {
        self.roots
            .iter()
            .map(|r| match r {
                Root::Folder(f) => (f.clone(), true),
                Root::Pattern { root, .. } => (root.clone(), true),
                Root::File(f) => (
                    f.parent()
                        .filter(|p| !p.as_os_str().is_empty())
                        .map_or_else(|| PathBuf::from("."), Path::to_path_buf),
                    false,
                ),
            })
            .collect()
    }

    /// The input `path` is, when one of the roots covers it (the first root
    /// that does, as in a listing).
    pub fn item_for(&self, path: &Path) -> Option<InputItem> {
        if self.ex.excludes(path) {
            return None;
        }
        let mut seen = std::collections::HashMap::new();
        for r in &self.roots {
            let (root, takes) = match r {
                Root::File(f) => {
                    if f == path {
                        return Some(InputItem {
                            source: path.to_path_buf(),
                            rel: PathBuf::from(path.file_name()?),
                            problem: None,
                        });
                    }
                    continue;
                }
                Root::Folder(f) => (f, path.starts_with(f) && has_image_extension(path)),
                Root::Pattern { pattern, root, npy } => {
                    let direct = pattern.matches_path_with(path, MATCH)
                        && (has_image_extension(path) || (*npy && is_npy(path)));
                    // A pattern that names folders takes the images below them.
                    let below = has_image_extension(path)
                        && path
                            .ancestors()
                            .skip(1)
                            .take_while(|a| a.starts_with(root))
                            .any(|a| pattern.matches_path_with(a, MATCH));
                    (root, path.starts_with(root) && (direct || below))
                }
            };
            if takes && !below_run_folder(path, root, &mut seen) {
                return Some(InputItem {
                    source: path.to_path_buf(),
                    rel: rel_below(path, root),
                    problem: None,
                });
            }
        }
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_path_gets_the_relative_path_a_listing_gives() {
        let d = tempfile::tempdir().unwrap();
        let cap = d.path().join("cap");
        std::fs::create_dir_all(cap.join("s1")).unwrap();
        let out = d.path().join("out");
        let roots = Roots::new(std::slice::from_ref(&cap), &out).unwrap();
        let item = roots.item_for(&cap.join("s1/a.png")).unwrap();
        assert_eq!(item.rel, PathBuf::from("s1/a.png"));
        assert!(roots.item_for(&cap.join("s1/a.png.part")).is_none());
        assert!(roots.item_for(&out.join("x.png")).is_none());
        assert!(roots.item_for(&d.path().join("b.png")).is_none());
        let canon = cap.canonicalize().unwrap().join("s1/a.png");
        assert_eq!(roots.local(&canon), cap.join("s1/a.png"));

        let pat = PathBuf::from(format!("{}/*/*.tif", cap.display()));
        let roots = Roots::new(&[pat], &out).unwrap();
        assert_eq!(
            roots.item_for(&cap.join("s1/b.tif")).unwrap().rel,
            PathBuf::from("s1/b.tif")
        );
        // `*` does not cross a folder, as in a listing.
        assert!(roots.item_for(&cap.join("s1/deep/b.tif")).is_none());
        assert!(roots.item_for(&cap.join("s1/b.png")).is_none());
    }
}
