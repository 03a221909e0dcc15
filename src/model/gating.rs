//! The gating network: how covariates change who belongs to which cluster.
//!
//! With gating covariates w_i (intercept first) the cluster probabilities are a
//! multinomial logit with cluster 1 as reference:
//!
//! ```text
//! pi_g(w) = exp(w' gamma_g) / sum_h exp(w' gamma_h),   gamma_1 = 0
//! ```
//!
//! The M-step maximises sum_i c_i sum_g tau_ig log pi_g(w_i) − (ridge/2) sum of squared
//! slopes (intercepts are not penalised) over gamma_2..gamma_G. It is concave, so Newton's
//! method with the exact Hessian and step-halving converges from any start. Without
//! covariates the proportions are free shares (closed form), equal, or fixed by the user.

use crate::numerics::newton::{maximise, Concave, Outcome, WhenSingular};
use crate::numerics::{log_softmax_row, log_sum_exp, solve_spd};
use nalgebra::{DMatrix, DVector};
use std::sync::Arc;

/// Newton iterations allowed when the logit is fitted on its own.
pub const MAX_NEWTON_ITERATIONS: usize = 100;

/// Newton iterations per EM M-step when no bound is prepared. One step with halving
/// already raises the expected complete-data log-likelihood, which is all EM needs to
/// climb (a generalised EM step).
pub const NEWTON_STEPS_PER_EM_ITERATION: usize = 1;

/// Largest |coefficient| a gating step may reach, on the fitting scale (numeric
/// covariates standardised). Past it the network separates: a log relative risk ratio of
/// 1000 per standard deviation puts every membership probability at 0 or 1 to double
/// precision, the report already shows anything past 15 as separation, and letting the
/// coefficients run on (to 10^12 in one case seen) leaves only rounding error in the
/// log-likelihood, which then wanders by 10^-3.
pub const GATING_RUNAWAY: f64 = 1e3;

/// How the gating network is parameterised.
#[derive(Debug, Clone, PartialEq)]
pub enum Gating {
    /// Every cluster has probability 1/G. No parameters.
    Equal {
        /// Number of clusters.
        g: usize,
    },
    /// Proportions fixed by the user. No parameters.
    Fixed {
        /// Log proportions.
        log_pi: Vec<f64>,
    },
    /// Estimated shares, no covariates. G − 1 parameters.
    Free {
        /// Log proportions.
        log_pi: Vec<f64>,
    },
    /// Multinomial logit on p gating columns. (G − 1)·p parameters.
    Logit {
        /// Number of clusters.
        g: usize,
        /// Columns of the gating design (intercept included).
        p: usize,
        /// Coefficients on the fitting scale, `gamma[k * p + j]` for cluster k + 2.
        gamma: Vec<f64>,
        /// Ridge penalty on slopes.
        ridge: f64,
        /// Inverse of Böhning's bound matrix, when prepared: the M-step then takes the
        /// bound step instead of Newton (see [`Gating::prepare_bound`]).
        bound_inverse: Option<Arc<DMatrix<f64>>>,
    },
}

/// What one gating M-step did.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GatingStep {
    /// Newton iterations used (0 for closed forms).
    pub iterations: usize,
    /// Why its Newton iterations stopped ([`Outcome::Converged`] for closed forms).
    pub outcome: Outcome,
    /// Times the Hessian needed damping to be solved (a sign of separation).
    pub damped: usize,
}

impl Gating {
    /// Number of clusters.
    pub fn clusters(&self) -> usize {
        match self {
            Gating::Equal { g } | Gating::Logit { g, .. } => *g,
            Gating::Fixed { log_pi } | Gating::Free { log_pi } => log_pi.len(),
        }
    }

    /// Number of free parameters.
    pub fn n_params(&self) -> usize {
        match self {
            Gating::Equal { .. } | Gating::Fixed { .. } => 0,
            Gating::Free { log_pi } => log_pi.len() - 1,
            Gating::Logit { g, p, .. } => (g - 1) * p,
        }
    }

