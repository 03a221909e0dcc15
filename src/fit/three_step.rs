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
//! - **Two-step** (Bakk & Kuha 2018): maximise Σ_i c_i log Σ_s π_s(w_i; γ) f_s(y_i), the
//!   full likelihood with the cluster models f_s held at step 1 (no assignments). Since
//!   step 1's posteriors are τ_is ∝ π̂_s f_s(y_i), log f_s(y_i) = log τ_is − log π̂_s up to a
//!   constant per row, which changes neither the estimate nor its information; so this is
//!   the ML step with those in place of log D[s][W_i]. Standard errors as for ML.
//!
//! All three treat step 1 as known, so the covariance computed here leaves out the step-1
//! uncertainty and is too small (in our simulations its 95% intervals covered 92–93%);
//! the inference step adds step 1's part (`inference::step_three`, after Bakk, Oberski &
//! Vermunt 2014). Under sampling weights the ML step's covariance is a sandwich too.
//! Plain classify-analyze (a logit of the assignments) is kept as a
//! labelled contrast: it attenuates the effects when classification is imperfect.

use crate::data::Design;
use crate::model::gating::{fit_multinomial_logit, logit_score_hessian, LogitRows, MAX_NEWTON_ITERATIONS};
use crate::numerics::newton::Outcome;
use crate::numerics::{log_softmax_row, most_likely, softmax_in_place};
use crate::spec::{Method, WeightType};
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
    /// BCH, ML or two-step.
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

/// The unpenalised logit of targets `tau` (n×g) on the covariate design.
fn logit_rows<'a>(design: &'a Design, tau: &'a [f64], g: usize, weights: &'a [f64]) -> LogitRows<'a> {
    LogitRows {
        w: &design.x,
        p: design.p(),
        tau,
        g,
        weights,
        ridge: 0.0,
    }
}

/// The log shares of a step-1 model (estimated proportions, no gating covariates).
pub fn log_shares(model: &crate::model::Model) -> Vec<f64> {
    let mut out = vec![0.0; model.clusters()];
    model.gating.log_priors(&[], &mut out);
    out
}

/// Step 2: each row's most likely cluster under the step-1 posteriors `tau` (n×g).
pub fn assignments(tau: &[f64], g: usize) -> Vec<usize> {
    tau.chunks_exact(g).map(most_likely).collect()
}

/// The corrected step-3 coefficients and what the covariance needs: BCH's pseudo-posteriors
/// (row i, cluster s gets (D⁻¹)[W_i][s]) or the ML step's posteriors, as each row's
/// target in the logit score, and whether the optimiser met its tolerance.
struct Corrected {
    gamma: Vec<f64>,
    targets: Vec<f64>,
    log_d: Option<Vec<f64>>,
    converged: bool,
}

#[allow(clippy::too_many_arguments)] // step 1's posteriors and shares, and step 3's data
fn corrected(
    method: Method,
    tau: &[f64],
    log_pi: &[f64],
    g: usize,
    weights: &[f64],
    design: &Design,
    assigned: &[usize],
    start: &[f64],
) -> Result<(Corrected, Vec<Vec<f64>>, f64), String> {
    let (w, p) = (&design.x[..], design.p());
    let (d, misclassified) = classification(tau, g, weights, assigned)?;
    let dm = DMatrix::from_fn(g, g, |s, t| d[s][t]);
    let dinv = inverse(dm, "classification-error matrix (the clusters cannot be told apart)")?;
    let mut bch = vec![0.0; assigned.len() * g];
    for (i, t) in assigned.iter().enumerate() {
        for s in 0..g {
            bch[i * g + s] = dinv[(*t, s)];
        }
    }
    let bch_fit = fit_multinomial_logit(&logit_rows(design, &bch, g, weights), start, MAX_NEWTON_ITERATIONS);
    let out = match method {
        Method::ThreeStepMl | Method::TwoStep => {
            let log_d: Vec<f64> = if method == Method::TwoStep {
                tau.chunks_exact(g)
                    .flat_map(|row| (0..g).map(|s| row[s].max(f64::MIN_POSITIVE).ln() - log_pi[s]))
                    .collect()
            } else {
                assigned
                    .iter()
                    .flat_map(|t| (0..g).map(|s| d[s][*t].max(f64::MIN_POSITIVE).ln()))
                    .collect()
            };
            let from = if bch_fit.gamma.iter().all(|v| v.is_finite()) {
                bch_fit.gamma
            } else {
                start.to_vec()
            };
            let (gamma, converged) = ml_em(w, p, &log_d, g, weights, from);
            let mut targets = vec![0.0; log_d.len()];
            ml_posteriors(w, p, &log_d, g, weights, &gamma, &mut targets);
            Corrected {
                gamma,
                targets,
                log_d: Some(log_d),
                converged,
            }
        }
        // A line search that can no longer raise the objective ends the iteration and
        // counts as converged here (the step-three flag has always meant "did not run out
        // of iterations or meet a singular Hessian").
        _ => Corrected {
            converged: matches!(bch_fit.outcome, Outcome::Converged | Outcome::LineSearchFailed),
            gamma: bch_fit.gamma,
            targets: bch,
            log_d: None,
        },
    };
    Ok((out, d, misclassified))
}

