//! Three-step estimation of gating effects: fit the clusters without gating covariates
//! (step 1), assign each row to its most likely cluster (step 2), then relate the
//! assignments to the covariates with a multinomial logit corrected for the
//! classification errors of step 2 (step 3).
//!
//! The classification-error matrix is D[s][t] = P(assigned t | cluster s), estimated from
//! the step-1 posteriors (Vermunt 2010, eq. 6): D[s][t] = Σ_i c_i τ_is [W_i = t] / Σ_i c_i τ_is.
//! - **BCH** (Bolck, Croon & Hagenaars 2004; Vermunt 2010): each row enters once per
//!   cluster s with weight (D⁻¹)[W_i][s] (negative weights allowed; they sum to 1 per
//!   row, so the weighted logit stays concave). Standard errors: the robust sandwich
//!   (Vermunt 2010; Bakk, Tekle & Vermunt 2013).
//! - **ML** (Vermunt 2010): maximise Σ_i c_i log Σ_s π_s(w_i; γ) D[s][W_i], a mixture whose
//!   cluster densities D[s][W_i] are known; EM with a full logit M-step. Standard errors:
//!   the inverse observed information of that likelihood.
//!
//! Both treat D as known, so their standard errors leave out the step-1 uncertainty
//! (Bakk, Oberski & Vermunt 2014 show the difference is small unless the clusters are
//! poorly separated). Plain classify-analyze (a logit of the assignments) is kept as a
//! labelled contrast: it attenuates the effects when classification is imperfect.

use crate::data::Design;
use crate::model::gating::{fit_multinomial_logit, logit_score_hessian, LogitRows, MAX_NEWTON_ITERATIONS};
use crate::numerics::newton::Outcome;
use crate::numerics::{log_softmax_row, most_likely, softmax_in_place};
use crate::spec::Method;
use nalgebra::DMatrix;
use serde::Serialize;

/// EM iterations of the ML step at most.
const ML_MAX_ITERATIONS: usize = 2000;
/// Relative change of the ML step's log-likelihood that counts as converged.
const ML_TOLERANCE: f64 = 1e-12;
/// Central-difference step of the ML information (the fitting scale is standardised).
const ML_STEP: f64 = 1e-5;

/// The outcome of step 3.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct StepThree {
    /// BCH or ML.
    pub method: Method,
    /// D[s][t] = P(assigned to t | cluster s).
    pub classification: Vec<Vec<f64>>,
    /// Weighted share of rows whose assignment differs from their cluster, as the
    /// posteriors estimate it: 1 − Σ_s N_s D[s][s] / N.
    pub misclassified: f64,
    /// Corrected logit coefficients on the fitting scale, `gamma[k p + j]` for cluster k + 2.
    #[serde(skip)]
    pub gamma: Vec<f64>,
    /// Their covariance (fitting scale).
    #[serde(skip)]
    pub covariance: DMatrix<f64>,
    /// Classify-analyze coefficients (fitting scale), the biased contrast.
    #[serde(skip)]
    pub naive_gamma: Vec<f64>,
    /// Their covariance (fitting scale).
    #[serde(skip)]
    pub naive_covariance: DMatrix<f64>,
    /// Whether the step-3 optimiser met its tolerance.
    pub converged: bool,
}

fn inverse(m: DMatrix<f64>, what: &str) -> Result<DMatrix<f64>, String> {
    m.try_inverse().ok_or_else(|| format!("the {what} is singular"))
}

/// Covariance from a concave logit fit: (−H)⁻¹.
fn information_covariance(h: &DMatrix<f64>) -> Result<DMatrix<f64>, String> {
    (-h).cholesky().map(|c| c.inverse()).ok_or_else(|| {
        "the step-3 information is not positive definite (a covariate separates the clusters)".to_string()
    })
}

