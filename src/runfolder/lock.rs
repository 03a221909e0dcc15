//! One run at a time per run folder: an advisory lock on a file beside the folder
//! (`.<name>.lock` in its parent; the folder itself is swapped, so the lock cannot live in
//! it). The lock is the operating system's (`flock` on Unix), released when the process
//! ends however it ends, so a killed run never leaves the folder locked.

use crate::error::{Diagnostic, Error, Result};
use std::fs::{File, TryLockError};
use std::path::{Path, PathBuf};

/// The lock of one run folder, held while the value lives.
#[derive(Debug)]
pub struct FolderLock {
    _file: File,
    /// The lock file.
    pub path: PathBuf,
}

impl FolderLock {
    /// The lock file of the run folder `name` in `parent`.
    pub fn file(parent: &Path, name: &str) -> PathBuf {
        parent.join(format!(".{name}.lock"))
    }

    /// Take the lock of the run folder `name` in `parent` (shown as `shown`). When another
    /// run holds it: with `wait`, call `waiting` and wait for it; else refuse.
    pub fn take(
        parent: &Path,
        name: &str,
        shown: &Path,
        wait: bool,
        waiting: &mut dyn FnMut(&Path),
    ) -> Result<(FolderLock, bool)> {
        let path = Self::file(parent, name);
        let file = std::fs::OpenOptions::new()
            .create(true)
            .truncate(false)
            .write(true)
            .open(&path)
            .map_err(|e| {
                Error::run(Diagnostic::new(format!(
                    "cannot open the lock file {} of the run folder {}: {e}",
                    path.display(),
                    shown.display()
                )))
            })?;
        let waited = match file.try_lock() {
            Ok(()) => false,
            Err(TryLockError::WouldBlock) if wait => {
                waiting(shown);
                file.lock()
                    .map_err(|e| Error::run(Diagnostic::new(format!("cannot lock {}: {e}", path.display()))))?;
                true
            }
            Err(TryLockError::WouldBlock) => {
                return Err(Error::run(
                    Diagnostic::new(format!(
                        "another cohortmix run is writing the run folder {} (it holds {})",
                        shown.display(),
                        path.display()
                    ))
                    .help("wait for it to finish, pass --wait to start when it has, or give another folder (--out)"),
                ))
            }
            Err(TryLockError::Error(e)) => {
                return Err(Error::run(Diagnostic::new(format!(
                    "cannot lock {}: {e}",
                    path.display()
                ))))
            }
        };
        Ok((FolderLock { _file: file, path }, waited))
    }
}
