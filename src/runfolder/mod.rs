//! The run folder: one run's outputs, replaced as a whole.
//!
//! [`RunFolder::open`] checks where the folder may be ([`place`]) and takes the folder's
//! lock ([`lock`]), so that one run at a time writes it; the fits are cached in its
//! `cache/` as they finish. [`RunFolder::commit`] writes every output into a fresh staging
//! folder beside it, links the cached fits in, lists every file with its SHA-256 in
//! `manifest.json`, and swaps the staging folder with the run folder in one atomic step
//! ([`swap`]). At any instant the folder holds the whole previous run or the whole new one;
//! a failed run leaves the previous one as it was (but for new cache entries); what the
//! previous folder held besides a run's own files (predictions, files put there) is moved
//! aside, never deleted.

pub mod lock;
pub mod place;
pub mod swap;

use crate::error::{Diagnostic, Error, Result};
use crate::pipeline::{Loaded, RunResults};
use crate::render;
use serde::Serialize;
use sha2::{Digest, Sha256};
use std::io::Write;
use std::path::{Path, PathBuf};

/// The files a run writes (`manifest.json` last); a run folder holds these, the charts in
/// `figures/`, `cache/`, and what `predict` wrote (`predictions/`).
pub const FILES: [&str; 8] = [
    "results.json",
    "models.csv",
    "memberships.csv",
    crate::fit::saved::FILE_NAME,
    "summary.md",
    "report.html",
    "table1.csv",
    "manifest.json",
];

/// The outputs of `run` (the comparison's pages only when the run made a comparison).
pub fn outputs<'a>(loaded: &'a Loaded, run: &'a RunResults) -> Result<RunFiles<'a>> {
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
    let saved = serde_json::to_string_pretty(&run.saved).map_err(|e| encode("the fitted models", e))?;
    files.add(crate::fit::saved::FILE_NAME, saved + "\n");
    if let Some(c) = &results.comparison {
        files.add("summary.md", render::document::markdown(results, c));
        let page = render::document::html(results, c);
        for (name, svg) in render::figures::from_report(&page) {
            files.add(&format!("{}/{name}", render::figures::FOLDER), svg);
        }
        files.add("report.html", page);
        files.add("table1.csv", render::csv::table_one_csv(c));
    }
    Ok(files)
}

/// Open the run folder `path` for `loaded` (refusing a busy or foreign folder) and commit
/// the outputs of `run` with `manifest` into it: [`RunFolder::open`], then
/// [`RunFolder::commit`]. (The cache is not used; a run that caches fits opens the folder
/// first and hands its path to the pipeline.)
pub fn write(path: &Path, loaded: &Loaded, run: &RunResults, manifest: Manifest) -> Result<Committed> {
    let study = &loaded.study;
    let (folder, _) = RunFolder::open(
        path,
        &[&study.spec_path, &study.data_path],
        OpenOptions::default(),
        &mut |_| {},
    )?;
    folder.commit(outputs(loaded, run)?, manifest)
}

/// `manifest.json`: what produced the run, every file it wrote with its SHA-256, and
/// timings (the only file that varies between identical runs).
#[derive(Debug, Serialize)]
pub struct Manifest {
    /// Always `cohortmix`: marks the folder as a run folder.
    pub program: &'static str,
    /// Program version.
    pub version: &'static str,
    /// `fit` or `compare`.
    pub command: &'static str,
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
    /// Every other file of the run, in the order written (filled in by
    /// [`RunFolder::commit`]).
    pub files: Vec<FileEntry>,
}

/// A file of the run.
#[derive(Debug, Clone, Serialize, serde::Deserialize, PartialEq, Eq)]
pub struct FileEntry {
    /// Its name in the run folder.
    pub name: String,
    /// Its size in bytes.
    pub bytes: u64,
    /// SHA-256 of its bytes.
    pub sha256: String,
}