/// Step 2 and 3 from step-1 posteriors `tau` (n×g), case weights and the covariate design.
pub fn estimate(method: Method, tau: &[f64], g: usize, weights: &[f64], design: &Design) -> Result<StepThree, String> {
    let (w, p) = (&design.x[..], design.p());
    let n = weights.len();
    let assigned: Vec<usize> = tau.chunks_exact(g).map(most_likely).collect();
    let (d, misclassified) = classification(tau, g, weights, &assigned)?;
    let zeros = vec![0.0; (g - 1) * p];

    // Classify-analyze.
    let mut onehot = vec![0.0; n * g];
    for (i, t) in assigned.iter().enumerate() {
        onehot[i * g + t] = 1.0;
    }
    let rows = |tau| LogitRows {
        w,
        p,
        tau,
        g,
        weights,
        ridge: 0.0,
    };
    let naive = fit_multinomial_logit(&rows(&onehot), &zeros, MAX_NEWTON_ITERATIONS);
    let (_, _, h) = logit_score_hessian(w, p, &onehot, g, weights, 0.0, &naive.gamma);
    let naive_covariance = information_covariance(&h)?;

    // BCH weights: row i, cluster s gets (D⁻¹)[W_i][s].
    let dm = DMatrix::from_fn(g, g, |s, t| d[s][t]);
    let dinv = inverse(dm, "classification-error matrix (the clusters cannot be told apart)")?;
    let mut bch = vec![0.0; n * g];
    for (i, t) in assigned.iter().enumerate() {
        for s in 0..g {
            bch[i * g + s] = dinv[(*t, s)];
        }
    }
    let bch_fit = fit_multinomial_logit(&rows(&bch), &naive.gamma, MAX_NEWTON_ITERATIONS);

    let (gamma, covariance, converged) = match method {
        Method::ThreeStepMl => {
            let log_d: Vec<f64> = assigned
                .iter()
                .flat_map(|t| (0..g).map(|s| d[s][*t].max(f64::MIN_POSITIVE).ln()).collect::<Vec<_>>())
                .collect();
            let start = if bch_fit.gamma.iter().all(|v| v.is_finite()) {
                bch_fit.gamma.clone()
            } else {
                naive.gamma.clone()
            };
            let (gamma, converged) = ml_em(w, p, &log_d, g, weights, start);
            let h = ml_hessian(w, p, &log_d, g, weights, &gamma);
            (gamma.clone(), information_covariance(&h)?, converged)
        }
        _ => {
            let covariance = bch_sandwich(w, p, &bch, g, weights, &bch_fit.gamma)?;
            // A line search that can no longer raise the objective ends the iteration
            // and counts as converged here (the step-three flag has always meant "did
            // not run out of iterations or meet a singular Hessian").
            let converged = matches!(bch_fit.outcome, Outcome::Converged | Outcome::LineSearchFailed);
            (bch_fit.gamma.clone(), covariance, converged)
        }
    };
    Ok(StepThree {
        method,
        classification: d,
        misclassified,
        gamma,
        covariance,
        naive_gamma: naive.gamma,
        naive_covariance,
        converged,
    })
}

/// The classification-error matrix D[s][t] = P(assigned t | cluster s) from the
/// posteriors and the assignments, and the share misclassified, 1 − Σ_s N_s D[s][s] / N.
fn classification(tau: &[f64], g: usize, weights: &[f64], assigned: &[usize]) -> Result<(Vec<Vec<f64>>, f64), String> {
    let mut d = vec![vec![0.0; g]; g];
    let mut size = vec![0.0; g];
    for ((row, c), t) in tau.chunks_exact(g).zip(weights).zip(assigned) {
        for s in 0..g {
            d[s][*t] += c * row[s];
            size[s] += c * row[s];
        }
    }
    for (row, n_s) in d.iter_mut().zip(&size) {
        if !(*n_s > 0.0) {
            return Err("a cluster has no posterior weight".to_string());
        }
        for v in row.iter_mut() {
            *v /= n_s;
        }
    }
    let total: f64 = size.iter().sum();
    let misclassified = 1.0 - (0..g).map(|s| size[s] * d[s][s]).sum::<f64>() / total;
    Ok((d, misclassified))
}

