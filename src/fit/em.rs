//! The EM loop for one start.
//!
//! From starting responsibilities: M-step, E-step, repeat. It stops when the relative
//! change of the objective (log-likelihood minus any gating ridge penalty) falls below the
//! tolerance, at the iteration cap, when a cluster degenerates, or when the
//! log-likelihood stops being finite. Why it stopped is part of the result.

use crate::model::gating::{Gating, GatingStats};
use crate::model::{e_step_sums, e_step_with, FitData, GaussianStats, Model};
use serde::Serialize;

/// Why a start stopped.
#[derive(Debug, Clone, PartialEq, Serialize, serde::Deserialize)]
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
        }
    }

    /// The reason, for degenerate and faulty starts.
    pub fn reason(&self) -> Option<&str> {
        match self {
            Termination::Degenerate(r) | Termination::NumericalFault(r) => Some(r),
            _ => None,
        }
    }
}

/// A tolerance that never counts as converged: the loop runs to the iteration cap
/// (benchmarks compare fixed numbers of iterations).
pub const NEVER_STOP_EARLY: f64 = -1.0;

/// Settings of the loop.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EmSettings {
    /// Iteration cap.
    pub max_iterations: usize,
    /// Relative objective change that counts as converged.
    pub tolerance: f64,
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
}

/// Run EM from starting responsibilities `tau` (n×G, rows summing to 1).
pub fn run(data: &FitData, mut model: Model, mut tau: Vec<f64>, settings: EmSettings) -> EmRun {
    // When the M-step runs from the E-step's sums alone, the iterations keep no
    // responsibilities: they are made once, for the final parameters.
    let from_sums = model.steps_from_sums();
    let mut out = Progress {
        data: *data,
        from_sums,
        trace: Vec::new(),
        loglik: f64::NAN,
        objective: f64::NAN,
        damped: 0,
        fallbacks: 0,
    };
    let logit = matches!(model.gating, Gating::Logit { .. });
    // Double buffers: the E-step writes the next responsibilities and sums while the
    // current ones stay intact for a redo.
    let mut tau_next = if from_sums { Vec::new() } else { vec![0.0; tau.len()] };
    let (mut stats, mut stats_next) = (GatingStats::default(), GatingStats::default());
    let (mut sums, mut sums_next) = (GaussianStats::default(), GaussianStats::default());
    let e_step = |model: &Model, tau_next: &mut [f64], stats_next: &mut GatingStats, sums_next: &mut GaussianStats| {
        if from_sums {
            e_step_sums(model, data, stats_next, sums_next)
        } else {
            e_step_with(model, data, tau_next, Some(stats_next), Some(sums_next))
        }
    };
    let mut have_stats = false;
    for iteration in 1..=settings.max_iterations {
        let saved = (logit && have_stats).then(|| model.clone());
        let known = have_stats.then_some(&stats);
        let known_sums = have_stats.then_some(&sums);
        let step = match model.m_step(data, &tau, known, known_sums, false) {
            Ok(step) => step,
            Err(d) => {
                let t = Termination::Degenerate(format!("cluster {} degenerated: {}", d.cluster, d.reason));
                return out.finish(model, tau, iteration - 1, t);
            }
        };
        out.damped += step.damped;
        let mut new_loglik = e_step(&model, &mut tau_next, &mut stats_next, &mut sums_next);
        let mut new_objective = new_loglik - model.penalty();
        if let Some(previous) = saved {
            // A Newton step without line search can overshoot; redo the iteration with
            // the bound step, which cannot lower the objective.
            if !(new_objective >= out.objective - 1e-13 * out.objective.abs()) {
                model = previous;
                if let Err(d) = model.m_step(data, &tau, Some(&stats), Some(&sums), true) {
                    let t = Termination::Degenerate(format!("cluster {} degenerated: {}", d.cluster, d.reason));
                    return out.finish(model, tau, iteration - 1, t);
                }
                new_loglik = e_step(&model, &mut tau_next, &mut stats_next, &mut sums_next);
                new_objective = new_loglik - model.penalty();
                out.fallbacks += 1;
            }
        }
        if !from_sums {
            std::mem::swap(&mut tau, &mut tau_next);
        }
        std::mem::swap(&mut stats, &mut stats_next);
        std::mem::swap(&mut sums, &mut sums_next);
        have_stats = true;
        if !new_objective.is_finite() {
            let t = Termination::NumericalFault(format!(
                "the log-likelihood became {new_loglik} at iteration {iteration}"
            ));
            return out.finish(model, tau, iteration - 1, t);
        }
        out.trace.push(new_objective);
        let change = (new_objective - out.objective).abs();
        let converged = iteration > 1 && change <= settings.tolerance * new_objective.abs();
        out.loglik = new_loglik;
        out.objective = new_objective;
        if converged || model.n_params() == 0 && iteration > 1 {
            return out.finish(model, tau, iteration, Termination::Converged);
        }
    }
    out.finish(model, tau, settings.max_iterations, Termination::IterationCap)
}

/// What the loop has gathered so far.
struct Progress<'a> {
    data: FitData<'a>,
    /// Whether the iterations kept no responsibilities.
    from_sums: bool,
    trace: Vec<f64>,
    loglik: f64,
    objective: f64,
    damped: usize,
    fallbacks: usize,
}

impl Progress<'_> {
    fn finish(self, model: Model, mut tau: Vec<f64>, iterations: usize, termination: Termination) -> EmRun {
        if self.from_sums && iterations > 0 && termination.usable() {
            // The same pass as the last iteration's, so the same responsibilities.
            e_step_with(&model, &self.data, &mut tau, None, None);
        }
        EmRun {
            model,
            tau,
            loglik: self.loglik,
            objective: self.objective,
            trace: self.trace,
            iterations,
            termination,
            gating_damped: self.damped,
            gating_fallbacks: self.fallbacks,
        }
    }
}