/// A function that writes a file's contents as it makes them.
type Writer<'a> = Box<dyn FnOnce(&mut dyn Write) -> std::io::Result<()> + 'a>;

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
    pub fn add_written(&mut self, name: &str, write: impl FnOnce(&mut dyn Write) -> std::io::Result<()> + 'a) {
        self.files.push((name.to_string(), Contents::Written(Box::new(write))));
    }

    /// The names, in order.
    pub fn names(&self) -> Vec<&str> {
        self.files.iter().map(|(n, _)| n.as_str()).collect()
    }
}

/// Bytes passed on to a file and hashed on the way.
struct Hashing<W: Write> {
    inner: W,
    hasher: Sha256,
    bytes: u64,
}

impl<W: Write> Write for Hashing<W> {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        let n = self.inner.write(buf)?;
        self.hasher.update(&buf[..n]);
        self.bytes += n as u64;
        Ok(n)
    }

    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

/// Write `contents` to the new file `path` (created exclusively), synced; its entry.
fn write_new(path: &Path, name: &str, contents: Contents) -> std::io::Result<FileEntry> {
    let file = std::fs::File::create_new(path)?;
    let mut out = Hashing {
        inner: std::io::BufWriter::with_capacity(1 << 16, file),
        hasher: Sha256::new(),
        bytes: 0,
    };
    match contents {
        Contents::Bytes(bytes) => out.write_all(&bytes)?,
        Contents::Written(write) => write(&mut out)?,
    }
    out.flush()?;
    let Hashing { inner, hasher, bytes } = out;
    inner
        .into_inner()
        .map_err(std::io::IntoInnerError::into_error)?
        .sync_all()?;
    Ok(FileEntry {
        name: name.to_string(),
        bytes,
        sha256: crate::numerics::hex(&hasher.finalize()),
    })
}

/// How [`RunFolder::open`] treats a busy or foreign folder.
#[derive(Debug, Clone, Copy, Default)]
pub struct OpenOptions {
    /// Wait for another run writing the folder to finish (else refuse).
    pub wait: bool,
    /// Accept an existing folder that holds other files (they are moved aside at commit).
    pub force: bool,
}

/// What opening a run folder did that the user should hear of.
#[derive(Debug, Default)]
pub struct Opened {
    /// Whether it waited for another run.
    pub waited: bool,
    /// Leftovers of an interrupted earlier run that were cleared or restored.
    pub recovered: Vec<String>,
}

/// A run folder, checked and locked for one run.
#[derive(Debug)]
pub struct RunFolder {
    /// The folder, absolute, links resolved.
    path: PathBuf,
    /// The folder as the user gave it (for messages).
    shown: PathBuf,
    /// Its parent folder (staging folders and the lock file stand there).
    parent: PathBuf,
    /// Its name.
    name: String,
    /// Whether the folder held files that are not a run's (accepted with `--force`).
    foreign: bool,
    /// The lock, held until the run ends.
    _lock: lock::FolderLock,
}

/// What a commit did.
#[derive(Debug)]
pub struct Committed {
    /// The files written, in order (the manifest last).
    pub files: Vec<String>,
    /// Where the previous folder's other files were moved, when it held any.
    pub set_aside: Option<PathBuf>,
}

