//! Fitting: the search grid over placements × cluster counts, many starts per fit.
//!
//! [`prepare`] builds the design matrices of every placement once (errors point at the
//! placement in the spec). [`fit_cell`] runs all starts of one (placement, cluster count)
//! in parallel, each with its own random stream, and keeps the best usable start; a start
//! that degenerates is recorded with its reason and skipped. [`fit_grid`] does every cell.

pub mod cache;
pub mod em;
pub mod saved;
pub mod starts;
pub mod three_step;

use crate::data::{Dataset, Design};
use crate::error::{Error, Result};
use crate::model::family::{BlockDesigns, Components, CovarianceStructure, Families, Prepared};
use crate::model::gating::Gating;
pub use crate::model::ModelOptions;
use crate::model::{FitData, Model};
use crate::rng::Stream;
use crate::spec::{Placement, Proportions, Study};
use em::{EmRun, EmSettings, Termination};
use rayon::prelude::*;
use starts::StartKind;
use std::sync::Arc;

/// Two log-likelihoods within this relative distance count as the same optimum.
pub const SAME_OPTIMUM: f64 = 1e-6;

/// A placement with its design matrices and its component blocks' arrays built.
#[derive(Debug, Clone)]
pub struct PreparedPlacement {
    /// The placement as validated.
    pub placement: Placement,
    /// Gating design (intercept alone when the placement has no gating covariates).
    pub gating: Design,
    /// The whole component design: every component covariate (each block uses the
    /// columns that act on its indicators).
    pub components: Design,
    /// Each block's arrays, one per indicator set of the data, in block order.
    pub blocks: Vec<Arc<dyn Prepared>>,
    /// The families the blocks were prepared by (to prepare a changed placement again).
    pub families: Families,
    /// For a three-step placement: the design of its gating covariates, used in step 3
    /// (the mixture itself is fitted with `gating` = intercept alone).
    pub step_three: Option<Design>,
}

impl PreparedPlacement {
    /// The design a gating network's coefficients refer to: the step-3 covariates for
    /// the logit of a three-step placement (its mixture has no gating covariates), else
    /// the gating design.
    pub fn design_of(&self, gating: &Gating) -> &Design {
        match (&self.step_three, gating) {
            (Some(d), Gating::Logit { .. }) => d,
            _ => &self.gating,
        }
    }

    /// The design of a fit's reported gating network (see [`FitResult::reported_gating`]):
    /// the step-3 covariates when step 3 succeeded, else the gating design.
    pub fn reported_design(&self, fit: &FitResult) -> &Design {
        match (&self.step_three, &fit.step_three) {
            (Some(d), Some(Ok(_))) => d,
            _ => &self.gating,
        }
    }

    /// Names of the profile values of a fit of this placement, in block order.
    pub fn profile_columns(&self) -> Vec<String> {
        self.blocks.iter().flat_map(|b| b.profile_columns()).collect()
    }

    /// Whether some block uses the covariance structure.
    pub fn uses_structure(&self) -> bool {
        self.blocks
            .iter()
            .any(|b| b.info().reads(crate::spec::FamilyKey::Covariance))
    }

    /// The indicators as numbers for seeding starts by distance (row-major, with its
    /// column count): with one block that holds them row-major already, those values;
    /// else every block's seeding columns side by side.
    pub fn seeding_matrix(&self) -> (std::borrow::Cow<'_, [f64]>, usize) {
        if let [only] = &self.blocks[..] {
            if let Some((y, d)) = only.seeding_rows() {
                return (std::borrow::Cow::Borrowed(y), d);
            }
        }
        let cols: Vec<Vec<f64>> = self.blocks.iter().flat_map(|b| b.seeding_columns()).collect();
        let m = cols.len();
        let n = cols.first().map_or(0, Vec::len);
        let mut out = vec![0.0; n * m];
        for (j, col) in cols.iter().enumerate() {
            for (i, v) in col.iter().enumerate() {
                out[i * m + j] = *v;
            }
        }
        (std::borrow::Cow::Owned(out), m)
    }
}

