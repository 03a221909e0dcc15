//! The EM loop for one start.
//!
//! From starting responsibilities: M-step, E-step, repeat. It stops when the relative
//! change of the objective (log-likelihood minus any gating ridge penalty) falls below the
//! tolerance, at the iteration cap, when a cluster degenerates, or when the
//! log-likelihood stops being finite. Why it stopped is part of the result.

use crate::model::gating::{Gating, GatingStats};
use crate::model::{e_step_sums, e_step_with, FitData, GatingUpdate, GaussianStats, Model};
use serde::Serialize;

/// Why a start stopped.
#[derive(Debug, Clone, PartialEq, Serialize, serde::Deserialize, schemars::JsonSchema)]
#[serde(tag = "status", content = "reason", rename_all = "snake_case")]
pub enum Termination {
    /// Relative objective change below the tolerance.
    Converged,
    /// The iteration cap was reached first.
    IterationCap,
    /// A cluster could not be estimated; the reason names it.
    Degenerate(String),
    /// The log-likelihood became NaN or infinite.
    NumericalFault(String),
    /// Still running after the warm-up but not among the best starts then, so not run
    /// further (see [`crate::spec::Search::finish_best`]).
    SetAside,
    /// Ended at a spurious solution: a cluster that fits a few rows too closely (see
    /// [`crate::spec::Search::spurious_guard`]); the reason names it. Never chosen.
    Spurious(String),
}

impl Termination {
    /// Whether the start produced a usable fit.
    pub fn usable(&self) -> bool {
        matches!(self, Termination::Converged | Termination::IterationCap)
    }

    /// Short words for tables.
    pub fn word(&self) -> &'static str {
        match self {
            Termination::Converged => "converged",
            Termination::IterationCap => "iteration cap",
            Termination::Degenerate(_) => "degenerate",
            Termination::NumericalFault(_) => "numerical fault",
            Termination::SetAside => "set aside",
            Termination::Spurious(_) => "spurious",
        }
    }

    /// The reason, for degenerate and faulty starts.
    pub fn reason(&self) -> Option<&str> {
        match self {
            Termination::Degenerate(r) | Termination::NumericalFault(r) | Termination::Spurious(r) => Some(r),
            _ => None,
        }
    }
}

/// A tolerance that never counts as converged: the loop runs to the iteration cap
/// (benchmarks compare fixed numbers of iterations).
pub const NEVER_STOP_EARLY: f64 = -1.0;

/// Settings of the loop.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct EmSettings {
    /// Iteration cap.
    pub max_iterations: usize,
    /// Relative objective change that counts as converged.
    pub tolerance: f64,
    /// Whether every two EM steps are extrapolated (squared extrapolation; see [`run`]).
    pub accelerate: bool,
}

impl EmSettings {
    /// The settings a study's search gives every start.
    pub fn for_search(search: &crate::spec::Search) -> EmSettings {
        EmSettings {
            max_iterations: search.max_iterations,
            tolerance: search.tolerance,
            accelerate: search.accelerate,
        }
    }
}

/// The outcome of one start.
#[derive(Debug, Clone)]
pub struct EmRun {
    /// Final parameters. After a degenerate or faulty stop they are not usable.
    pub model: Model,
    /// Responsibilities under `model`, n×G (after a usable stop; see
    /// [`Model::steps_from_sums`] for why they may lag behind otherwise).
    pub tau: Vec<f64>,
    /// Weighted log-likelihood under `model`.
    pub loglik: f64,
    /// Log-likelihood minus the gating penalty: what EM increases.
    pub objective: f64,
    /// Objective after each iteration.
    pub trace: Vec<f64>,
    /// EM iterations done.
    pub iterations: usize,
    /// Why it stopped.
    pub termination: Termination,
    /// Gating M-steps whose Hessian could not be solved (possible separation).
    pub gating_damped: usize,
    /// Iterations redone with the safe bound step because the Newton step lowered the
    /// log-likelihood.
    pub gating_fallbacks: usize,
    /// Gating M-steps whose Newton step failed: its line search, or (where the step
    /// stops on a singular Hessian rather than damping it, counted in `gating_damped`)
    /// a singular Hessian.
    pub gating_failed: usize,
}

