//! The EM loop for one start.
//!
//! From starting responsibilities: M-step, E-step, repeat. It stops when the relative
//! change of the objective (log-likelihood minus any gating ridge penalty) falls below the
//! tolerance, at the iteration cap, when a cluster degenerates, or when the
//! log-likelihood stops being finite. Why it stopped is part of the result.

use crate::model::{e_step, FitData, Model};
use serde::Serialize;

/// Why a start stopped.
#[derive(Debug, Clone, PartialEq, Serialize)]
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
    /// Responsibilities under `model`, n×G.
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
    /// Gating M-steps that needed a damped Hessian (possible separation).
    pub gating_damped: usize,
}

/// Run EM from starting responsibilities `tau` (n×G, rows summing to 1).
pub fn run(data: &FitData, mut model: Model, mut tau: Vec<f64>, settings: EmSettings) -> EmRun {
    let mut trace = Vec::new();
    let mut loglik = f64::NAN;
    let mut objective = f64::NAN;
    let mut gating_damped = 0;
    for iteration in 1..=settings.max_iterations {
        let step = match model.m_step(data, &tau) {
            Ok(step) => step,
            Err(d) => {
                let termination = Termination::Degenerate(format!("cluster {} degenerated: {}", d.cluster, d.reason));
                return finish(
                    model,
                    tau,
                    loglik,
                    objective,
                    trace,
                    iteration - 1,
                    termination,
                    gating_damped,
                );
            }
        };
        gating_damped += step.damped;
        let new_loglik = e_step(&model, data, &mut tau);
        let new_objective = new_loglik - model.gating.penalty();
        if !new_objective.is_finite() {
            let termination = Termination::NumericalFault(format!(
                "the log-likelihood became {new_loglik} at iteration {iteration}"
            ));
            return finish(
                model,
                tau,
                loglik,
                objective,
                trace,
                iteration - 1,
                termination,
                gating_damped,
            );
        }
        trace.push(new_objective);
        let change = (new_objective - objective).abs();
        let converged = iteration > 1 && change <= settings.tolerance * new_objective.abs();
        loglik = new_loglik;
        objective = new_objective;
        if converged || model.n_params() == 0 && iteration > 1 {
            return finish(
                model,
                tau,
                loglik,
                objective,
                trace,
                iteration,
                Termination::Converged,
                gating_damped,
            );
        }
    }
    let n = settings.max_iterations;
    finish(
        model,
        tau,
        loglik,
        objective,
        trace,
        n,
        Termination::IterationCap,
        gating_damped,
    )
}

#[allow(clippy::too_many_arguments)]
fn finish(
    model: Model,
    tau: Vec<f64>,
    loglik: f64,
    objective: f64,
    trace: Vec<f64>,
    iterations: usize,
    termination: Termination,
    gating_damped: usize,
) -> EmRun {
    EmRun {
        model,
        tau,
        loglik,
        objective,
        trace,
        iterations,
        termination,
        gating_damped,
    }
}