/// Check the data for every family (the checks of data that is fitted, not scored), then
/// build the designs and block arrays of every placement; a constant or collinear
/// covariate set is an input error pointing at the placement.
pub fn prepare(study: &Study, data: &Dataset, families: &Families) -> Result<Vec<PreparedPlacement>> {
    for set in &data.indicator_sets {
        families.of(set).check(study, set)?;
    }
    study
        .placements
        .iter()
        .map(|p| prepare_placement(study, data, p, families))
        .collect()
}

/// The designs and arrays of one placement (see [`prepare`]).
pub fn prepare_placement(
    study: &Study,
    data: &Dataset,
    p: &Placement,
    families: &Families,
) -> Result<PreparedPlacement> {
    let design = |cols: &[&crate::spec::ColumnRef]| -> Result<Design> {
        let names: Vec<String> = cols.iter().map(|c| c.name.clone()).collect();
        data.design(&names).map_err(|e| {
            let at = cols
                .iter()
                .find(|c| Some(&c.name) == e.covariate.as_ref())
                .or(cols.first());
            let span = at.map_or(0..0, |c| c.span.clone());
            Error::input(study.error_at(span, format!("in placement '{}': {}", p.name, e.message)))
        })
    };
    let components = design(&p.components.iter().collect::<Vec<_>>())?;
    // A design on the component design's covariates shares its values rather than
    // holding a copy (at 10^7 rows an intercept column alone is 80 MB).
    let design_on = |cols: Vec<&crate::spec::ColumnRef>| -> Result<Design> {
        if cols.iter().map(|c| &c.name).eq(p.components.iter().map(|c| &c.name)) {
            Ok(components.clone())
        } else {
            design(&cols)
        }
    };
    let covariates = design_on(p.gating.iter().collect())?;
    if p.method.is_three_step() {
        let gating = design_on(Vec::new())?;
        let mut pp = assemble(data, p, gating, components, families);
        pp.step_three = Some(covariates);
        return Ok(pp);
    }
    Ok(assemble(data, p, covariates, components, families))
}

/// A placement's prepared arrays from its gating design and whole component design: each
/// family prepares its block of the data's indicators.
pub fn assemble(
    data: &Dataset,
    p: &Placement,
    gating: Design,
    components: Design,
    families: &Families,
) -> PreparedPlacement {
    let designs = BlockDesigns {
        placement: p,
        components: &components,
    };
    let blocks = data
        .indicator_sets
        .iter()
        .map(|set| families.of(set).prepare(set, data, &designs))
        .collect();
    PreparedPlacement {
        placement: p.clone(),
        gating,
        components,
        blocks,
        families: families.clone(),
        step_three: None,
    }
}

/// What happened to one start.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct StartRecord {
    /// 1-based start number.
    pub start: usize,
    /// How the start was made.
    pub kind: StartKind,
    /// Final log-likelihood (None when it degenerated).
    pub loglik: Option<f64>,
    /// EM iterations.
    pub iterations: usize,
    /// Why it stopped.
    pub termination: Termination,
}

/// The best start of a fit and how often it was reached.
#[derive(Debug, Clone)]
pub struct BestFit {
    /// The winning run (clusters ordered largest first).
    pub run: EmRun,
    /// 1-based start that produced it.
    pub start: usize,
    /// Starts whose log-likelihood is within [`SAME_OPTIMUM`] (relative) of the best.
    pub reaching: usize,
}

