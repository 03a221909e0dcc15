//! One run of a study, computed once: every fit of the grid (through the cache), the
//! standard errors and effects of the compared fits, the direct-effect screen, the
//! bootstrap cluster-count test and the placement comparison, and the output types the
//! renderers read ([`output`]). Nothing here prints or writes a file; an [`Observer`]
//! hears of progress.
//!
//! ```no_run
//! use cohortmix::model::family::Families;
//! use cohortmix::pipeline::{self, Cache, Mode, Quiet};
//! let loaded = pipeline::load(std::path::Path::new("configs/demo.toml"), &Families::standard()).unwrap();
//! let run = pipeline::run(&loaded, Mode::Compare, Cache::none(), &mut Quiet).unwrap();
//! println!("{} fits", run.fits.len());
//! ```

pub mod output;

use crate::compare::{compare, number_clusters, InferenceInput, Numbering};
use crate::data::Dataset;
use crate::error::{Diagnostic, Error, Result};
use crate::fit::chosen_fits;
use crate::fit::saved::SavedRun;
use crate::fit::{self, CacheUse, FitResult, PreparedPlacement};
use crate::inference::{self, FitInference};
use crate::model::family::Families;
use crate::spec::{ErrorMethod, Study};
use std::path::Path;
use std::time::Instant;

/// What a run computes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mode {
    /// The fits, with the standard errors of each placement's chosen fit.
    Fit,
    /// The fits and the comparison of the placements (screen and cluster-count test too).
    Compare,
}

/// Where finished fits are cached.
#[derive(Debug, Clone, Copy)]
pub struct Cache<'a> {
    /// The run folder holding the cache (None: no cache).
    pub folder: Option<&'a Path>,
    /// Whether cached fits are read (false: refit everything, and store the new fits).
    pub read: bool,
}

impl Cache<'static> {
    /// No cache.
    pub fn none() -> Cache<'static> {
        Cache {
            folder: None,
            read: false,
        }
    }
}

/// A stage of a run that takes a while.
#[derive(Debug, Clone, PartialEq)]
pub enum Stage<'a> {
    /// Every fit is done; how the cache served them.
    Fitted(&'a CacheUse),
    /// Standard errors of the compared fits begin.
    StandardErrors {
        /// How they are computed.
        method: ErrorMethod,
        /// Fits whose standard errors are computed.
        fits: usize,
    },
    /// The direct-effect screen begins.
    Screen,
    /// The bootstrap test of the cluster counts begins.
    ClusterCountTest {
        /// Replicates.
        replicates: usize,
    },
}

/// Hears of a run's progress.
pub trait Observer: Send {
    /// A fit is done (`done` of `total`), from the cache or fitted.
    fn fitted(&mut self, done: usize, total: usize, fit: &FitResult, reused: bool);
    /// A stage begins (or, for [`Stage::Fitted`], the fits ended).
    fn stage(&mut self, stage: Stage);
}

/// An observer that ignores everything.
pub struct Quiet;

impl Observer for Quiet {
    fn fitted(&mut self, _done: usize, _total: usize, _fit: &FitResult, _reused: bool) {}
    fn stage(&mut self, _stage: Stage) {}
}

/// A study read, its data checked and its placements prepared.
#[derive(Debug)]
pub struct Loaded {
    /// The validated spec.
    pub study: Study,
    /// The rows used.
    pub data: Dataset,
    /// Each placement's designs and block arrays.
    pub prepared: Vec<PreparedPlacement>,
}

/// Read and validate a spec, read its data, prepare every placement, and check that
/// every fit has fewer parameters than rows.
pub fn load(spec_path: &Path, families: &Families) -> Result<Loaded> {
    let study = crate::spec::load(spec_path, &families.infos())?;
    let data = crate::data::load(&study)?;
    let prepared = fit::prepare(&study, &data, families)?;
    fit::check_rows(&study, &data, &prepared)?;
    Ok(Loaded { study, data, prepared })
}

/// Everything a run computed.
#[derive(Debug)]
pub struct RunResults {
    /// The output types of `results.json` (with the comparison after [`Mode::Compare`]).
    pub results: output::Results,
    /// Every fit of the grid, in grid order.
    pub fits: Vec<FitResult>,
    /// The standard errors and effects of the compared fits (indexed as the fits).
    pub inference: Vec<Option<FitInference>>,
    /// How the cache served the fits.
    pub cache: CacheUse,
    /// The number of every fit's clusters in every file ([`Numbering`]).
    pub numbering: Numbering,
    /// The fits the run reports, one per placement (in placement order): the compared fits
    /// after [`Mode::Compare`], each placement's lowest-BIC fit after [`Mode::Fit`]. Their
    /// memberships are written, and their models saved.
    pub reported: Vec<usize>,
    /// The models `predict` reads (the reported fits).
    pub saved: SavedRun,
    /// Wall time of fitting, seconds.
    pub seconds_fitting: f64,
    /// Wall time of the inference and comparison, seconds.
    pub seconds_inference: f64,
}

