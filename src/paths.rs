//! Path helpers: lexical normalisation and relative paths.
//!
//! The manifest records paths relative to the pipeline's folder (inputs) and to the manifest's
//! folder (the pipeline), never absolute ones, so that a study moved or archived as a whole can
//! still be verified.

use std::path::{Component, Path, PathBuf};

/// An absolute path with `.` and `..` resolved lexically (symlinks are not followed).
pub fn normalize(path: &Path) -> PathBuf {
    let absolute = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
    let mut out = PathBuf::new();
    for component in absolute.components() {
        match component {
            Component::ParentDir => {
                out.pop();
            }
            Component::CurDir => {}
            other => out.push(other),
        }
    }
    out
}

/// `path` with `.` and `name/..` removed lexically, staying relative if it was (for messages:
/// `pipelines/../results/x` → `results/x`).
pub fn clean(path: &Path) -> PathBuf {
    let mut out: Vec<Component> = Vec::new();
    for component in path.components() {
        match component {
            Component::CurDir => {}
            Component::ParentDir if matches!(out.last(), Some(Component::Normal(_))) => {
                out.pop();
            }
            other => out.push(other),
        }
    }
    out.iter().collect()
}

/// `path` relative to the folder `base` (both made absolute first), with `..` where needed.
pub fn relative_to(path: &Path, base: &Path) -> Option<PathBuf> {
    let path = normalize(path);
    let base = normalize(base);
    let p: Vec<Component> = path.components().collect();
    let b: Vec<Component> = base.components().collect();
    if p.first() != b.first() {
        return None;
    }
    let common = p.iter().zip(&b).take_while(|(x, y)| x == y).count();
    let mut out: PathBuf = std::iter::repeat_n("..", b.len() - common).collect();
    out.extend(&p[common..]);
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_paths_climb_where_needed() {
        assert_eq!(
            relative_to(Path::new("/a/b/c.txt"), Path::new("/a/d")).unwrap(),
            PathBuf::from("../b/c.txt")
        );
        assert_eq!(
            relative_to(Path::new("/a/./b/../c"), Path::new("/a")).unwrap(),
            PathBuf::from("c")
        );
        assert_eq!(
            clean(Path::new("pipelines/../results/./x")),
            PathBuf::from("results/x")
        );
        assert_eq!(clean(Path::new("../a/../b")), PathBuf::from("../b"));
    }
}