/// One cell of the grid: a placement at one cluster count.
#[derive(Debug, Clone)]
pub struct FitResult {
    /// Index of the placement in the spec.
    pub placement_index: usize,
    /// Placement name.
    pub placement: String,
    /// Cluster count.
    pub clusters: usize,
    /// Covariance structure of the Gaussian components.
    pub structure: CovarianceStructure,
    /// Whether a block uses the structure (else it means nothing).
    pub uses_structure: bool,
    /// Free parameters.
    pub n_params: usize,
    /// Rows used (the n in BIC).
    pub n_rows: usize,
    /// Every start.
    pub starts: Vec<StartRecord>,
    /// The best usable start, if any.
    pub best: Option<BestFit>,
    /// Three-step placements: the step-3 gating effects, or why they failed.
    pub step_three: Option<std::result::Result<three_step::StepThree, String>>,
}

/// The words for a fit's covariance structure, or that there is none.
pub fn covariance_label(structure: &CovarianceStructure, uses_structure: bool) -> String {
    if uses_structure {
        structure.describe()
    } else {
        NO_COVARIANCE.to_string()
    }
}

/// The covariance label of fits without continuous indicators.
pub const NO_COVARIANCE: &str = "no continuous indicators";

impl FitResult {
    /// The covariance structure in words, or that there is none.
    pub fn covariance(&self) -> String {
        covariance_label(&self.structure, self.uses_structure)
    }

    /// How the fit ended: the best start's termination, or why every start failed.
    pub fn termination(&self) -> Termination {
        match &self.best {
            Some(b) => b.run.termination.clone(),
            None => {
                let reason = self
                    .starts
                    .iter()
                    .find_map(|s| s.termination.reason().map(str::to_string))
                    .unwrap_or_else(|| "no start finished".to_string());
                Termination::Degenerate(format!("every start failed; first reason: {reason}"))
            }
        }
    }

    /// Starts that ran to their end: all of them unless the two-stage search set some
    /// aside after the warm-up.
    pub fn finished_starts(&self) -> usize {
        self.starts
            .iter()
            .filter(|s| s.termination != Termination::SetAside)
            .count()
    }

    /// Log-likelihood of the best start.
    pub fn loglik(&self) -> Option<f64> {
        self.best.as_ref().map(|b| b.run.loglik)
    }

    /// BIC = −2 loglik + k ln n (smaller is better).
    pub fn bic(&self) -> Option<f64> {
        self.loglik()
            .map(|l| -2.0 * l + self.n_params as f64 * (self.n_rows as f64).ln())
    }

    /// AIC = −2 loglik + 2k (smaller is better).
    pub fn aic(&self) -> Option<f64> {
        self.loglik().map(|l| -2.0 * l + 2.0 * self.n_params as f64)
    }

    /// The gating network whose effects are reported: the step-3 logit of a three-step
    /// placement, else the fitted one.
    pub fn reported_gating(&self) -> Option<Gating> {
        let best = self.best.as_ref()?;
        match &self.step_three {
            Some(Ok(st)) => Some(Gating::Logit {
                g: self.clusters,
                p: st.gamma.len() / (self.clusters - 1),
                gamma: st.gamma.clone(),
                ridge: 0.0,
                bound_inverse: None,
            }),
            _ => Some(best.run.model.gating.clone()),
        }
    }

    /// The fitted model with the reported gating network (see [`Self::reported_gating`]).
    pub fn reported_model(&self) -> Option<Model> {
        let mut m = self.best.as_ref()?.run.model.clone();
        m.gating = self.reported_gating()?;
        Some(m)
    }

    /// Cluster shares of the best fit (weighted posterior sums over the weight total).
    pub fn shares(&self, weights: &[f64]) -> Option<Vec<f64>> {
        let b = self.best.as_ref()?;
        Some(cluster_shares(&b.run.tau, weights, self.clusters))
    }
}

/// Weighted posterior shares per cluster.
pub fn cluster_shares(tau: &[f64], weights: &[f64], g: usize) -> Vec<f64> {
    let mut sums = vec![0.0; g];
    for (row, c) in tau.chunks_exact(g).zip(weights) {
        for (s, t) in sums.iter_mut().zip(row) {
            *s += c * t;
        }
    }
    let total: f64 = sums.iter().sum();
    sums.iter().map(|s| s / total).collect()
}