/// Run a loaded study (see the module documentation).
pub fn run(loaded: &Loaded, mode: Mode, cache: Cache, observer: &mut dyn Observer) -> Result<RunResults> {
    let Loaded { study, data, prepared } = loaded;
    let clock = Instant::now();
    let (fits, usage) = fit::fit_grid_cached(
        study,
        data,
        prepared,
        cache.folder,
        cache.read,
        |done, total, r, reused| observer.fitted(done, total, r, reused),
    );
    if fits.iter().all(|f| f.best.is_none()) {
        return Err(no_usable_fit(&fits));
    }
    observer.stage(Stage::Fitted(&usage));
    let seconds_fitting = clock.elapsed().as_secs_f64();
    let clock = Instant::now();
    // The fits the comparison shows, and those with the lowest BIC (memberships.csv).
    let shown: Vec<usize> = chosen_fits(&fits, prepared.len(), study.compare.clusters)
        .into_iter()
        .flatten()
        .collect();
    let mut compared: Vec<usize> = chosen_fits(&fits, prepared.len(), None)
        .into_iter()
        .flatten()
        .chain(shown.iter().copied())
        .collect();
    compared.sort_unstable();
    compared.dedup();
    observer.stage(Stage::StandardErrors {
        method: study.inference.method,
        fits: compared.len(),
    });
    let inference = inference::for_fits(study, data, prepared, &fits, &compared);
    let (numbering, reported) = match mode {
        Mode::Compare => (
            number_clusters(data, prepared.len(), &fits, &study.compare),
            shown.clone(),
        ),
        Mode::Fit => (
            Numbering::as_fitted(&fits),
            chosen_fits(&fits, prepared.len(), None).into_iter().flatten().collect(),
        ),
    };
    let mut results = output::results(study, data, prepared, &fits, &inference, &numbering);
    if mode == Mode::Compare {
        let (screen, cluster_tests) = screen_and_count_tests(loaded, &fits, &shown, observer);
        let input = InferenceInput {
            per: &study.inference.per,
            by_fit: &inference,
            screen: &screen,
            cluster_tests: &cluster_tests,
            words: &study.words,
        };
        results.comparison = Some(compare(data, prepared, &fits, &numbering, &study.compare, input));
    }
    let saved = fit::saved::save(study, data, prepared, &fits, &reported, &numbering.numbers);
    Ok(RunResults {
        results,
        fits,
        inference,
        cache: usage,
        numbering,
        reported,
        saved,
        seconds_fitting,
        seconds_inference: clock.elapsed().as_secs_f64(),
    })
}

/// The direct-effect screen and the bootstrap cluster-count test of the shown fits, when
/// the spec asks for them.
fn screen_and_count_tests(
    loaded: &Loaded,
    fits: &[FitResult],
    shown: &[usize],
    observer: &mut dyn Observer,
) -> (
    Vec<inference::screen::DirectEffectTest>,
    Vec<inference::cluster_test::ClusterCountTest>,
) {
    let Loaded { study, data, prepared } = loaded;
    let screen = if study.inference.direct_effect_screen {
        observer.stage(Stage::Screen);
        inference::screen::screen(study, data, prepared, fits, shown)
    } else {
        Vec::new()
    };
    let replicates = study.inference.cluster_count_replicates;
    let cluster_tests = if replicates > 0 {
        observer.stage(Stage::ClusterCountTest { replicates });
        inference::cluster_test::test(study, data, prepared, fits, shown, replicates)
    } else {
        Vec::new()
    };
    (screen, cluster_tests)
}

/// The error of a run in which no fit gave a usable model.
fn no_usable_fit(fits: &[FitResult]) -> Error {
    let first = fits.first().map(|f| f.termination());
    Error::run(
        Diagnostic::new(format!(
            "no fit gave a usable model: every start of all {} fits failed (first: {})",
            fits.len(),
            first.as_ref().and_then(|t| t.reason()).unwrap_or("no reason recorded")
        ))
        .help("the previous run's files were left as they were")
        .help("look at the data for outliers or duplicated rows, fit fewer clusters, or set [search] covariance_prior = true or a variance_floor"),
    )
}
