//! The run folder: every output of a run written together. Files are first written to
//! fresh temporary names in the folder and moved into place at the end, so a failed or
//! interrupted run never leaves a half-written file and never touches the previous run's
//! files before it has succeeded.

use crate::error::{Diagnostic, Error, Result};
use crate::pipeline::{Loaded, RunResults};
use crate::render;
use serde::Serialize;
use std::path::{Path, PathBuf};

/// The files a run writes, in the order they are listed.
pub const FILES: [&str; 7] = [
    "report.html",
    "summary.md",
    "results.json",
    "models.csv",
    "memberships.csv",
    crate::fit::saved::FILE_NAME,
    "manifest.json",
];

/// Write every output of `run` into `folder` (the comparison's pages only when the run
/// made a comparison); returns the files written.
pub fn write(folder: &Path, loaded: &Loaded, run: &RunResults, manifest: &Manifest) -> Result<Vec<PathBuf>> {
    let encode = |what: &str, e: serde_json::Error| Error::run(Diagnostic::new(format!("cannot encode {what}: {e}")));
    let results = &run.results;
    let mut files = RunFiles::default();
    files.add("results.json", render::json::results_json(results));
    files.add("models.csv", render::csv::models_csv(results));
    let sets = render::csv::reported_memberships(&run.fits, &run.reported, &run.numbering.numbers);
    let ids = &loaded.data.ids;
    files.add_written("memberships.csv", move |out| {
        render::csv::write_memberships(out, ids, &sets)
    });
    let manifest = serde_json::to_string_pretty(manifest).map_err(|e| encode("the manifest", e))?;
    files.add("manifest.json", manifest + "\n");
    let saved = serde_json::to_string_pretty(&run.saved).map_err(|e| encode("the fitted models", e))?;
    files.add(crate::fit::saved::FILE_NAME, saved + "\n");
    if let Some(c) = &results.comparison {
        files.add("summary.md", render::document::markdown(results, c));
        files.add("report.html", render::document::html(results, c));
    }
    files.commit(folder)
}

/// `manifest.json`: what produced the run, with timings (the only file that varies).
#[derive(Debug, Serialize)]
pub struct Manifest {
    /// Program version.
    pub version: &'static str,
    /// SHA-256 of the spec text.
    pub spec_sha256: String,
    /// SHA-256 of the data file.
    pub data_sha256: String,
    /// Spec file.
    pub spec_file: String,
    /// Data file.
    pub data_file: String,
    /// Worker threads.
    pub threads: usize,
    /// Fits in the grid.
    pub fits: usize,
    /// Wall time of reading and checking, seconds.
    pub seconds_reading: f64,
    /// Wall time of fitting, seconds.
    pub seconds_fitting: f64,
    /// Wall time of what follows the fits (standard errors, the direct-effect screen,
    /// the cluster-count tests, the comparison), seconds.
    pub seconds_inference: f64,
}

/// A function that writes a file's contents as it makes them.
type Writer<'a> = Box<dyn FnOnce(&mut dyn std::io::Write) -> std::io::Result<()> + 'a>;

/// What a run file holds: its bytes, or the function that writes them.
enum Contents<'a> {
    Bytes(Vec<u8>),
    Written(Writer<'a>),
}

/// Files to write into a run folder, written together.
#[derive(Default)]
pub struct RunFiles<'a> {
    files: Vec<(String, Contents<'a>)>,
}

impl<'a> RunFiles<'a> {
    /// Add a file by name.
    pub fn add(&mut self, name: &str, bytes: impl Into<Vec<u8>>) {
        self.files.push((name.to_string(), Contents::Bytes(bytes.into())));
    }

    /// Add a file whose contents `write` makes as it writes them (large files).
    pub fn add_written(&mut self, name: &str, write: impl FnOnce(&mut dyn std::io::Write) -> std::io::Result<()> + 'a) {
        self.files.push((name.to_string(), Contents::Written(Box::new(write))));
    }

    /// Write every file to a temporary name in `dir`, then rename them all into place.
    /// If any write fails, the temporaries are removed and the old files are untouched.
    pub fn commit(self, dir: &Path) -> Result<Vec<PathBuf>> {
        let fail = |what: String, e: std::io::Error| {
            Error::run(Diagnostic::new(format!("{what}: {e}")).help("the previous run's files were left as they were"))
        };
        std::fs::create_dir_all(dir).map_err(|e| fail(format!("cannot create the run folder {}", dir.display()), e))?;
        // Temporaries are made with fresh names, created exclusively (never following a
        // link someone planted); dropped on failure, they are removed.
        let mut temps: Vec<(tempfile::NamedTempFile, PathBuf)> = Vec::new();
        for (name, contents) in self.files {
            let prefix = format!(".{name}.");
            let mut builder = tempfile::Builder::new();
            builder.prefix(&prefix).suffix(".partial");
            // Readable by everyone before the umask, like any file the user writes
            // (temporary files are otherwise owner-only).
            #[cfg(unix)]
            builder.permissions(std::os::unix::fs::PermissionsExt::from_mode(0o666));
            let made = builder
                .tempfile_in(dir)
                .map_err(|e| fail(format!("cannot create a temporary file in {}", dir.display()), e))?;
            let mut out = std::io::BufWriter::new(made);
            let written = match contents {
                Contents::Bytes(bytes) => std::io::Write::write_all(&mut out, &bytes),
                Contents::Written(write) => write(&mut out),
            };
            let tmp = written
                .and_then(|()| out.into_inner().map_err(std::io::IntoInnerError::into_error))
                .map_err(|e| fail(format!("cannot write {} in {}", name, dir.display()), e))?;
            temps.push((tmp, dir.join(name)));
        }
        let mut done = Vec::new();
        for (tmp, dest) in temps {
            tmp.persist(&dest)
                .map_err(|e| fail(format!("cannot move the new {} into place", dest.display()), e.error))?;
            done.push(dest);
        }
        Ok(done)
    }
}