    /// The penalty subtracted from the log-likelihood in the EM objective.
    pub fn penalty(&self) -> f64 {
        match self {
            Gating::Logit { p, gamma, ridge, .. } if *ridge > 0.0 => ridge_penalty(gamma, *p, *ridge),
            _ => 0.0,
        }
    }

    /// Log cluster probabilities for one row of the gating design.
    pub fn log_priors(&self, w: &[f64], out: &mut [f64]) {
        match self {
            Gating::Equal { g } => out.fill(-(*g as f64).ln()),
            Gating::Fixed { log_pi } | Gating::Free { log_pi } => out.copy_from_slice(log_pi),
            Gating::Logit { p, gamma, .. } => log_softmax_row(gamma, *p, w, out),
        }
    }

    /// Whether a logit coefficient is past [`GATING_RUNAWAY`] (or not finite).
    pub fn runs_away(&self) -> bool {
        match self {
            Gating::Logit { gamma, .. } => gamma.iter().any(|x| !(x.abs() <= GATING_RUNAWAY)),
            _ => false,
        }
    }

    /// M-step: maximise the expected complete-data gating term given responsibilities.
    ///
    /// `w` is the n×p gating design (row-major), `tau` the n×G responsibilities.
    pub fn m_step(&mut self, w: &[f64], tau: &[f64], weights: &[f64]) -> GatingStep {
        match self {
            Gating::Equal { .. } | Gating::Fixed { .. } => GatingStep {
                iterations: 0,
                outcome: Outcome::Converged,
                damped: 0,
            },
            Gating::Free { log_pi } => {
                let g = log_pi.len();
                let mut sums = vec![0.0; g];
                for (row, c) in tau.chunks_exact(g).zip(weights) {
                    for (s, t) in sums.iter_mut().zip(row) {
                        *s += c * t;
                    }
                }
                self.shares_from(&sums);
                GatingStep {
                    iterations: 0,
                    outcome: Outcome::Converged,
                    damped: 0,
                }
            }
            Gating::Logit { g, p, gamma, ridge, .. } => {
                let rows = LogitRows {
                    w,
                    p: *p,
                    tau,
                    g: *g,
                    weights,
                    ridge: *ridge,
                };
                let fit = fit_multinomial_logit(&rows, gamma, NEWTON_STEPS_PER_EM_ITERATION);
                *gamma = fit.gamma;
                GatingStep {
                    iterations: fit.iterations,
                    outcome: fit.outcome,
                    damped: fit.damped,
                }
            }
        }
    }

    /// Free shares from the weighted responsibility totals Σ_i c_i τ_ik (no-op for other
    /// gating networks).
    pub fn shares_from(&mut self, sums: &[f64]) {
        if let Gating::Free { log_pi } = self {
            let total: f64 = sums.iter().sum();
            for (l, s) in log_pi.iter_mut().zip(sums) {
                *l = (s / total).ln();
            }
        }
    }

    /// The parameters as coordinates for extrapolating EM steps: the logit coefficients,
    /// or the log shares (renormalised when set back); none without parameters.
    pub fn push_coordinates(&self, out: &mut Vec<f64>) {
        match self {
            Gating::Logit { gamma, .. } => out.extend_from_slice(gamma),
            Gating::Free { log_pi } => out.extend_from_slice(log_pi),
            Gating::Equal { .. } | Gating::Fixed { .. } => {}
        }
    }

    /// Set the parameters from coordinates laid out as [`Gating::push_coordinates`] writes
    /// them; returns how many it read.
    pub fn set_coordinates(&mut self, c: &[f64]) -> usize {
        match self {
            Gating::Logit { gamma, .. } => {
                let len = gamma.len();
                gamma.copy_from_slice(&c[..len]);
                len
            }
            Gating::Free { log_pi } => {
                let lse = log_sum_exp(&c[..log_pi.len()]);
                for (l, v) in log_pi.iter_mut().zip(c) {
                    *l = v - lse;
                }
                log_pi.len()
            }
            Gating::Equal { .. } | Gating::Fixed { .. } => 0,
        }
    }