/// Step 3's corrected coefficients again, from other step-1 posteriors `tau`, log shares
/// `log_pi` and assignments (for the step-1 correction of the standard errors and the
/// bootstrap), starting from `start`; an error when the step-3 optimiser did not converge.
#[allow(clippy::too_many_arguments)] // step 1's posteriors and shares, and step 3's data
pub fn re_estimate(
    method: Method,
    tau: &[f64],
    log_pi: &[f64],
    g: usize,
    weights: &[f64],
    design: &Design,
    assigned: &[usize],
    start: &[f64],
) -> Result<Vec<f64>, String> {
    let (c, _, _) = corrected(method, tau, log_pi, g, weights, design, assigned, start)?;
    if !c.converged || c.gamma.iter().any(|v| !v.is_finite()) {
        return Err("step 3 did not converge".to_string());
    }
    Ok(c.gamma)
}

/// Step 2 and 3 from step-1 posteriors `tau` (n×g) and log shares `log_pi`, case weights
/// (and what they mean) and the covariate design. The covariance is step 3's own (step 1
/// taken as known); the inference step adds step 1's part.
#[allow(clippy::too_many_arguments)] // step 1's posteriors and shares, and step 3's data
pub fn estimate(
    method: Method,
    tau: &[f64],
    log_pi: &[f64],
    g: usize,
    weights: &[f64],
    weight_type: Option<WeightType>,
    design: &Design,
) -> Result<StepThree, String> {
    let (w, p) = (&design.x[..], design.p());
    let n = weights.len();
    let assigned = assignments(tau, g);
    let zeros = vec![0.0; (g - 1) * p];

    // Classify-analyze.
    let mut onehot = vec![0.0; n * g];
    for (i, t) in assigned.iter().enumerate() {
        onehot[i * g + t] = 1.0;
    }
    let naive = fit_multinomial_logit(&logit_rows(design, &onehot, g, weights), &zeros, MAX_NEWTON_ITERATIONS);
    let (_, _, h) = logit_score_hessian(w, p, &onehot, g, weights, 0.0, &naive.gamma);
    let naive_covariance = information_covariance(&h)?;

    let (c, d, misclassified) = corrected(method, tau, log_pi, g, weights, design, &assigned, &naive.gamma)?;
    let h = match &c.log_d {
        Some(log_d) => ml_hessian(w, p, log_d, g, weights, &c.gamma),
        None => logit_score_hessian(w, p, &c.targets, g, weights, 0.0, &c.gamma).2,
    };
    // ML under no or frequency weights: the inverse information. BCH, and ML under
    // sampling weights: the robust sandwich, with the rows (or, under frequency weights,
    // the people) as the units.
    let covariance = if c.log_d.is_some() && weight_type != Some(WeightType::Sampling) {
        information_covariance(&h)?
    } else {
        let hinv = inverse(-h, "step-3 Hessian")?;
        let meat = logit_meat(w, p, &c.targets, g, weights, weight_type, &c.gamma);
        &hinv * meat * &hinv
    };
    Ok(StepThree {
        method,
        classification: d,
        misclassified,
        gamma: c.gamma,
        covariance,
        naive_gamma: naive.gamma,
        naive_covariance,
        converged: c.converged,
    })
}

/// The classification-error matrix D[s][t] = P(assigned t | cluster s) from the
/// posteriors and the assignments, and the share misclassified, 1 − Σ_s N_s D[s][s] / N.
pub fn classification(
    tau: &[f64],
    g: usize,
    weights: &[f64],
    assigned: &[usize],
) -> Result<(Vec<Vec<f64>>, f64), String> {
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

/// The middle of step 3's sandwich: the variance of the total of the row scores
/// u_i = c_i (r_i − π_i(γ)) ⊗ w_i, with r_i the row's targets (BCH pseudo-posteriors or the
/// ML step's posteriors). As in the main sandwich: m/(m − 1) Σ_i u_i u_i′ over the m rows of
/// positive weight, or under frequency weights N/(N − 1) Σ_i u_i u_i′ / c_i with N = Σ c_i
/// (each of a row's c_i people has the score u_i / c_i).
fn logit_meat(
    w: &[f64],
    p: usize,
    targets: &[f64],
    g: usize,
    weights: &[f64],
    weight_type: Option<WeightType>,
    gamma: &[f64],
) -> DMatrix<f64> {
    let frequency = weight_type == Some(WeightType::Frequency);
    let m = (g - 1) * p;
    let mut meat = DMatrix::zeros(m, m);
    let mut lp = vec![0.0; g];
    let mut u = vec![0.0; m];
    for (i, c) in weights.iter().enumerate() {
        if *c <= 0.0 {
            continue;
        }
        let wr = &w[i * p..(i + 1) * p];
        log_softmax_row(gamma, p, wr, &mut lp);
        for k in 1..g {
            let r = c * (targets[i * g + k] - lp[k].exp());
            for j in 0..p {
                u[(k - 1) * p + j] = r * wr[j];
            }
        }
        let scale = if frequency { 1.0 / c } else { 1.0 };
        for a in 0..m {
            for b in 0..m {
                meat[(a, b)] += scale * u[a] * u[b];
            }
        }
    }
    let units = if frequency {
        crate::numerics::sum(weights)
    } else {
        weights.iter().filter(|c| **c > 0.0).count() as f64
    };
    if units > 1.0 {
        meat *= units / (units - 1.0);
    }
    meat
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