/// What every block of a placement's fits shares: the case weights and gating design.
pub fn fit_data<'a>(data: &'a Dataset, prepared: &'a PreparedPlacement) -> FitData<'a> {
    FitData {
        n: data.n(),
        weights: &data.weights,
        w: &prepared.gating.x,
        p: prepared.gating.p(),
    }
}

/// A model with the placement's gating network, a block per prepared block, and empty
/// parameters.
pub fn initial_model(
    fd: &FitData,
    blocks: &[Arc<dyn Prepared>],
    placement: &Placement,
    g: usize,
    options: ModelOptions,
) -> Model {
    let ridge = options.gating_ridge;
    let gating = if g == 1 {
        Gating::Equal { g: 1 }
    } else {
        match &placement.proportions {
            Proportions::Free if fd.p > 1 => Gating::Logit {
                bound_inverse: None,
                g,
                p: fd.p,
                gamma: vec![0.0; (g - 1) * fd.p],
                ridge,
            },
            Proportions::Free => Gating::Free {
                log_pi: vec![-(g as f64).ln(); g],
            },
            Proportions::Equal => Gating::Equal { g },
            Proportions::Fixed(v) => Gating::Fixed {
                log_pi: v.iter().map(|x| x.ln()).collect(),
            },
        }
    };
    let blocks = blocks.iter().map(|b| b.block(fd, g, &options)).collect();
    Model {
        gating,
        components: Components { blocks },
    }
}

/// Label of a start's random stream.
fn stream_label(streams: &str, placement: &str, g: usize, structure: &CovarianceStructure, start: usize) -> String {
    format!("{streams}|{placement}|{g}|{}|{start}", structure.describe())
}

/// Fit one placement at one cluster count from `[search].starts` starts.
pub fn fit_cell(
    study: &Study,
    data: &Dataset,
    prepared: &PreparedPlacement,
    placement_index: usize,
    g: usize,
    structure: CovarianceStructure,
) -> FitResult {
    fit_cell_with(
        study,
        data,
        prepared,
        placement_index,
        g,
        structure,
        "start",
        study.search.starts,
    )
}