/// The robust sandwich H⁻¹ (Σ_i u_i u_i′) H⁻¹ of the BCH-weighted logit at `gamma`.
fn bch_sandwich(
    w: &[f64],
    p: usize,
    bch: &[f64],
    g: usize,
    weights: &[f64],
    gamma: &[f64],
) -> Result<DMatrix<f64>, String> {
    let (_, _, h) = logit_score_hessian(w, p, bch, g, weights, 0.0, gamma);
    let hinv = inverse(-h, "step-3 Hessian")?;
    let m = (g - 1) * p;
    let mut meat = DMatrix::zeros(m, m);
    let mut lp = vec![0.0; g];
    let mut u = vec![0.0; m];
    for (i, c) in weights.iter().enumerate() {
        if *c == 0.0 {
            continue;
        }
        let wr = &w[i * p..(i + 1) * p];
        log_softmax_row(gamma, p, wr, &mut lp);
        for k in 1..g {
            let r = c * (bch[i * g + k] - lp[k].exp());
            for j in 0..p {
                u[(k - 1) * p + j] = r * wr[j];
            }
        }
        for a in 0..m {
            for b in 0..m {
                meat[(a, b)] += u[a] * u[b];
            }
        }
    }
    Ok(&hinv * meat * &hinv)
}

/// Responsibilities of the ML step at γ (n×g) and its log-likelihood.
fn ml_posteriors(w: &[f64], p: usize, log_d: &[f64], g: usize, weights: &[f64], gamma: &[f64], tau: &mut [f64]) -> f64 {
    let mut lp = vec![0.0; g];
    let mut loglik = 0.0;
    for (i, c) in weights.iter().enumerate() {
        log_softmax_row(gamma, p, &w[i * p..(i + 1) * p], &mut lp);
        let row = &mut tau[i * g..(i + 1) * g];
        for s in 0..g {
            row[s] = lp[s] + log_d[i * g + s];
        }
        loglik += c * softmax_in_place(row);
    }
    loglik
}

fn ml_em(w: &[f64], p: usize, log_d: &[f64], g: usize, weights: &[f64], mut gamma: Vec<f64>) -> (Vec<f64>, bool) {
    let mut tau = vec![0.0; log_d.len()];
    let mut last = ml_posteriors(w, p, log_d, g, weights, &gamma, &mut tau);
    for _ in 0..ML_MAX_ITERATIONS {
        let rows = LogitRows {
            w,
            p,
            tau: &tau,
            g,
            weights,
            ridge: 0.0,
        };
        gamma = fit_multinomial_logit(&rows, &gamma, MAX_NEWTON_ITERATIONS).gamma;
        let ll = ml_posteriors(w, p, log_d, g, weights, &gamma, &mut tau);
        if (ll - last).abs() <= ML_TOLERANCE * ll.abs() {
            return (gamma, true);
        }
        last = ll;
    }
    (gamma, false)
}

/// Score of the ML step: Σ_i c_i (τ_is − π_is) w_i for clusters 2..g.
fn ml_score(w: &[f64], p: usize, log_d: &[f64], g: usize, weights: &[f64], gamma: &[f64]) -> Vec<f64> {
    let mut tau = vec![0.0; log_d.len()];
    ml_posteriors(w, p, log_d, g, weights, gamma, &mut tau);
    let mut lp = vec![0.0; g];
    let mut score = vec![0.0; (g - 1) * p];
    for (i, c) in weights.iter().enumerate() {
        let wr = &w[i * p..(i + 1) * p];
        log_softmax_row(gamma, p, wr, &mut lp);
        for k in 1..g {
            let r = c * (tau[i * g + k] - lp[k].exp());
            for j in 0..p {
                score[(k - 1) * p + j] += r * wr[j];
            }
        }
    }
    score
}

/// Hessian of the ML step's log-likelihood by central differences of its score.
fn ml_hessian(w: &[f64], p: usize, log_d: &[f64], g: usize, weights: &[f64], gamma: &[f64]) -> DMatrix<f64> {
    let m = gamma.len();
    let mut h = DMatrix::zeros(m, m);
    for j in 0..m {
        let mut up = gamma.to_vec();
        up[j] += ML_STEP;
        let mut down = gamma.to_vec();
        down[j] -= ML_STEP;
        let (a, b) = (
            ml_score(w, p, log_d, g, weights, &up),
            ml_score(w, p, log_d, g, weights, &down),
        );
        for i in 0..m {
            h[(i, j)] = (a[i] - b[i]) / (2.0 * ML_STEP);
        }
    }
    0.5 * (&h + h.transpose())
}