impl RunFolder {
    /// Check `path` as a run folder for a run whose inputs are `inputs`, take its lock,
    /// clear what an interrupted run left, and make the folder (empty) if it is missing.
    /// `waiting` hears that another run holds the lock, before waiting for it.
    pub fn open(
        path: &Path,
        inputs: &[&Path],
        options: OpenOptions,
        waiting: &mut dyn FnMut(&Path),
    ) -> Result<(RunFolder, Opened)> {
        let shown = path.to_path_buf();
        let expanded = place::expand_home(path)?;
        let folder = place::resolved(&expanded)?;
        place::check(&folder, &shown, inputs)?;
        let (parent, name) = match (folder.parent(), folder.file_name()) {
            (Some(p), Some(n)) => (p.to_path_buf(), n.to_string_lossy().to_string()),
            _ => {
                return Err(Error::input(
                    Diagnostic::new(format!("{} cannot be a run folder", shown.display()))
                        .help("give a folder of its own for the run's files, such as runs/<study>"),
                ))
            }
        };
        std::fs::create_dir_all(&parent).map_err(|e| {
            Error::run(Diagnostic::new(format!(
                "cannot create the folder {}: {e}",
                parent.display()
            )))
        })?;
        let (lock, waited) = lock::FolderLock::take(&parent, &name, &shown, options.wait, waiting)?;
        let recovered = swap::recover(&parent, &name, &folder)?;
        let foreign = match place::holds(&folder)? {
            place::Holds::Nothing | place::Holds::Run => false,
            place::Holds::Other(_) if options.force => true,
            place::Holds::Other(names) => {
                return Err(Error::input(
                    Diagnostic::new(format!(
                        "the run folder {} holds files that are not a cohortmix run ({}{})",
                        shown.display(),
                        names.join(", "),
                        if names.len() == 3 { ", …" } else { "" }
                    ))
                    .help(
                        "give an empty or new folder, or pass --force to use it anyway: its files are then \
                         moved aside to a folder named <folder>.replaced-<time> beside it, never deleted",
                    ),
                ))
            }
        };
        std::fs::create_dir_all(&folder).map_err(|e| {
            Error::run(Diagnostic::new(format!(
                "cannot create the run folder {}: {e}",
                shown.display()
            )))
        })?;
        Ok((
            RunFolder {
                path: folder,
                shown,
                parent,
                name,
                foreign,
                _lock: lock,
            },
            Opened { waited, recovered },
        ))
    }

    /// The folder (absolute); its `cache/` may be written while the lock is held.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Write `files` and `manifest` (listing them) into a staging folder, link the cached
    /// fits in, and swap it with the run folder; the previous run is then removed, or moved
    /// aside when it held other files.
    pub fn commit(self, files: RunFiles, mut manifest: Manifest) -> Result<Committed> {
        let untouched = |what: String| {
            Error::run(Diagnostic::new(what).help(format!(
                "the previous run in {} was left as it was",
                self.shown.display()
            )))
        };
        let stage = swap::staging_folder(&self.parent, &self.name).map_err(|e| {
            untouched(format!(
                "cannot create a staging folder in {}: {e}",
                self.parent.display()
            ))
        })?;
        let mut written = Vec::new();
        for (name, contents) in files.files {
            if let Some((folder, _)) = name.rsplit_once('/') {
                std::fs::create_dir_all(stage.path().join(folder))
                    .map_err(|e| untouched(format!("cannot create {folder} in {}: {e}", stage.path().display())))?;
            }
            let entry = write_new(&stage.path().join(&name), &name, contents)
                .map_err(|e| untouched(format!("cannot write {name} in {}: {e}", stage.path().display())))?;
            written.push(entry);
        }
        manifest.files = written.clone();
        let text = serde_json::to_string_pretty(&manifest)
            .map_err(|e| untouched(format!("cannot encode the manifest: {e}")))?;
        write_new(
            &stage.path().join("manifest.json"),
            "manifest.json",
            Contents::Bytes((text + "\n").into_bytes()),
        )
        .map_err(|e| untouched(format!("cannot write manifest.json in {}: {e}", stage.path().display())))?;
        swap::fault(swap::Step::Staged).map_err(|e| untouched(format!("staging stopped: {e}")))?;
        swap::link_cache(&self.path, stage.path())
            .map_err(|e| untouched(format!("cannot link the cached fits into the staging folder: {e}")))?;
        swap::fault(swap::Step::Linked).map_err(|e| untouched(format!("staging stopped: {e}")))?;
        let old = swap::replace(stage, &self.path, &self.parent, &self.name).map_err(|e| {
            Error::run(Diagnostic::new(format!("cannot put the new run in place: {}", e.what)).help(e.state))
        })?;
        let set_aside = swap::retire(&old, &self.parent, &self.name, self.foreign);
        let mut names: Vec<String> = written.into_iter().map(|f| f.name).collect();
        names.push("manifest.json".into());
        Ok(Committed {
            files: names,
            set_aside,
        })
    }
}