/// [`fit_cell`] with the random streams named `<streams>|<placement>|<G>|<structure>|<start>`
/// and `starts` starts (the bootstrap's refits use their own streams).
#[allow(clippy::too_many_arguments)]
pub fn fit_cell_with(
    study: &Study,
    data: &Dataset,
    prepared: &PreparedPlacement,
    placement_index: usize,
    g: usize,
    structure: CovarianceStructure,
    streams: &str,
    starts: usize,
) -> FitResult {
    let fd = fit_data(data, prepared);
    let settings = EmSettings::for_search(&study.search);
    let options = ModelOptions::for_study(study, structure);
    let mut template = initial_model(&fd, &prepared.blocks, &prepared.placement, g, options);
    template.gating.prepare_bound(fd.w, fd.weights);
    let n_starts = if g == 1 { 1 } else { starts };
    let (seeding, seeding_d) = prepared.seeding_matrix();
    // Only the best start's run is kept: at a few million rows every run's
    // responsibilities would not fit in memory together. The winner is the highest
    // objective, the lowest start number on ties, whatever order the starts finish in.
    let best_so_far: std::sync::Mutex<Option<(usize, EmRun)>> = std::sync::Mutex::new(None);
    let run_start = |s: usize, settings: EmSettings| -> EmRun {
        let kind = StartKind::for_start(s, g);
        let mut rng = Stream::new(
            study.seed,
            &stream_label(streams, &prepared.placement.name, g, &structure, s + 1),
        );
        let tau = starts::partition(kind, &seeding, seeding_d, fd.weights, g, &mut rng);
        em::run(&fd, template.clone(), tau, settings)
    };
    let keep = |s: usize, run: EmRun| -> (StartRecord, Option<f64>) {
        let usable = run.termination.usable();
        let record = StartRecord {
            start: s + 1,
            kind: StartKind::for_start(s, g),
            loglik: usable.then_some(run.loglik),
            iterations: run.iterations,
            termination: run.termination.clone(),
        };
        let objective = usable.then_some(run.objective);
        if usable {
            let mut best = best_so_far.lock().expect("no start panics while holding the lock");
            let better = best
                .as_ref()
                .is_none_or(|(i, b)| run.objective > b.objective || (run.objective == b.objective && s < *i));
            if better {
                *best = Some((s, run));
            }
        }
        (record, objective)
    };
    // Two stages: every start runs the warm-up; of those still running then, the
    // `finish_best` highest objectives (lowest start number on ties) run on to the end,
    // each again from its start so that its path is the one a single run takes.
    let warmup = study.search.warmup_iterations;
    let stages = crate::spec::two_stages(n_starts, study.search.finish_best, warmup, settings.max_iterations);
    let first_settings = if stages {
        EmSettings {
            max_iterations: warmup,
            ..settings
        }
    } else {
        settings
    };
    let mut first: Vec<std::result::Result<(StartRecord, Option<f64>), f64>> = (0..n_starts)
        .into_par_iter()
        .map(|s| {
            let run = run_start(s, first_settings);
            if stages && run.termination == Termination::IterationCap {
                Err(run.objective)
            } else {
                Ok(keep(s, run))
            }
        })
        .collect();
    let mut waiting: Vec<(usize, f64)> = first
        .iter()
        .enumerate()
        .filter_map(|(s, r)| r.as_ref().err().map(|o| (s, *o)))
        .collect();
    waiting.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
    waiting.truncate(study.search.finish_best);
    let second: Vec<(usize, (StartRecord, Option<f64>))> = waiting
        .par_iter()
        .map(|&(s, _)| (s, keep(s, run_start(s, settings))))
        .collect();
    for (s, done) in second {
        first[s] = Ok(done);
    }
    // What is still waiting was set aside.
    let runs: Vec<(StartRecord, Option<f64>)> = first
        .into_iter()
        .enumerate()
        .map(|(s, r)| {
            r.unwrap_or_else(|_| {
                let record = StartRecord {
                    start: s + 1,
                    kind: StartKind::for_start(s, g),
                    loglik: None,
                    iterations: warmup,
                    termination: Termination::SetAside,
                };
                (record, None)
            })
        })
        .collect();
    let best = best_so_far
        .into_inner()
        .expect("no start panicked")
        .map(|(i, mut run)| {
            let reaching = runs
                .iter()
                .filter_map(|(_, o)| *o)
                .filter(|o| (o - run.objective).abs() <= SAME_OPTIMUM * run.objective.abs())
                .count();
            order_largest_first(&mut run, &fd, &prepared.placement.proportions);
            BestFit {
                run,
                start: i + 1,
                reaching,
            }
        });
    let step_three = step_three_of(prepared, best.as_ref(), g, &data.weights);
    FitResult {
        step_three,
        placement_index,
        placement: prepared.placement.name.clone(),
        clusters: g,
        structure,
        uses_structure: prepared.uses_structure(),
        n_params: template.n_params(),
        n_rows: fd.n,
        starts: runs.into_iter().map(|(r, _)| r).collect(),
        best,
    }
}

/// Index into `fits` of the chosen fit of each placement: its lowest BIC, at the cluster
/// count `fixed` when one is given.
pub fn chosen_fits(fits: &[FitResult], placements: usize, fixed: Option<usize>) -> Vec<Option<usize>> {
    (0..placements)
        .map(|p| {
            fits.iter()
                .enumerate()
                .filter(|(_, f)| f.placement_index == p && fixed.is_none_or(|g| f.clusters == g))
                .filter_map(|(i, f)| f.bic().map(|b| (i, b)))
                .min_by(|a, b| a.1.total_cmp(&b.1))
                .map(|(i, _)| i)
        })
        .collect()
}