    /// Relabel clusters: new cluster k is old cluster `order[k]`. For the logit the new
    /// cluster 1 becomes the reference (its coefficients are subtracted from all).
    pub fn permute(&mut self, order: &[usize]) {
        match self {
            Gating::Equal { .. } => {}
            Gating::Fixed { log_pi } | Gating::Free { log_pi } => {
                *log_pi = order.iter().map(|&k| log_pi[k]).collect();
            }
            Gating::Logit {
                g,
                p,
                gamma,
                bound_inverse,
                ..
            } => {
                let (g, p) = (*g, *p);
                // The bound belongs to the old labelling; prepare it again if EM continues.
                *bound_inverse = None;
                let full = |k: usize, j: usize| if k == 0 { 0.0 } else { gamma[(k - 1) * p + j] };
                let mut next = vec![0.0; (g - 1) * p];
                for (new_k, &old_k) in order.iter().enumerate().skip(1) {
                    for j in 0..p {
                        next[(new_k - 1) * p + j] = full(old_k, j) - full(order[0], j);
                    }
                }
                *gamma = next;
            }
        }
    }
}

impl Gating {
    /// Prepare Böhning's bound step for a logit gating network (no-op otherwise).
    ///
    /// Böhning (1992, Ann. Inst. Statist. Math. 44:197–200): the negative Hessian of the
    /// multinomial logit with K + 1 categories never exceeds
    /// B = ½ (I_K − 11'/(K + 1)) ⊗ Σ_i c_i w_i w_i'. So the step γ + (B + λD)⁻¹ s(γ), with
    /// s the penalised score and D selecting the slopes, always raises the penalised
    /// objective, needs no line search, and B is the same at every iteration.
    pub fn prepare_bound(&mut self, w: &[f64], weights: &[f64]) {
        let Gating::Logit {
            g,
            p,
            ridge,
            bound_inverse,
            ..
        } = self
        else {
            return;
        };
        let (g, p) = (*g, *p);
        let mut wtw = DMatrix::<f64>::zeros(p, p);
        for (row, c) in w.chunks_exact(p).zip(weights) {
            for a in 0..p {
                for b in 0..=a {
                    wtw[(a, b)] += c * row[a] * row[b];
                }
            }
        }
        let k = g - 1;
        let m = k * p;
        let bound = DMatrix::from_fn(m, m, |r, c| {
            let (kr, a) = (r / p, r % p);
            let (kc, b) = (c / p, c % p);
            let outer = if kr == kc { 1.0 } else { 0.0 } - 1.0 / g as f64;
            let x = if b <= a { wtw[(a, b)] } else { wtw[(b, a)] };
            0.5 * outer * x + if r == c && a > 0 { *ridge } else { 0.0 }
        });
        *bound_inverse = bound.try_inverse().map(Arc::new);
    }

    /// Apply the bound step given the unpenalised score s(γ) = Σ c (τ − π) w.
    pub fn bound_step(&mut self, score: &[f64]) {
        let Gating::Logit {
            p,
            gamma,
            ridge,
            bound_inverse: Some(inv),
            ..
        } = self
        else {
            return;
        };
        let p = *p;
        let penalised: DVector<f64> = DVector::from_iterator(
            score.len(),
            score
                .iter()
                .enumerate()
                .map(|(i, s)| if i % p == 0 { *s } else { s - *ridge * gamma[i] }),
        );
        let step = inv.as_ref() * penalised;
        for (gm, st) in gamma.iter_mut().zip(step.iter()) {
            *gm += st;
        }
    }
}