/// Growth of the longest extrapolation step after it is taken (and its shrinkage after
/// it fails). The usual factor is 4 (from memory); on the demo study 2 took 13% fewer
/// passes over the rows and left no start at a lower optimum (`docs/performance.md`).
const STEP_GROWTH: f64 = 2.0;

/// Relative change of the objective in one EM step below which steps are extrapolated.
/// Early steps move far and, stretched, can cross into another optimum's basin: on the
/// iris data with four clusters, 20 of 60 starts ended elsewhere than plain EM's when
/// extrapolated from their first steps, and none from this point on
/// (`docs/performance.md`).
const SETTLED: f64 = 1e-4;

/// Run EM from starting responsibilities `tau` (n×G, rows summing to 1).
///
/// With `settings.accelerate`, once an EM step changes the objective by at most
/// [`SETTLED`] of its size, every two EM steps θ₀ → θ₁ → θ₂ are extrapolated along the
/// squared-extrapolation path of Varadhan & Roland (2008, their third step length). With
/// r = θ₁ − θ₀, v = θ₂ − 2θ₁ + θ₀ and α = |r|/|v| (at least 1, at most a bound that
/// doubles when a step of that length is taken and halves when one fails), the loop
/// moves to θ′ = (1 − α)²θ₀ + 2α(1 − α)θ₁ + α²θ₂ ([`Model::coordinates`]) only if the
/// objective there is at least that at θ₂, and then takes one EM step from θ′, which puts
/// the parameters back into their model (a covariance structure, for example) and is
/// kept only if it also ends at least as high as θ₂. So every iteration's objective is at
/// least the one before, and every iteration is an EM step; the stopping rule is the
/// same as without extrapolation.
pub fn run(data: &FitData, model: Model, tau: Vec<f64>, settings: EmSettings) -> EmRun {
    let mut em = Walk::new(*data, model, tau);
    // Coordinates of the models since the last extrapolation, from one with its E-step
    // done.
    let mut recent: Vec<Vec<f64>> = Vec::new();
    let mut step_max = 1.0_f64;
    let mut iteration = 0;
    while iteration < settings.max_iterations {
        if settings.accelerate && recent.is_empty() && em.have_stats && em.settled() {
            recent.push(em.model.coordinates());
        }
        let previous = em.objective;
        if let Err(t) = em.step(iteration + 1) {
            return em.finish(iteration, t);
        }
        iteration += 1;
        if em.converged(previous, iteration, settings.tolerance) {
            return em.finish(iteration, Termination::Converged);
        }
        if !settings.accelerate || recent.is_empty() {
            continue;
        }
        recent.push(em.model.coordinates());
        if recent.len() < 3 || iteration >= settings.max_iterations {
            continue;
        }
        let (alpha, outcome) = em.extrapolate(&recent, step_max, iteration + 1);
        recent.clear();
        if let Jump::Moved(there) = outcome {
            iteration += 1;
            if em.converged(there, iteration, settings.tolerance) {
                return em.finish(iteration, Termination::Converged);
            }
        }
        if alpha == step_max {
            step_max = match outcome {
                Jump::Rejected => (step_max / STEP_GROWTH).max(1.0),
                Jump::Moved(_) | Jump::Short => step_max * STEP_GROWTH,
            };
        }
    }
    em.finish(settings.max_iterations, Termination::IterationCap)
}

/// What became of an extrapolation.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Jump {
    /// The step length came out as 1: θ′ = θ₂, the loop stays.
    Short,
    /// The loop moved to θ′ (objective given) and took its stabilising EM step.
    Moved(f64),
    /// θ′ or the step from it was worse than θ₂, or not a model: the loop stays at θ₂.
    Rejected,
}