/// Step 3 of a three-step placement's fit (None for other placements and one cluster).
pub fn step_three_of(
    prepared: &PreparedPlacement,
    best: Option<&BestFit>,
    g: usize,
    weights: &[f64],
) -> Option<std::result::Result<three_step::StepThree, String>> {
    match (&prepared.step_three, best) {
        (Some(design), Some(b)) if g > 1 => Some(three_step::estimate(
            prepared.placement.method,
            &b.run.tau,
            g,
            weights,
            design,
        )),
        _ => None,
    }
}

/// Relabel clusters by decreasing weighted size (cluster 1, the gating reference, is
/// the largest). Fixed proportions keep the user's order. The responsibilities are
/// recomputed from the relabelled model rather than permuted, so that they are bit for
/// bit what an E-step of the saved model gives (a softmax sums in cluster order).
fn order_largest_first(run: &mut EmRun, fd: &FitData, proportions: &Proportions) {
    let weights = fd.weights;
    if matches!(proportions, Proportions::Fixed(_)) {
        return;
    }
    let g = run.model.clusters();
    let shares = cluster_shares(&run.tau, weights, g);
    let mut order: Vec<usize> = (0..g).collect();
    order.sort_by(|a, b| shares[*b].total_cmp(&shares[*a]).then(a.cmp(b)));
    if order.iter().enumerate().all(|(i, k)| i == *k) {
        return;
    }
    run.model.permute(&order);
    crate::model::e_step(&run.model, fd, &mut run.tau, None);
}

/// A grid cell to fit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Cell {
    /// Placement index.
    pub placement: usize,
    /// Cluster count.
    pub clusters: usize,
    /// Covariance structure.
    pub structure: CovarianceStructure,
}

/// Every cell of the grid: placements in spec order, then cluster counts ascending, then
/// structures in the spec's order.
pub fn grid(study: &Study) -> Vec<Cell> {
    let mut cells = Vec::new();
    for (i, p) in study.placements.iter().enumerate() {
        for &g in &p.clusters {
            for &structure in &study.search.structures {
                cells.push(Cell {
                    placement: i,
                    clusters: g,
                    structure,
                });
            }
        }
    }
    cells
}

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
    let cells = grid(study);
    let total = cells.len();
    let progress = std::sync::Mutex::new((0, progress));
    let one = |cell: &Cell| {
        let pp = &prepared[cell.placement];
        let key = folder.map(|_| cache::fit_key(study, data, pp, cell.clusters, cell.structure));
        let mut refused = None;
        let found = match (folder.filter(|_| read), &key) {
            (Some(dir), Some(k)) => match cache::load(dir, k, study, data, pp, *cell) {
                cache::Lookup::Found(r) => Some(*r),
                cache::Lookup::Corrupt(why) => {
                    refused = Some(why);
                    None
                }
                cache::Lookup::Missing => None,
            },
            _ => None,
        };
        let reused = found.is_some();
        let mut not_stored = None;
        let result = found.unwrap_or_else(|| {
            let r = fit_cell(study, data, pp, cell.placement, cell.clusters, cell.structure);
            if let (Some(dir), Some(k)) = (folder, &key) {
                if let Err(e) = cache::store(dir, k, &r) {
                    not_stored = Some(format!("{}: {e}", dir.display()));
                }
            }
            r
        });
        let mut guard = progress.lock().expect("no progress report panics");
        let (done, report) = &mut *guard;
        *done += 1;
        report(*done, total, &result, reused);
        CellOutcome {
            result,
            reused,
            refused,
            not_stored,
        }
    };
    let outcomes: Vec<CellOutcome> = if cells_in_parallel(data.n()) {
        cells.par_iter().map(one).collect()
    } else {
        cells.iter().map(one).collect()
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
