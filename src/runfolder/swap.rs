//! Putting a staged run in place of the old one in one step, and clearing what an
//! interrupted swap left.
//!
//! On Linux the staging folder and the run folder are exchanged by one `renameat2` call
//! with `RENAME_EXCHANGE`: atomic, so the path names the whole old run or the whole new
//! one at every instant. Where the file system cannot exchange, the run folder is renamed
//! aside (`.<name>.previous-…`) and the staging folder renamed into place; a crash between
//! the two leaves no folder at the path, and the next run restores the previous one
//! ([`recover`]) before anything else.

use std::path::{Path, PathBuf};

/// A point of the commit at which a test may stop the program ([`fault`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Step {
    /// Every output is written in the staging folder.
    Staged,
    /// The cached fits are linked into it.
    Linked,
    /// Without an atomic exchange: the old run is renamed aside, the new not yet in place.
    MovedAside,
    /// The new run is in place; the old one is not yet removed or moved aside.
    Swapped,
}

impl Step {
    fn word(self) -> &'static str {
        match self {
            Step::Staged => "staged",
            Step::Linked => "linked",
            Step::MovedAside => "moved-aside",
            Step::Swapped => "swapped",
        }
    }
}

/// The environment variable through which tests inject faults into the commit, a
/// comma-separated list of: `<step>` aborts the process at that step (as a kill would),
/// `<step>:fail` makes the step fail with an error, and `no-exchange` makes the swap use
/// two renames. Unset in normal use.
pub const FAULT_VARIABLE: &str = "COHORTMIX_TEST_FAULT";

fn fault_asked(what: &str) -> bool {
    std::env::var(FAULT_VARIABLE).is_ok_and(|v| v.split(',').any(|f| f.trim() == what))
}

/// Stop at `step` when a test asks for it.
pub fn fault(step: Step) -> std::io::Result<()> {
    if fault_asked(step.word()) {
        std::process::abort();
    }
    if fault_asked(&format!("{}:fail", step.word())) {
        return Err(std::io::Error::other(format!("failure injected at '{}'", step.word())));
    }
    Ok(())
}

/// A fresh staging folder beside the run folder `name` in `parent` (a unique name,
/// created exclusively; removed when dropped).
pub fn staging_folder(parent: &Path, name: &str) -> std::io::Result<tempfile::TempDir> {
    let prefix = format!(".{name}.staging-");
    let mut builder = tempfile::Builder::new();
    builder.prefix(&prefix);
    // Readable by everyone before the umask, like any folder the user makes.
    #[cfg(unix)]
    builder.permissions(std::os::unix::fs::PermissionsExt::from_mode(0o777));
    builder.tempdir_in(parent)
}

/// Link every cached fit of `folder/cache` into `stage/cache` (copied where the file
/// system cannot link). Only regular files are taken.
pub fn link_cache(folder: &Path, stage: &Path) -> std::io::Result<()> {
    let from = folder.join(crate::fit::cache::CACHE_DIR);
    let entries = match std::fs::read_dir(&from) {
        Ok(e) => e,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(()),
        Err(e) => return Err(e),
    };
    let to = stage.join(crate::fit::cache::CACHE_DIR);
    std::fs::create_dir(&to)?;
    for entry in entries {
        let entry = entry?;
        if !entry.file_type()?.is_file() {
            continue;
        }
        let (src, dest) = (entry.path(), to.join(entry.file_name()));
        if std::fs::hard_link(&src, &dest).is_err() {
            std::fs::copy(&src, &dest)?;
        }
    }
    Ok(())
}

/// Why a swap failed, and where the runs are.
#[derive(Debug)]
pub struct SwapError {
    /// What failed.
    pub what: String,
    /// Where the previous and new runs are now.
    pub state: String,
}

/// Swap the staging folder `stage` with the run folder `folder` (in `parent`, named
/// `name`); returns where the previous run now is.
pub fn replace(stage: tempfile::TempDir, folder: &Path, parent: &Path, name: &str) -> Result<PathBuf, SwapError> {
    let untouched = |what: String| SwapError {
        what,
        state: format!("the previous run in {} was left as it was", folder.display()),
    };
    let staged = stage.path().to_path_buf();
    let exchange_wanted = !fault_asked("no-exchange");
    if exchange_wanted {
        match exchange(&staged, folder) {
            Ok(()) => {
                // `stage` now names the previous run: keep it for `retire`.
                let _ = stage.keep();
                fault(Step::Swapped).map_err(|e| SwapError {
                    what: e.to_string(),
                    state: format!("the new run is in place; the previous one is in {}", staged.display()),
                })?;
                return Ok(staged);
            }
            Err(Exchange::Unsupported) => {}
            Err(Exchange::Failed(e)) => return Err(untouched(format!("cannot swap in the new run: {e}"))),
        }
    }
    let aside = unique(parent, &format!(".{name}.previous-"));
    std::fs::rename(folder, &aside).map_err(|e| untouched(format!("cannot move the previous run aside: {e}")))?;
    let staged = stage.keep();
    let moved = fault(Step::MovedAside).and_then(|()| std::fs::rename(&staged, folder));
    if let Err(e) = moved {
        let state = match std::fs::rename(&aside, folder) {
            Ok(()) => {
                let _ = std::fs::remove_dir_all(&staged);
                format!("the previous run in {} was left as it was", folder.display())
            }
            Err(_) => format!(
                "the previous run is in {} and the new one in {}; the next run puts the previous one back",
                aside.display(),
                staged.display()
            ),
        };
        return Err(SwapError {
            what: format!("cannot move the new run into place: {e}"),
            state,
        });
    }
    fault(Step::Swapped).map_err(|e| SwapError {
        what: e.to_string(),
        state: format!("the new run is in place; the previous one is in {}", aside.display()),
    })?;
    Ok(aside)
}