/// Score and negative Hessian of the unpenalised gating objective at the current
/// coefficients, accumulated row by row by the E-step (which has π and τ at hand).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct GatingStats {
    /// Σ_i c_i (τ_ik − π_ik) w_i, `score[(k − 1) * p + j]`.
    pub score: Vec<f64>,
    /// Σ_i c_i π_ik (δ_kl − π_il) w_i w_i', lower triangle of an m×m row-major matrix.
    pub neg_hessian: Vec<f64>,
    /// Σ_i c_i τ_ik per cluster (all gating networks): the free shares' M-step.
    pub cluster_weight: Vec<f64>,
}

impl GatingStats {
    /// Zero the sums for G clusters and p gating columns.
    pub fn reset(&mut self, g: usize, p: usize) {
        let m = (g - 1) * p;
        self.score.clear();
        self.score.resize(m, 0.0);
        self.neg_hessian.clear();
        self.neg_hessian.resize(m * m, 0.0);
        self.cluster_weight.clear();
        self.cluster_weight.resize(g, 0.0);
    }
}

impl Gating {
    /// Newton step from E-step sums, without line search (the EM driver checks the
    /// log-likelihood and falls back to [`Gating::bound_step`]). False when the Hessian
    /// cannot be solved (separation); then nothing changes.
    pub fn newton_step(&mut self, stats: &GatingStats) -> bool {
        let Gating::Logit { p, gamma, ridge, .. } = self else {
            return false;
        };
        let (p, m) = (*p, gamma.len());
        let h = &stats.neg_hessian;
        let mat = DMatrix::from_fn(m, m, |r, c| {
            let v = if c <= r { h[r * m + c] } else { h[c * m + r] };
            v + if r == c && r % p != 0 { *ridge } else { 0.0 }
        });
        let rhs = DVector::from_iterator(
            m,
            stats
                .score
                .iter()
                .enumerate()
                .map(|(i, s)| if i % p == 0 { *s } else { s - *ridge * gamma[i] }),
        );
        match solve_spd(&mat, &rhs) {
            Some(step) => {
                for (gm, st) in gamma.iter_mut().zip(step.iter()) {
                    *gm += st;
                }
                true
            }
            None => false,
        }
    }
}

/// Unpenalised score Σ_i c_i (τ_ik − s_i π_ik) w_i of the logit at `gamma`, one pass.
pub fn logit_score(w: &[f64], p: usize, tau: &[f64], g: usize, weights: &[f64], gamma: &[f64]) -> Vec<f64> {
    let mut score = vec![0.0; (g - 1) * p];
    let mut lp = vec![0.0; g];
    for ((wr, tr), c) in w.chunks_exact(p).zip(tau.chunks_exact(g)).zip(weights) {
        log_softmax_row(gamma, p, wr, &mut lp);
        let s: f64 = tr.iter().sum();
        for k in 1..g {
            let r = c * (tr[k] - s * lp[k].exp());
            for j in 0..p {
                score[(k - 1) * p + j] += r * wr[j];
            }
        }
    }
    score
}

fn ridge_penalty(gamma: &[f64], p: usize, ridge: f64) -> f64 {
    0.5 * ridge
        * gamma
            .chunks_exact(p)
            .map(|c| c[1..].iter().map(|x| x * x).sum::<f64>())
            .sum::<f64>()
}

/// Result of a weighted multinomial-logit fit.
#[derive(Debug, Clone, PartialEq)]
pub struct LogitFit {
    /// Coefficients, `gamma[k * p + j]` for category k + 2.
    pub gamma: Vec<f64>,
    /// Penalised objective at `gamma`.
    pub objective: f64,
    /// Newton iterations.
    pub iterations: usize,
    /// Why Newton stopped.
    pub outcome: Outcome,
    /// Damped Hessian solves.
    pub damped: usize,
}

/// Objective sum_i c_i sum_g tau_ig log pi_ig − penalty.
pub fn logit_objective(w: &[f64], p: usize, tau: &[f64], g: usize, weights: &[f64], ridge: f64, gamma: &[f64]) -> f64 {
    let (objective, _) = super::rows::logit_pass(w, p, tau, g, weights, gamma, false);
    objective - ridge_penalty(gamma, p, ridge)
}

