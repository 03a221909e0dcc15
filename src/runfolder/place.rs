//! Where a run folder may be: the checks made before anything is written.
//!
//! A run replaces its folder as a whole, so the folder must hold nothing but runs: it may
//! not be a file system root or a home folder, may not hold the spec or the data, and an
//! existing folder must be empty, a run folder (it has a `manifest.json` that cohortmix
//! wrote) or a folder of cached fits alone; any other folder needs `--force`, which moves
//! its contents aside rather than deleting them.

use crate::error::{Diagnostic, Error, Result};
use std::path::{Component, Path, PathBuf};

/// What an existing folder holds.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Holds {
    /// Nothing (or the folder does not exist yet).
    Nothing,
    /// A run (a manifest cohortmix wrote), or cached fits alone.
    Run,
    /// Something else; the first few names.
    Other(Vec<String>),
}

/// `~` or `~/…` at the start of a path, expanded with `$HOME`; `~name` is refused.
pub fn expand_home(path: &Path) -> Result<PathBuf> {
    let mut parts = path.components();
    let Some(Component::Normal(first)) = parts.next() else {
        return Ok(path.to_path_buf());
    };
    let first = first.to_string_lossy();
    if !first.starts_with('~') {
        return Ok(path.to_path_buf());
    }
    if first != "~" {
        return Err(Error::input(
            Diagnostic::new(format!("the run folder {} starts with '{first}'", path.display()))
                .help("write the folder's full path; only a lone '~' (your home folder) is expanded"),
        ));
    }
    let home = std::env::var_os("HOME").filter(|h| !h.is_empty()).ok_or_else(|| {
        Error::input(
            Diagnostic::new(format!(
                "the run folder {} starts with '~', but HOME is not set",
                path.display()
            ))
            .help("write the folder's full path"),
        )
    })?;
    Ok(PathBuf::from(home).join(parts.as_path()))
}

/// The absolute form of `path` with every link of its existing part resolved (the part
/// that does not exist yet is appended as written, without `..`).
pub fn resolved(path: &Path) -> Result<PathBuf> {
    let absolute = if path.is_absolute() {
        path.to_path_buf()
    } else {
        std::env::current_dir()
            .map_err(|e| Error::run(Diagnostic::new(format!("cannot read the current folder: {e}"))))?
            .join(path)
    };
    let mut existing = absolute.clone();
    let mut rest = Vec::new();
    while std::fs::symlink_metadata(&existing).is_err() {
        match (existing.file_name(), existing.parent()) {
            (Some(name), Some(parent)) => {
                rest.push(name.to_os_string());
                existing = parent.to_path_buf();
            }
            _ => break,
        }
    }
    let mut out = existing.canonicalize().unwrap_or(existing);
    for name in rest.iter().rev() {
        if name == ".." || name == "." {
            return Err(Error::input(
                Diagnostic::new(format!(
                    "the run folder {} goes through a folder that does not exist",
                    path.display()
                ))
                .help("write the path without '..' after the part that does not exist yet"),
            ));
        }
        out.push(name);
    }
    Ok(out)
}

/// Refuse a run folder at a file system root or a home folder, one that is a file, and one
/// that is, holds or equals one of `inputs` (the spec and the data).
pub fn check(folder: &Path, shown: &Path, inputs: &[&Path]) -> Result<()> {
    if folder.parent().is_none() {
        return Err(Error::input(
            Diagnostic::new(format!("the run folder {} is a file system root", shown.display()))
                .help("give a folder of its own for the run's files, such as runs/<study>"),
        ));
    }
    if let Some(home) = std::env::var_os("HOME").map(PathBuf::from) {
        if resolved(&home).is_ok_and(|h| h == folder) {
            return Err(Error::input(
                Diagnostic::new(format!("the run folder {} is your home folder", shown.display()))
                    .help("give a folder of its own for the run's files, such as ~/runs/<study>"),
            ));
        }
    }
    if let Ok(meta) = std::fs::symlink_metadata(folder) {
        if !meta.is_dir() && !std::fs::metadata(folder).is_ok_and(|m| m.is_dir()) {
            return Err(Error::input(
                Diagnostic::new(format!("the run folder {} is a file", shown.display()))
                    .help("give the path of a folder (it is made if it does not exist)"),
            ));
        }
    }
    for given in inputs {
        if resolved(given)?.starts_with(folder) {
            return Err(Error::input(
                Diagnostic::new(format!(
                    "the run folder {} holds {}, an input of the run",
                    shown.display(),
                    given.display()
                ))
                .help("a run replaces its folder as a whole: give a folder of its own, such as runs/<study>"),
            ));
        }
    }
    Ok(())
}

/// The names in a run folder that a run writes or keeps (anything else is not the run's).
pub fn is_run_entry(name: &str) -> bool {
    super::FILES.contains(&name) || name == crate::fit::cache::CACHE_DIR || name == crate::render::figures::FOLDER
}

/// What the existing folder `folder` holds.
pub fn holds(folder: &Path) -> Result<Holds> {
    let entries = match std::fs::read_dir(folder) {
        Ok(e) => e,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Holds::Nothing),
        Err(e) => {
            return Err(Error::run(Diagnostic::new(format!(
                "cannot read the run folder {}: {e}",
                folder.display()
            ))))
        }
    };
    let names: Vec<String> = entries
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().to_string())
        .collect();
    if names.is_empty() {
        return Ok(Holds::Nothing);
    }
    if names.iter().any(|n| n == "manifest.json") && written_by_us(&folder.join("manifest.json")) {
        return Ok(Holds::Run);
    }
    if names.iter().all(|n| n == crate::fit::cache::CACHE_DIR) {
        return Ok(Holds::Run);
    }
    let mut other: Vec<String> = names.into_iter().filter(|n| !is_run_entry(n)).collect();
    other.sort();
    other.truncate(3);
    Ok(Holds::Other(other))
}

/// Whether `path` is a manifest cohortmix wrote (earlier versions wrote no `program`).
fn written_by_us(path: &Path) -> bool {
    let Ok(text) = std::fs::read_to_string(path) else {
        return false;
    };
    let Ok(v) = serde_json::from_str::<serde_json::Value>(&text) else {
        return false;
    };
    v.get("program").and_then(|p| p.as_str()) == Some("cohortmix")
        || (v.get("spec_sha256").is_some() && v.get("data_sha256").is_some())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_lone_tilde_is_home_and_a_named_one_is_refused() {
        let home = std::env::var_os("HOME").map(PathBuf::from);
        if let Some(home) = home.filter(|h| !h.as_os_str().is_empty()) {
            assert_eq!(expand_home(Path::new("~/runs/a")).unwrap(), home.join("runs/a"));
            assert_eq!(expand_home(Path::new("~")).unwrap(), home);
        }
        assert!(expand_home(Path::new("~bob/runs")).is_err());
        assert_eq!(expand_home(Path::new("runs/~")).unwrap(), Path::new("runs/~"));
    }

    #[test]
    fn a_root_is_refused() {
        assert!(check(Path::new("/"), Path::new("/"), &[]).is_err());
    }

    #[test]
    fn a_folder_holding_an_input_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let data = dir.path().join("data.csv");
        std::fs::write(&data, "a\n1\n").unwrap();
        let folder = resolved(dir.path()).unwrap();
        assert!(check(&folder, dir.path(), &[&data]).is_err());
        assert!(check(&folder.join("run"), dir.path(), &[&data]).is_ok());
    }
}