/// The loop's state: the model, the E-step's results under it, and double buffers that
/// let the next E-step be written while the current one stays intact.
struct Walk<'a> {
    data: FitData<'a>,
    /// Whether the M-step runs from the E-step's sums alone; the iterations then keep no
    /// responsibilities, which are made once, for the final parameters.
    from_sums: bool,
    logit: bool,
    model: Model,
    tau: Vec<f64>,
    tau_next: Vec<f64>,
    stats: GatingStats,
    stats_next: GatingStats,
    sums: GaussianStats,
    sums_next: GaussianStats,
    /// Whether `stats` and `sums` belong to `model` (false before the first M-step).
    have_stats: bool,
    trace: Vec<f64>,
    loglik: f64,
    objective: f64,
    damped: usize,
    fallbacks: usize,
    failed: usize,
}

impl<'a> Walk<'a> {
    fn new(data: FitData<'a>, model: Model, tau: Vec<f64>) -> Walk<'a> {
        let from_sums = model.steps_from_sums();
        let logit = matches!(model.gating, Gating::Logit { .. });
        Walk {
            data,
            from_sums,
            logit,
            model,
            tau_next: if from_sums { Vec::new() } else { vec![0.0; tau.len()] },
            tau,
            stats: GatingStats::default(),
            stats_next: GatingStats::default(),
            sums: GaussianStats::default(),
            sums_next: GaussianStats::default(),
            have_stats: false,
            trace: Vec::new(),
            loglik: f64::NAN,
            objective: f64::NAN,
            damped: 0,
            fallbacks: 0,
            failed: 0,
        }
    }

    /// E-step under `model` into the next buffers; returns (log-likelihood, objective).
    fn evaluate(&mut self, model: &Model) -> (f64, f64) {
        let loglik = if self.from_sums {
            e_step_sums(model, &self.data, &mut self.stats_next, &mut self.sums_next)
        } else {
            e_step_with(
                model,
                &self.data,
                &mut self.tau_next,
                Some(&mut self.stats_next),
                Some(&mut self.sums_next),
            )
        };
        (loglik, loglik - model.penalty())
    }

    /// Make the next buffers, written by [`Walk::evaluate`] under `model`, the current ones.
    fn accept(&mut self, model: Model, (loglik, objective): (f64, f64)) {
        self.model = model;
        if !self.from_sums {
            std::mem::swap(&mut self.tau, &mut self.tau_next);
        }
        std::mem::swap(&mut self.stats, &mut self.stats_next);
        std::mem::swap(&mut self.sums, &mut self.sums_next);
        self.have_stats = true;
        self.loglik = loglik;
        self.objective = objective;
    }

    /// One EM step, recorded in the trace.
    fn step(&mut self, iteration: usize) -> Result<(), Termination> {
        let degenerate = |d: crate::model::family::Degeneracy| {
            Termination::Degenerate(format!("cluster {} degenerated: {}", d.cluster, d.reason))
        };
        let known = self.have_stats.then_some(&self.stats);
        let known_sums = self.have_stats.then_some(&self.sums);
        let mut model = self.model.clone();
        let step = model
            .m_step(&self.data, &self.tau, known, known_sums, GatingUpdate::Newton)
            .map_err(degenerate)?;
        self.hold_runaway(&mut model);
        self.damped += step.damped;
        self.failed += usize::from(step.outcome.failed());
        let mut next = self.evaluate(&model);
        // A Newton step without line search can overshoot; redo the iteration with the
        // bound step, which cannot lower the objective.
        if self.logit && self.have_stats && !(next.1 >= self.objective - 1e-13 * self.objective.abs()) {
            model = self.model.clone();
            model
                .m_step(
                    &self.data,
                    &self.tau,
                    Some(&self.stats),
                    Some(&self.sums),
                    GatingUpdate::Bound,
                )
                .map_err(degenerate)?;
            self.hold_runaway(&mut model);
            next = self.evaluate(&model);
            self.fallbacks += 1;
        }
        // The model stays usable for the report even when the step fails below.
        self.accept(model, next);
        if !next.1.is_finite() {
            return Err(Termination::NumericalFault(format!(
                "the log-likelihood became {} at iteration {iteration}",
                next.0
            )));
        }
        self.trace.push(next.1);
        Ok(())
    }

    /// Keep the current gating coefficients when the step would take one past
    /// [`GATING_RUNAWAY`](crate::model::gating::GATING_RUNAWAY): the membership probabilities are 0 or 1 to double precision
    /// there already, and larger values only add rounding to the log-likelihood. Keeping
    /// them is still an EM step (the components' part rose, the gating part stays).
    fn hold_runaway(&self, model: &mut Model) {
        if model.gating.runs_away() {
            model.gating = self.model.gating.clone();
        }
    }

    /// Whether the last EM step changed the objective by at most [`SETTLED`] of its size.
    fn settled(&self) -> bool {
        match self.trace.as_slice() {
            [.., a, b] => (b - a).abs() <= SETTLED * b.abs(),
            _ => false,
        }
    }

    /// Whether the step that moved the objective from `previous` stops the loop.
    fn converged(&self, previous: f64, iteration: usize, tolerance: f64) -> bool {
        let change = (self.objective - previous).abs();
        iteration > 1 && (change <= tolerance * self.objective.abs() || self.model.n_params() == 0)
    }

    /// Try the extrapolation from the coordinates `x` of the last three models (the last
    /// is the current one).
    /// Returns the step length α and what became of the jump (after a move, the
    /// stabilising EM step from θ′ is the current iteration).
    fn extrapolate(&mut self, x: &[Vec<f64>], step_max: f64, iteration: usize) -> (f64, Jump) {
        let (mut r_squared, mut v_squared) = (0.0, 0.0);
        for ((a, b), c) in x[0].iter().zip(&x[1]).zip(&x[2]) {
            let (r, v) = (b - a, c - 2.0 * b + a);
            if r.is_finite() && v.is_finite() {
                r_squared += r * r;
                v_squared += v * v;
            }
        }
        let alpha = (r_squared / v_squared).sqrt();
        if !alpha.is_finite() {
            return (1.0, Jump::Rejected);
        }
        let alpha = alpha.clamp(1.0, step_max);
        if alpha == 1.0 {
            return (alpha, Jump::Short);
        }
        let (c0, c1, c2) = ((1.0 - alpha).powi(2), 2.0 * alpha * (1.0 - alpha), alpha * alpha);
        let jumped: Vec<f64> = x[0]
            .iter()
            .zip(&x[1])
            .zip(&x[2])
            .map(|((a, b), c)| {
                let v = c0 * a + c1 * b + c2 * c;
                if v.is_finite() {
                    v
                } else {
                    *c
                }
            })
            .collect();
        let Ok(candidate) = self.model.with_coordinates(&jumped) else {
            return (alpha, Jump::Rejected);
        };
        if candidate.gating.runs_away() {
            return (alpha, Jump::Rejected);
        }
        let there = self.evaluate(&candidate);
        let (here_model, here_objective) = (self.model.clone(), self.objective);
        if !(there.1.is_finite() && there.1 >= here_objective) {
            return (alpha, Jump::Rejected);
        }
        let (trace_len, fallbacks, damped, failed) = (self.trace.len(), self.fallbacks, self.damped, self.failed);
        self.accept(candidate, there);
        let stable = self.step(iteration).is_ok() && self.objective >= here_objective;
        if !stable {
            // Back to θ₂ with its E-step, as if the extrapolation had not been tried.
            self.trace.truncate(trace_len);
            (self.fallbacks, self.damped, self.failed) = (fallbacks, damped, failed);
            let back = self.evaluate(&here_model);
            self.accept(here_model, back);
            return (alpha, Jump::Rejected);
        }
        (alpha, Jump::Moved(there.1))
    }

    fn finish(self, iterations: usize, termination: Termination) -> EmRun {
        let mut tau = self.tau;
        if self.from_sums && iterations > 0 && termination.usable() {
            // The same pass as the last iteration's, so the same responsibilities.
            e_step_with(&self.model, &self.data, &mut tau, None, None);
        }
        EmRun {
            model: self.model,
            tau,
            loglik: self.loglik,
            objective: self.objective,
            trace: self.trace,
            iterations,
            termination,
            gating_damped: self.damped,
            gating_fallbacks: self.fallbacks,
            gating_failed: self.failed,
        }
    }
}