/// Objective, score and Hessian of the penalised multinomial logit at `gamma`.
///
/// Score: sum_i c_i (tau_ik − s_i pi_ik) w_i, with s_i = sum_g tau_ig.
/// Hessian block (k, l): −sum_i c_i s_i pi_ik (δ_kl − pi_il) w_i w_i'.
pub fn logit_score_hessian(
    w: &[f64],
    p: usize,
    tau: &[f64],
    g: usize,
    weights: &[f64],
    ridge: f64,
    gamma: &[f64],
) -> (f64, DVector<f64>, DMatrix<f64>) {
    let m = (g - 1) * p;
    let (mut objective, stats) = super::rows::logit_pass(w, p, tau, g, weights, gamma, true);
    let stats = stats.expect("the logit pass returns derivatives when asked");
    let h = &stats.neg_hessian;
    let mut score = DVector::from_vec(stats.score);
    let mut hess = DMatrix::from_fn(m, m, |r, col| if col <= r { -h[r * m + col] } else { -h[col * m + r] });
    if ridge > 0.0 {
        for k in 0..(g - 1) {
            for j in 1..p {
                let i = k * p + j;
                score[i] -= ridge * gamma[i];
                hess[(i, i)] -= ridge;
            }
        }
        objective -= ridge_penalty(gamma, p, ridge);
    }
    (objective, score, hess)
}

/// The rows of one weighted multinomial logit with fractional responses: design `w`
/// (n×p), responses `tau` (n×g, rows need not sum to 1), case weights and a ridge
/// penalty on the slopes.
#[derive(Debug, Clone, Copy)]
pub struct LogitRows<'a> {
    /// Design, row-major n×p (intercept first).
    pub w: &'a [f64],
    /// Design columns.
    pub p: usize,
    /// Responses, n×g.
    pub tau: &'a [f64],
    /// Categories.
    pub g: usize,
    /// Case weights.
    pub weights: &'a [f64],
    /// Ridge penalty on the slopes (not the intercepts).
    pub ridge: f64,
}

impl Concave for LogitRows<'_> {
    fn objective(&self, gamma: &[f64]) -> f64 {
        logit_objective(self.w, self.p, self.tau, self.g, self.weights, self.ridge, gamma)
    }

    fn derivatives(&self, gamma: &[f64]) -> (f64, DVector<f64>, DMatrix<f64>) {
        let (objective, score, hess) =
            logit_score_hessian(self.w, self.p, self.tau, self.g, self.weights, self.ridge, gamma);
        (objective, score, -hess)
    }
}

/// Weighted multinomial logit with fractional responses, by the damped Newton maximiser
/// ([`crate::numerics::newton`]) from `start` (a warm start inside EM), at most
/// `max_iter` iterations; a singular Hessian is damped.
pub fn fit_multinomial_logit(rows: &LogitRows, start: &[f64], max_iter: usize) -> LogitFit {
    let fit = maximise(rows, start, max_iter, WhenSingular::Damp);
    LogitFit {
        gamma: fit.x,
        objective: fit.objective,
        iterations: fit.iterations,
        outcome: fit.outcome,
        damped: fit.damped,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn permuting_keeps_probabilities() {
        let mut gt = Gating::Logit {
            bound_inverse: None,
            g: 3,
            p: 2,
            gamma: vec![0.3, -1.0, 1.2, 0.5],
            ridge: 0.0,
        };
        let w = [1.0, 0.7];
        let mut before = [0.0; 3];
        gt.log_priors(&w, &mut before);
        gt.permute(&[2, 0, 1]);
        let mut after = [0.0; 3];
        gt.log_priors(&w, &mut after);
        for (new_k, old_k) in [2, 0, 1].iter().enumerate() {
            assert!((after[new_k] - before[*old_k]).abs() < 1e-12);
        }
    }
}
