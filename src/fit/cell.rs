//! One cell of the grid: every start of one fit, in parallel, each on its own random
//! stream; the best usable start is kept, relabelled largest cluster first.

use super::em::{self, EmRun, EmSettings, Termination};
use super::starts::{self, StartKind};
use super::{
    cluster_shares, fit_data, initial_model, same_optimum, step_three_of, FitResult, FitSpec, PreparedPlacement,
};
use crate::data::Dataset;
use crate::model::{FitData, Model};
use crate::rng::Stream;
use crate::spec::Proportions;
use rayon::prelude::*;
use std::sync::Mutex;

/// What happened to one start.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize, schemars::JsonSchema)]
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
    /// Starts that ended on the best start's optimum ([`super::same_optimum`]), compared
    /// where the search tolerance stopped them.
    pub reaching: usize,
}

/// Fit one cell of the grid from its starts (see the module documentation).
pub fn fit_cell(spec: &FitSpec, data: &Dataset, prepared: &PreparedPlacement) -> FitResult {
    let fd = fit_data(data, prepared);
    let g = spec.clusters;
    let mut template = initial_model(&fd, &prepared.blocks, &prepared.placement, g, spec.options);
    template.gating.prepare_bound(fd.w, fd.weights);
    let (seeding, seeding_d) = prepared.seeding_matrix();
    let starts = Starts {
        spec,
        fd: &fd,
        template: &template,
        seeding: &seeding,
        seeding_d,
        best: Mutex::new(None),
    };
    let records = starts.run();
    let best = starts.best.lock().expect("no start panicked").take().map(|(i, run)| {
        let reaching = records
            .iter()
            .filter_map(|(_, o)| *o)
            .filter(|o| same_optimum(*o, run.objective))
            .count();
        let mut run = starts.polish(run);
        order_largest_first(&mut run, &fd, &prepared.placement.proportions);
        BestFit {
            run,
            start: i + 1,
            reaching,
        }
    });
    let step_three = step_three_of(prepared, best.as_ref(), g, &data.weights, spec.weight_type);
    FitResult {
        spec: spec.clone(),
        step_three,
        placement_index: spec.placement_index,
        placement: spec.placement.name.clone(),
        clusters: g,
        structure: spec.structure(),
        uses_structure: prepared.uses_structure(),
        n_params: template.n_params(),
        n_rows: fd.n,
        sample_size: data.sample_size,
        starts: records.into_iter().map(|(r, _)| r).collect(),
        best,
    }
}

/// A record of a start and, when it was usable, its objective.
type Outcome = (StartRecord, Option<f64>);

/// The starts of one fit, and the best run so far. Only the best start's run is kept:
/// at a few million rows every run's responsibilities would not fit in memory together.
/// The winner is the highest objective, the lowest start number on ties, whatever order
/// the starts finish in.
struct Starts<'a> {
    spec: &'a FitSpec,
    fd: &'a FitData<'a>,
    template: &'a Model,
    seeding: &'a [f64],
    seeding_d: usize,
    best: Mutex<Option<(usize, EmRun)>>,
}