/// Take the lock of the existing run folder `run` (for `predict`, which reads its models
/// and writes into its `predictions/`), waiting for another run with `wait`.
pub fn lock_existing(run: &Path, wait: bool, waiting: &mut dyn FnMut(&Path)) -> Result<lock::FolderLock> {
    let folder = place::resolved(&place::expand_home(run)?)?;
    match (folder.parent(), folder.file_name()) {
        (Some(parent), Some(name)) if folder.is_dir() => {
            Ok(lock::FolderLock::take(parent, &name.to_string_lossy(), run, wait, waiting)?.0)
        }
        _ => Err(Error::input(
            Diagnostic::new(format!("{} is not a folder", run.display())).help(format!(
                "RUN must be a run folder written by `cohortmix fit` or `cohortmix compare` (it holds {})",
                crate::fit::saved::FILE_NAME
            )),
        )),
    }
}

/// Refuse an output file `dest` that is one of `inputs`, a folder, or something other
/// than a regular file (a device, a pipe): writing it would replace what is there.
pub fn check_output_file(dest: &Path, inputs: &[&Path]) -> Result<()> {
    let refuse = |what: String, help: &str| Err(Error::input(Diagnostic::new(what).help(help.to_string())));
    if let Ok(meta) = std::fs::metadata(dest) {
        if meta.is_dir() {
            return refuse(
                format!("the output {} is a folder", dest.display()),
                "give the path of a file (--out FILE)",
            );
        }
        if !meta.is_file() {
            return refuse(
                format!(
                    "the output {} is not a regular file (a device or a pipe)",
                    dest.display()
                ),
                "give the path of a regular file (--out FILE)",
            );
        }
        let dest_real = dest.canonicalize().ok();
        for input in inputs {
            if dest_real.is_some() && input.canonicalize().ok() == dest_real {
                return refuse(
                    format!("the output {} is the input {}", dest.display(), input.display()),
                    "give another output file (--out FILE): the input would be overwritten",
                );
            }
        }
    }
    Ok(())
}

/// Write one file at `dest` whole or not at all: into a fresh temporary file beside it
/// (created exclusively, never through a link), then renamed over `dest`.
pub fn write_file(dest: &Path, contents: impl Into<Vec<u8>>) -> Result<()> {
    let dir = dest
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .map_or_else(|| PathBuf::from("."), Path::to_path_buf);
    let fail = |what: String, e: std::io::Error| {
        Error::run(Diagnostic::new(format!("{what}: {e}")).help(format!("{} was left as it was", dest.display())))
    };
    std::fs::create_dir_all(&dir).map_err(|e| fail(format!("cannot create the folder {}", dir.display()), e))?;
    let name = dest
        .file_name()
        .map_or_else(|| "output".into(), |n| n.to_string_lossy().to_string());
    let prefix = format!(".{name}.");
    let mut builder = tempfile::Builder::new();
    builder.prefix(&prefix).suffix(".partial");
    // Readable by everyone before the umask, like any file the user writes.
    #[cfg(unix)]
    builder.permissions(std::os::unix::fs::PermissionsExt::from_mode(0o666));
    let mut tmp = builder
        .tempfile_in(&dir)
        .map_err(|e| fail(format!("cannot create a temporary file in {}", dir.display()), e))?;
    tmp.write_all(&contents.into())
        .and_then(|()| tmp.as_file().sync_all())
        .map_err(|e| fail(format!("cannot write {}", dest.display()), e))?;
    tmp.persist(dest)
        .map_err(|e| fail(format!("cannot move the new {} into place", dest.display()), e.error))?;
    Ok(())
}
