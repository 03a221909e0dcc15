//! The grid: every fit of a study, each looked up in the cache first and stored as soon as
//! it is done, so a rerun refits only what changed and a killed run resumes where it
//! stopped.

use super::{cache, fit_cell, plan, FitResult, FitSpec, PreparedPlacement};
use crate::data::Dataset;
use crate::spec::Study;
use rayon::prelude::*;

/// Fit every cell; `progress` is called after each cell with (done, total, result).
pub fn fit_grid(
    study: &Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    mut progress: impl FnMut(usize, usize, &FitResult) + Send,
) -> Vec<FitResult> {
    fit_grid_cached(study, data, prepared, None, false, |done, total, r, _| {
        progress(done, total, r)
    })
    .0
}

/// How the cache served a run.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct CacheUse {
    /// Fits taken from the cache.
    pub reused: usize,
    /// Fits computed.
    pub fitted: usize,
    /// Entries refused (bad checksum or contents) and refitted, with the reason.
    pub refused: Vec<String>,
    /// Entries that could not be written (the run goes on; the next one refits them).
    pub not_stored: Vec<String>,
}

/// Whether the cells of a grid are fitted in parallel, besides their starts: when a
/// pass over the rows is a single task, rows cannot share the threads, and a cell's
/// last starts would leave threads idle until the next cell begins. Results do not
/// depend on it (each start has its own stream); with more rows, cells run one after
/// the other so that only the running starts hold responsibilities.
pub fn cells_in_parallel(n: usize) -> bool {
    n <= crate::model::rows::TASK_ROWS
}

/// One cell of [`fit_grid_cached`]: its result, whether it came from the cache, a refused
/// entry's reason, and why it could not be stored.
struct CellOutcome {
    result: FitResult,
    reused: bool,
    refused: Option<String>,
    not_stored: Option<String>,
}

/// [`fit_grid`] with a fit cache in `folder` (None: no cache). Each fit is looked up
/// first (unless `read` is false: refit everything) and stored as soon as it is done, so
/// a killed run resumes where it stopped. `progress` gets (done, total, result, whether
/// it came from the cache) as each cell finishes; with few rows cells run in parallel
/// ([`cells_in_parallel`]) and finish in any order, but the results are in grid order.
pub fn fit_grid_cached(
    study: &Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    folder: Option<&std::path::Path>,
    read: bool,
    progress: impl FnMut(usize, usize, &FitResult, bool) + Send,
) -> (Vec<FitResult>, CacheUse) {
    let specs = plan(study, data);
    let total = specs.len();
    let progress = std::sync::Mutex::new((0, progress));
    let one = |spec: &FitSpec| {
        let outcome = fit_or_reuse(spec, data, &prepared[spec.placement_index], folder, read);
        let mut guard = progress.lock().expect("no progress report panics");
        let (done, report) = &mut *guard;
        *done += 1;
        report(*done, total, &outcome.result, outcome.reused);
        outcome
    };
    let outcomes: Vec<CellOutcome> = if cells_in_parallel(data.n()) {
        specs.par_iter().map(one).collect()
    } else {
        specs.iter().map(one).collect()
    };
    let mut usage = CacheUse::default();
    let mut out = Vec::with_capacity(total);
    for o in outcomes {
        if o.reused {
            usage.reused += 1;
        } else {
            usage.fitted += 1;
        }
        usage.refused.extend(o.refused);
        usage.not_stored.extend(o.not_stored);
        out.push(o.result);
    }
    (out, usage)
}

/// One fit: from the cache in `folder` when it holds it (and `read`), else fitted and
/// stored there.
fn fit_or_reuse(
    spec: &FitSpec,
    data: &Dataset,
    pp: &PreparedPlacement,
    folder: Option<&std::path::Path>,
    read: bool,
) -> CellOutcome {
    let key = spec.key();
    let mut refused = None;
    let found = match folder.filter(|_| read) {
        Some(dir) => match cache::load(dir, &key, spec, data, pp) {
            cache::Lookup::Found(r) => Some(*r),
            cache::Lookup::Corrupt(why) => {
                refused = Some(why);
                None
            }
            cache::Lookup::Missing => None,
        },
        None => None,
    };
    let reused = found.is_some();
    let mut not_stored = None;
    let result = found.unwrap_or_else(|| {
        let r = fit_cell(spec, data, pp);
        if let Some(dir) = folder {
            if let Err(e) = cache::store(dir, &key, &r) {
                not_stored = Some(format!("{}: {e}", dir.display()));
            }
        }
        r
    });
    CellOutcome {
        result,
        reused,
        refused,
        not_stored,
    }
}