enum Exchange {
    Unsupported,
    Failed(std::io::Error),
}

#[cfg(target_os = "linux")]
fn exchange(a: &Path, b: &Path) -> Result<(), Exchange> {
    use rustix::fs::{renameat_with, RenameFlags, CWD};
    use rustix::io::Errno;
    match renameat_with(CWD, a, CWD, b, RenameFlags::EXCHANGE) {
        Ok(()) => Ok(()),
        Err(Errno::INVAL | Errno::NOSYS | Errno::OPNOTSUPP) => Err(Exchange::Unsupported),
        Err(e) => Err(Exchange::Failed(e.into())),
    }
}

#[cfg(not(target_os = "linux"))]
fn exchange(_a: &Path, _b: &Path) -> Result<(), Exchange> {
    Err(Exchange::Unsupported)
}

/// A name beginning with `prefix` in `parent` that nothing has yet.
fn unique(parent: &Path, prefix: &str) -> PathBuf {
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.subsec_nanos());
    (0u32..)
        .map(|i| parent.join(format!("{prefix}{}-{nanos}-{i}", std::process::id())))
        .find(|p| std::fs::symlink_metadata(p).is_err())
        .expect("some name is free")
}

/// Whether the folder holds nothing but a run's own files.
fn only_run_files(folder: &Path) -> bool {
    std::fs::read_dir(folder).is_ok_and(|entries| {
        entries
            .filter_map(|e| e.ok())
            .all(|e| super::place::is_run_entry(&e.file_name().to_string_lossy()))
    })
}

/// Remove the previous run now at `old`, or, when it held other files (or `foreign`: the
/// folder was taken with `--force`), move it to `<name>.replaced-<time>` beside the run
/// folder; returns where it went then.
pub fn retire(old: &Path, parent: &Path, name: &str, foreign: bool) -> Option<PathBuf> {
    if !foreign && only_run_files(old) {
        let _ = std::fs::remove_dir_all(old);
        return None;
    }
    let stamp = utc_stamp(std::time::SystemTime::now());
    let mut dest = parent.join(format!("{name}.replaced-{stamp}"));
    let mut i = 2;
    while std::fs::symlink_metadata(&dest).is_ok() {
        dest = parent.join(format!("{name}.replaced-{stamp}-{i}"));
        i += 1;
    }
    std::fs::rename(old, &dest).ok().map(|()| dest)
}

/// Clear what an interrupted run left beside the run folder `name`: a previous run renamed
/// aside while the folder is missing is put back; unfinished staging folders and previous
/// runs are removed (or moved aside when they hold other files). Returns what was done.
pub fn recover(parent: &Path, name: &str, folder: &Path) -> crate::error::Result<Vec<String>> {
    let staging = format!(".{name}.staging-");
    let previous = format!(".{name}.previous-");
    let Ok(entries) = std::fs::read_dir(parent) else {
        return Ok(Vec::new());
    };
    let mut leftovers: Vec<PathBuf> = entries
        .filter_map(|e| e.ok())
        .filter(|e| {
            let n = e.file_name().to_string_lossy().to_string();
            (n.starts_with(&staging) || n.starts_with(&previous)) && e.file_type().is_ok_and(|t| t.is_dir())
        })
        .map(|e| e.path())
        .collect();
    leftovers.sort();
    let mut done = Vec::new();
    if std::fs::symlink_metadata(folder).is_err() {
        if let Some(at) = leftovers.iter().position(|p| {
            p.file_name()
                .is_some_and(|n| n.to_string_lossy().starts_with(&previous))
        }) {
            let back = leftovers.remove(at);
            std::fs::rename(&back, folder).map_err(|e| {
                crate::error::Error::run(crate::error::Diagnostic::new(format!(
                    "an interrupted run left the previous run in {}, and it cannot be put back in {}: {e}",
                    back.display(),
                    folder.display()
                )))
            })?;
            done.push(format!(
                "put back the previous run, which an interrupted run had left in {}",
                back.display()
            ));
        }
    }
    for left in leftovers {
        match retire(&left, parent, name, false) {
            None => done.push(format!("removed {}, left by an interrupted run", left.display())),
            Some(to) => done.push(format!(
                "moved {}, left by an interrupted run, to {}",
                left.display(),
                to.display()
            )),
        }
    }
    Ok(done)
}

/// `YYYYMMDDTHHMMSSZ` of a time (UTC).
pub fn utc_stamp(t: std::time::SystemTime) -> String {
    let secs = t.duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_secs());
    let (days, rem) = (secs / 86_400, secs % 86_400);
    // Civil date from days since 1970-01-01 (Hinnant's algorithm).
    let z = days as i64 + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}{month:02}{day:02}T{:02}{:02}{:02}Z",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stamps_are_utc_calendar_times() {
        let at = |s: u64| utc_stamp(std::time::UNIX_EPOCH + std::time::Duration::from_secs(s));
        assert_eq!(at(0), "19700101T000000Z");
        // 2000-02-29 12:34:56 UTC (a leap day), and 2026-12-04 00:00:00 UTC.
        assert_eq!(at(951_827_696), "20000229T123456Z");
        assert_eq!(at(1_796_342_400), "20261204T000000Z");
    }
}