impl Starts<'_> {
    /// The best start run on to the polish tolerance (its iterations and trace continued),
    /// when it converged at the search tolerance. A polish that does not converge within
    /// the iteration cap (counted afresh), ends spurious, or ends lower leaves the run as it
    /// was.
    fn polish(&self, run: EmRun) -> EmRun {
        let search = &self.spec.search;
        if !(search.polish_tolerance < search.em.tolerance) || run.termination != Termination::Converged {
            return run;
        }
        let settings = EmSettings {
            tolerance: search.polish_tolerance,
            ..search.em
        };
        let mut polished = em::run(self.fd, run.model.clone(), run.tau.clone(), settings);
        let spurious = search.spurious_guard && spurious(&polished, self.fd).is_some();
        if polished.termination != Termination::Converged || spurious || polished.objective < run.objective {
            return run;
        }
        polished.iterations += run.iterations;
        polished.gating_damped += run.gating_damped;
        polished.gating_fallbacks += run.gating_fallbacks;
        polished.gating_failed += run.gating_failed;
        let mut trace = run.trace;
        trace.extend(polished.trace);
        polished.trace = trace;
        polished
    }

    /// Start `s` (0-based) from its partition with `settings`.
    fn run_start(&self, s: usize, settings: EmSettings) -> EmRun {
        let g = self.spec.clusters;
        let kind = StartKind::for_start(s, g);
        let mut rng = Stream::new(self.spec.seed, &self.spec.stream_label(s + 1));
        let tau = starts::partition(kind, self.seeding, self.seeding_d, self.fd.weights, g, &mut rng);
        em::run(self.fd, self.template.clone(), tau, settings)
    }

    /// Record a finished start, keeping its run when it is the best so far. A usable
    /// start that ended at a spurious solution is recorded as such and never kept.
    fn keep(&self, s: usize, mut run: EmRun) -> Outcome {
        if self.spec.search.spurious_guard && run.termination.usable() {
            if let Some(why) = spurious(&run, self.fd) {
                run.termination = Termination::Spurious(why);
            }
        }
        let usable = run.termination.usable();
        let record = StartRecord {
            start: s + 1,
            kind: StartKind::for_start(s, self.spec.clusters),
            loglik: usable.then_some(run.loglik),
            iterations: run.iterations,
            termination: run.termination.clone(),
        };
        let objective = usable.then_some(run.objective);
        if usable {
            let mut best = self.best.lock().expect("no start panics while holding the lock");
            let better = best
                .as_ref()
                .is_none_or(|(i, b)| run.objective > b.objective || (run.objective == b.objective && s < *i));
            if better {
                *best = Some((s, run));
            }
        }
        (record, objective)
    }

    /// Every start, in start order. With two stages, every start runs the warm-up; of
    /// those still running then, the `finish_best` highest objectives (lowest start number
    /// on ties) run on to the end, each again from its start so that its path is the one
    /// a single run takes; the others are set aside.
    fn run(&self) -> Vec<Outcome> {
        let search = &self.spec.search;
        let g = self.spec.clusters;
        let stages = search.stages_for(g);
        let settings = search.em;
        let first_settings = match stages {
            Some(t) => EmSettings {
                max_iterations: t.warmup_iterations,
                ..settings
            },
            None => settings,
        };
        let mut first: Vec<Result<Outcome, f64>> = (0..search.starts_for(g))
            .into_par_iter()
            .map(|s| {
                let run = self.run_start(s, first_settings);
                if stages.is_some() && run.termination == Termination::IterationCap {
                    Err(run.objective)
                } else {
                    Ok(self.keep(s, run))
                }
            })
            .collect();
        let mut waiting: Vec<(usize, f64)> = first
            .iter()
            .enumerate()
            .filter_map(|(s, r)| r.as_ref().err().map(|o| (s, *o)))
            .collect();
        waiting.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
        waiting.truncate(stages.map_or(0, |t| t.finish_best));
        let second: Vec<(usize, Outcome)> = waiting
            .par_iter()
            .map(|&(s, _)| (s, self.keep(s, self.run_start(s, settings))))
            .collect();
        for (s, done) in second {
            first[s] = Ok(done);
        }
        first
            .into_iter()
            .enumerate()
            .map(|(s, r)| r.unwrap_or_else(|_| self.set_aside(s)))
            .collect()
    }

    /// The record of a start set aside after the warm-up.
    fn set_aside(&self, s: usize) -> Outcome {
        let record = StartRecord {
            start: s + 1,
            kind: StartKind::for_start(s, self.spec.clusters),
            loglik: None,
            iterations: self.spec.search.two_stages.map_or(0, |t| t.warmup_iterations),
            termination: Termination::SetAside,
        };
        (record, None)
    }
}

/// Why a run's model looks spurious (a block's [`crate::model::family::Block::spurious`]),
/// or None.
fn spurious(run: &EmRun, fd: &FitData) -> Option<String> {
    let g = run.model.clusters();
    let mut sizes = vec![0.0; g];
    for (row, c) in run.tau.chunks_exact(g).zip(fd.weights) {
        for (s, t) in sizes.iter_mut().zip(row) {
            *s += c * t;
        }
    }
    run.model.components.blocks.iter().find_map(|b| b.spurious(fd, &sizes))
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
