//! Distal outcomes: does cluster membership predict an outcome that is not part of the
//! model (a later diagnosis, sick leave, a lung-function change)? Each row is assigned to
//! its most likely cluster, and the outcome's mean (continuous), risk (binary) or mean count
//! (count) per cluster is estimated with a correction for the assignment errors, the
//! classification-error matrix D[s][t] = P(assigned t | cluster s) of three-step estimation
//! (`fit::three_step`):
//! - **BCH** (Bolck, Croon & Hagenaars 2004; Vermunt 2010; Bakk & Vermunt 2016): a weighted
//!   mean per cluster s, row i weighted by (D⁻¹)[W_i][s]. It assumes nothing about the
//!   outcome's distribution within a cluster, which is why it is the default.
//! - **ML** (Vermunt 2010): the mixture Σ_s π_s D[s][W_i] f(y_i | θ_s), with f normal
//!   (cluster-specific mean and variance), Bernoulli or Poisson, fitted by EM. More
//!   efficient when f is right; Bakk & Vermunt (2016) found it biased when a continuous
//!   outcome is skewed or its variances differ much.
//!
//! Errors: a sandwich over the rows (or the units of a survey design, or people under
//! frequency weights), or for ML without sampling weights the inverse observed information;
//! then step 1's part C V₁ C′ is added, C found by differences through the fitted model
//! (Bakk, Oberski & Vermunt 2014), as for three-step gating effects. With
//! `standard_errors = "bootstrap"` each replicate refits the model, assigns the rows again
//! and re-estimates the outcome.
//!
//! A row missing the outcome is left out of its comparison only (D comes from every row).
//! Reported per cluster with a 95% interval (on the logit scale for risks and the log scale
//! for mean counts, so it stays in range), against the cluster numbered 1 as a difference,
//! risk ratio or ratio of mean counts, and with a joint Wald test that the outcome is the
//! same in every cluster (G − 1 degrees of freedom).

use super::effects::{chi_squared_p_value, Z_95};
use super::step_three::{posteriors, through_step_one};
use super::{bootstrap_draws, covariance_of, InferenceSettings};
use crate::data::SurveyDesign;
use crate::fit::three_step::{assignments, classification};
use crate::inference::chart::Chart;
use crate::model::{FitData, Model};
use crate::spec::{ErrorMethod, OutcomeMethod, VariableType, WeightType};
use nalgebra::DMatrix;
use serde::Serialize;

/// EM iterations of the ML estimate at most.
const ML_MAX_ITERATIONS: usize = 5000;
/// Relative change of the ML log-likelihood that counts as converged.
const ML_TOLERANCE: f64 = 1e-13;
/// Relative step of the ML information's central differences.
const ML_STEP: f64 = 1e-5;

/// What kind of outcome, and so what is estimated per cluster.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, schemars::JsonSchema)]
#[serde(rename_all = "kebab-case")]
pub enum OutcomeKind {
    /// A mean; clusters compared by differences.
    Continuous,
    /// A risk (the share with the outcome); clusters compared by risk ratios.
    Binary,
    /// A mean count; clusters compared by ratios of mean counts.
    Count,
}

impl OutcomeKind {
    /// The kind of a column type; None for a categorical one.
    pub fn of(t: &VariableType) -> Option<OutcomeKind> {
        match t {
            VariableType::Continuous => Some(OutcomeKind::Continuous),
            VariableType::Binary => Some(OutcomeKind::Binary),
            VariableType::Count => Some(OutcomeKind::Count),
            VariableType::Categorical { .. } => None,
        }
    }

    /// What is estimated per cluster, in words.
    pub fn estimate_word(&self) -> &'static str {
        match self {
            OutcomeKind::Continuous => "mean",
            OutcomeKind::Binary => "risk",
            OutcomeKind::Count => "mean count",
        }
    }

    /// How two clusters are compared, in words.
    pub fn contrast_word(&self) -> &'static str {
        match self {
            OutcomeKind::Continuous => "difference",
            OutcomeKind::Binary => "risk ratio",
            OutcomeKind::Count => "ratio of mean counts",
        }
    }
}

/// How a distal outcome's errors were made.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, schemars::JsonSchema)]
#[serde(rename_all = "kebab-case")]
pub enum OutcomeErrors {
    /// Analytic, with step 1's part added.
    WithStepOne,
    /// Analytic, the fitted model taken as known (step 1's part could not be computed).
    StepOneKnown,
    /// Bootstrap replicates that refit the model and re-estimate the outcome.
    Bootstrap,
}

/// A distal outcome compared across one fit's clusters, in the fit's own cluster order.
#[derive(Debug, Clone)]
pub struct OutcomeEstimate {
    /// The outcome column.
    pub outcome: String,
    /// Its kind.
    pub kind: OutcomeKind,
    /// BCH or ML.
    pub method: OutcomeMethod,
    /// Rows with the outcome (of positive weight).
    pub rows: usize,
    /// Mean, risk or mean count per fitted cluster.
    pub values: Vec<f64>,
    /// Their covariance.
    pub covariance: DMatrix<f64>,
    /// How the covariance was made.
    pub errors: OutcomeErrors,
    /// Bootstrap: usable replicates of those drawn.
    pub replicates: Option<(usize, usize)>,
    /// With step 1's part added: the largest relative increase of a value's standard error
    /// over its error with the fitted model taken as known (corrected / own − 1).
    pub step_one_increase: Option<f64>,
}

/// The data of one outcome comparison.
pub struct OutcomeData<'a> {
    /// Kind.
    pub kind: OutcomeKind,
    /// Values per row, NaN where missing.
    pub y: &'a [f64],
    /// Case weights.
    pub weights: &'a [f64],
    /// What the weights mean.
    pub weight_type: Option<WeightType>,
    /// Strata and units, when the data have them.
    pub survey: Option<&'a SurveyDesign>,
}

/// An estimate and what its covariance needs: each row's score per estimated coordinate
/// (row i's scores at `scores[i * m..]`, already times its weight) and the information.
struct Fitted {
    values: Vec<f64>,
    /// Coordinates θ (BCH: the values; ML: shares' logits and each cluster's parameters).
    m: usize,
    scores: Vec<f64>,
    /// −∂score/∂θ (BCH: diagonal of the weight totals).
    information: DMatrix<f64>,
    /// ∂values/∂θ.
    jacobian: DMatrix<f64>,
    /// Whether the inverse information is the covariance (ML, no sampling weights).
    likelihood: bool,
}

/// The per-cluster estimate from step-1 posteriors `tau` and assignments.
pub fn values(
    method: OutcomeMethod,
    data: &OutcomeData,
    tau: &[f64],
    g: usize,
    assigned: &[usize],
) -> Result<Vec<f64>, String> {
    fitted(method, data, tau, g, assigned).map(|f| f.values)
}

fn fitted(
    method: OutcomeMethod,
    data: &OutcomeData,
    tau: &[f64],
    g: usize,
    assigned: &[usize],
) -> Result<Fitted, String> {
    let (d, _) = classification(tau, g, data.weights, assigned)?;
    match method {
        OutcomeMethod::Bch => bch(data, &d, g, assigned),
        OutcomeMethod::Ml => ml(data, &d, g, assigned),
    }
}

/// Whether row i enters the comparison.
fn present(data: &OutcomeData, i: usize) -> bool {
    data.weights[i] > 0.0 && !data.y[i].is_nan()
}

fn bch(data: &OutcomeData, d: &[Vec<f64>], g: usize, assigned: &[usize]) -> Result<Fitted, String> {
    let dm = DMatrix::from_fn(g, g, |s, t| d[s][t]);
    let dinv = dm
        .try_inverse()
        .ok_or("the classification-error matrix is singular (the clusters cannot be told apart)")?;
    let n = data.y.len();
    let (mut num, mut den) = (vec![0.0; g], vec![0.0; g]);
    for i in (0..n).filter(|i| present(data, *i)) {
        for s in 0..g {
            let w = data.weights[i] * dinv[(assigned[i], s)];
            num[s] += w * data.y[i];
            den[s] += w;
        }
    }
    if let Some(s) = (0..g).find(|s| !(den[*s] > 0.0)) {
        return Err(format!(
            "cluster {} has no weight among the rows with the outcome",
            s + 1
        ));
    }
    let values: Vec<f64> = (0..g).map(|s| num[s] / den[s]).collect();
    let mut scores = vec![0.0; n * g];
    for i in (0..n).filter(|i| present(data, *i)) {
        for s in 0..g {
            scores[i * g + s] = data.weights[i] * dinv[(assigned[i], s)] * (data.y[i] - values[s]);
        }
    }
    Ok(Fitted {
        m: g,
        scores,
        information: DMatrix::from_diagonal(&nalgebra::DVector::from_vec(den)),
        jacobian: DMatrix::identity(g, g),
        values,
        likelihood: false,
    })
}

/// The ML coordinates: θ = (α_2..α_G, then per cluster its mean and log sd for a continuous
/// outcome, the logit of its risk, or the log of its mean count).
struct MlModel {
    kind: OutcomeKind,
    g: usize,
}

impl MlModel {
    fn per_cluster(&self) -> usize {
        if self.kind == OutcomeKind::Continuous {
            2
        } else {
            1
        }
    }

    fn len(&self) -> usize {
        self.g - 1 + self.g * self.per_cluster()
    }

    /// log π_s (softmax of 0, α_2..α_G).
    fn log_shares(&self, theta: &[f64]) -> Vec<f64> {
        let mut l: Vec<f64> = std::iter::once(0.0)
            .chain(theta[..self.g - 1].iter().copied())
            .collect();
        let lse = crate::numerics::log_sum_exp(&l);
        l.iter_mut().for_each(|v| *v -= lse);
        l
    }

    /// log f(y | cluster s).
    fn log_density(&self, theta: &[f64], s: usize, y: f64) -> f64 {
        let at = self.g - 1 + s * self.per_cluster();
        match self.kind {
            OutcomeKind::Continuous => {
                let (mu, log_sd) = (theta[at], theta[at + 1]);
                let z = (y - mu) * (-log_sd).exp();
                -0.5 * z * z - log_sd - 0.5 * (2.0 * std::f64::consts::PI).ln()
            }
            OutcomeKind::Binary => {
                let eta = theta[at];
                // log p = −log(1 + e^−η), log(1 − p) = −log(1 + e^η)
                if y > 0.5 {
                    -softplus(-eta)
                } else {
                    -softplus(eta)
                }
            }
            OutcomeKind::Count => {
                let eta = theta[at];
                y * eta - eta.exp() - ln_factorial(y)
            }
        }
    }

    /// Per cluster: mean, risk or mean count.
    fn values(&self, theta: &[f64]) -> Vec<f64> {
        (0..self.g)
            .map(|s| {
                let eta = theta[self.g - 1 + s * self.per_cluster()];
                match self.kind {
                    OutcomeKind::Continuous => eta,
                    OutcomeKind::Binary => 1.0 / (1.0 + (-eta).exp()),
                    OutcomeKind::Count => eta.exp(),
                }
            })
            .collect()
    }

    /// Row i's posteriors over the clusters (into `r`) and its log-likelihood.
    fn row(&self, theta: &[f64], log_pi: &[f64], log_d: &[f64], y: f64, r: &mut [f64]) -> f64 {
        for (s, rs) in r.iter_mut().enumerate() {
            *rs = log_pi[s] + log_d[s] + self.log_density(theta, s, y);
        }
        crate::numerics::softmax_in_place(r)
    }

    /// Row i's score ∂ℓ_i/∂θ given its posteriors.
    fn score(&self, theta: &[f64], pi: &[f64], r: &[f64], y: f64, out: &mut [f64]) {
        for k in 1..self.g {
            out[k - 1] = r[k] - pi[k];
        }
        for (s, rs) in r.iter().enumerate() {
            let at = self.g - 1 + s * self.per_cluster();
            match self.kind {
                OutcomeKind::Continuous => {
                    let (mu, var) = (theta[at], (2.0 * theta[at + 1]).exp());
                    out[at] = rs * (y - mu) / var;
                    out[at + 1] = rs * ((y - mu) * (y - mu) / var - 1.0);
                }
                OutcomeKind::Binary => out[at] = rs * (y - 1.0 / (1.0 + (-theta[at]).exp())),
                OutcomeKind::Count => out[at] = rs * (y - theta[at].exp()),
            }
        }
    }
}

fn softplus(x: f64) -> f64 {
    if x > 0.0 {
        x + (-x).exp().ln_1p()
    } else {
        x.exp().ln_1p()
    }
}

fn ln_factorial(y: f64) -> f64 {
    (2..=y as u64).map(|k| (k as f64).ln()).sum()
}

/// The ML rows: for each row with the outcome, its index and log D[s][W_i] per cluster.
fn ml_rows(data: &OutcomeData, d: &[Vec<f64>], g: usize, assigned: &[usize]) -> Vec<(usize, Vec<f64>)> {
    (0..data.y.len())
        .filter(|i| present(data, *i))
        .map(|i| {
            (
                i,
                (0..g).map(|s| d[s][assigned[i]].max(f64::MIN_POSITIVE).ln()).collect(),
            )
        })
        .collect()
}

/// The ML estimate's total score and log-likelihood at θ.
fn ml_total(model: &MlModel, data: &OutcomeData, rows: &[(usize, Vec<f64>)], theta: &[f64]) -> (Vec<f64>, f64) {
    let log_pi = model.log_shares(theta);
    let pi: Vec<f64> = log_pi.iter().map(|l| l.exp()).collect();
    let (mut r, mut u) = (vec![0.0; model.g], vec![0.0; model.len()]);
    let mut total = vec![0.0; model.len()];
    let mut loglik = 0.0;
    for (i, log_d) in rows {
        let (y, c) = (data.y[*i], data.weights[*i]);
        loglik += c * model.row(theta, &log_pi, log_d, y, &mut r);
        model.score(theta, &pi, &r, y, &mut u);
        for (t, v) in total.iter_mut().zip(&u) {
            *t += c * v;
        }
    }
    (total, loglik)
}

fn ml(data: &OutcomeData, d: &[Vec<f64>], g: usize, assigned: &[usize]) -> Result<Fitted, String> {
    let model = MlModel { kind: data.kind, g };
    let rows = ml_rows(data, d, g, assigned);
    if rows.is_empty() {
        return Err("no row has the outcome".to_string());
    }
    // Start: every cluster at the overall mean (spread a little by the assignments), equal shares.
    let total_w: f64 = rows.iter().map(|(i, _)| data.weights[*i]).sum();
    let mean = rows.iter().map(|(i, _)| data.weights[*i] * data.y[*i]).sum::<f64>() / total_w;
    let var = rows
        .iter()
        .map(|(i, _)| data.weights[*i] * (data.y[*i] - mean).powi(2))
        .sum::<f64>()
        / total_w;
    let floor = 1e-8 * var.max(f64::MIN_POSITIVE);
    let mut theta = vec![0.0; model.len()];
    let mut tau: Vec<f64> = vec![0.0; rows.len() * g];
    for (k, (i, _)) in rows.iter().enumerate() {
        tau[k * g + assigned[*i]] = 1.0;
    }
    m_step(&model, data, &rows, &tau, floor, &mut theta)?;
    let mut last = f64::NEG_INFINITY;
    let mut converged = false;
    for _ in 0..ML_MAX_ITERATIONS {
        let log_pi = model.log_shares(&theta);
        let mut loglik = 0.0;
        for (k, (i, log_d)) in rows.iter().enumerate() {
            loglik += data.weights[*i] * model.row(&theta, &log_pi, log_d, data.y[*i], &mut tau[k * g..(k + 1) * g]);
        }
        if (loglik - last).abs() <= ML_TOLERANCE * loglik.abs() {
            converged = true;
            break;
        }
        last = loglik;
        m_step(&model, data, &rows, &tau, floor, &mut theta)?;
    }
    if !converged {
        return Err(format!(
            "the ML estimate did not converge in {ML_MAX_ITERATIONS} EM iterations"
        ));
    }
    let m = model.len();
    let mut scores = vec![0.0; data.y.len() * m];
    let log_pi = model.log_shares(&theta);
    let pi: Vec<f64> = log_pi.iter().map(|l| l.exp()).collect();
    let mut r = vec![0.0; g];
    for (i, log_d) in &rows {
        let y = data.y[*i];
        model.row(&theta, &log_pi, log_d, y, &mut r);
        let out = &mut scores[i * m..(i + 1) * m];
        model.score(&theta, &pi, &r, y, out);
        out.iter_mut().for_each(|v| *v *= data.weights[*i]);
    }
    // −H by central differences of the total score.
    let mut information = DMatrix::zeros(m, m);
    for j in 0..m {
        let h = ML_STEP * (1.0 + theta[j].abs());
        let mut up = theta.clone();
        up[j] += h;
        let mut down = theta.clone();
        down[j] -= h;
        let (a, b) = (
            ml_total(&model, data, &rows, &up).0,
            ml_total(&model, data, &rows, &down).0,
        );
        for i in 0..m {
            information[(i, j)] = -(a[i] - b[i]) / (2.0 * h);
        }
    }
    let information = 0.5 * (&information + information.transpose());
    let values = model.values(&theta);
    let mut jacobian = DMatrix::zeros(g, m);
    for (s, v) in values.iter().enumerate() {
        let at = g - 1 + s * model.per_cluster();
        jacobian[(s, at)] = match data.kind {
            OutcomeKind::Continuous => 1.0,
            OutcomeKind::Binary => v * (1.0 - v),
            OutcomeKind::Count => *v,
        };
    }
    Ok(Fitted {
        values,
        m,
        scores,
        information,
        jacobian,
        likelihood: data.weight_type != Some(WeightType::Sampling) && data.survey.is_none(),
    })
}

/// The ML M-step: shares and each cluster's parameters, weighted by the posteriors `tau`.
fn m_step(
    model: &MlModel,
    data: &OutcomeData,
    rows: &[(usize, Vec<f64>)],
    tau: &[f64],
    floor: f64,
    theta: &mut [f64],
) -> Result<(), String> {
    let g = model.g;
    let (mut n, mut sy) = (vec![0.0; g], vec![0.0; g]);
    for (k, (i, _)) in rows.iter().enumerate() {
        let (c, y) = (data.weights[*i], data.y[*i]);
        for s in 0..g {
            n[s] += c * tau[k * g + s];
            sy[s] += c * tau[k * g + s] * y;
        }
    }
    if let Some(s) = (0..g).find(|s| !(n[*s] > 0.0)) {
        return Err(format!(
            "cluster {} has no weight among the rows with the outcome",
            s + 1
        ));
    }
    for k in 1..g {
        theta[k - 1] = (n[k] / n[0]).ln();
    }
    for s in 0..g {
        let at = g - 1 + s * model.per_cluster();
        let mean = sy[s] / n[s];
        theta[at] = match model.kind {
            OutcomeKind::Continuous => mean,
            OutcomeKind::Binary => {
                let p = mean.clamp(1e-12, 1.0 - 1e-12);
                (p / (1.0 - p)).ln()
            }
            OutcomeKind::Count => mean.max(1e-12).ln(),
        };
        if model.kind == OutcomeKind::Continuous {
            let ss: f64 = rows
                .iter()
                .enumerate()
                .map(|(k, (i, _))| data.weights[*i] * tau[k * g + s] * (data.y[*i] - mean).powi(2))
                .sum();
            theta[at + 1] = 0.5 * (ss / n[s]).max(floor).ln();
        }
    }
    Ok(())
}

/// The variance of the total score over the sampling units: a survey design's units within
/// strata; else the rows with the outcome, m/(m − 1) Σ u_i u_i′ (under frequency weights,
/// people: N/(N − 1) Σ u_i u_i′ / c_i).
fn meat(f: &Fitted, data: &OutcomeData) -> DMatrix<f64> {
    let m = f.m;
    let n = data.y.len();
    if let Some(design) = data.survey {
        return design
            .score_variance(m, data.weights, |add| {
                for i in 0..n {
                    add(i, &f.scores[i * m..(i + 1) * m]);
                }
                Ok::<(), ()>(())
            })
            .expect("the rows cannot fail");
    }
    let frequency = data.weight_type == Some(WeightType::Frequency);
    let mut out = DMatrix::zeros(m, m);
    let mut units = 0.0;
    for i in (0..n).filter(|i| present(data, *i)) {
        let u = &f.scores[i * m..(i + 1) * m];
        let c = data.weights[i];
        let scale = if frequency { 1.0 / c } else { 1.0 };
        units += if frequency { c } else { 1.0 };
        for a in 0..m {
            for b in 0..m {
                out[(a, b)] += scale * u[a] * u[b];
            }
        }
    }
    if units > 1.0 {
        out *= units / (units - 1.0);
    }
    out
}

/// The covariance of the values with the fitted model taken as known.
fn own_covariance(f: &Fitted, data: &OutcomeData) -> Result<DMatrix<f64>, String> {
    let inverse = f
        .information
        .clone()
        .try_inverse()
        .ok_or("the outcome's information matrix is singular")?;
    let v = if f.likelihood {
        inverse
    } else {
        &inverse * meat(f, data) * &inverse
    };
    Ok(&f.jacobian * v * f.jacobian.transpose())
}

/// A fitted model, its step-1 posteriors and, for analytic errors, its chart and the
/// covariance of the chart's coordinates.
pub struct StepOne<'a> {
    /// The fitted model.
    pub model: &'a Model,
    /// Its posteriors on `fd`'s rows.
    pub tau: &'a [f64],
    /// The rows it was fitted to.
    pub fd: &'a FitData<'a>,
    /// Its chart and V₁ (None with bootstrap errors, or when they could not be computed).
    pub chart: Option<(&'a Chart<'a>, &'a DMatrix<f64>)>,
}

/// One outcome compared across a fit's clusters.
pub fn compare_outcome(
    name: &str,
    method: OutcomeMethod,
    data: &OutcomeData,
    step_one: &StepOne,
    settings: &InferenceSettings,
    label: &str,
) -> Result<OutcomeEstimate, String> {
    let g = step_one.model.clusters();
    let assigned = assignments(step_one.tau, g);
    let f = fitted(method, data, step_one.tau, g, &assigned)?;
    let rows = (0..data.y.len()).filter(|i| present(data, *i)).count();
    let (covariance, errors, replicates, step_one_increase) = if settings.method == ErrorMethod::Bootstrap {
        let draws = bootstrap_draws(
            step_one.model,
            step_one.tau,
            step_one.fd,
            settings,
            &format!("outcome|{name}|{label}"),
            &|refit, resampled| {
                let t = posteriors(refit, resampled);
                let assigned = assignments(&t, g);
                let d = OutcomeData {
                    weights: resampled.weights,
                    ..*data
                };
                values(method, &d, &t, g, &assigned).ok()
            },
        )?;
        (
            covariance_of(&draws),
            OutcomeErrors::Bootstrap,
            Some((draws.len(), settings.replicates)),
            None,
        )
    } else {
        let own = own_covariance(&f, data)?;
        let part = step_one.chart.and_then(|(chart, v1)| {
            let re = |moved: &Model| values(method, data, &posteriors(moved, step_one.fd), g, &assigned);
            through_step_one(chart, v1, g, &re).ok()
        });
        match part {
            Some(part) => {
                let total = &own + part;
                let increase = (0..g)
                    .map(|k| (total[(k, k)] / own[(k, k)]).sqrt() - 1.0)
                    .fold(f64::NEG_INFINITY, f64::max);
                (total, OutcomeErrors::WithStepOne, None, Some(increase))
            }
            None => (own, OutcomeErrors::StepOneKnown, None, None),
        }
    };
    Ok(OutcomeEstimate {
        outcome: name.to_string(),
        kind: data.kind,
        method,
        rows,
        values: f.values,
        covariance,
        errors,
        replicates,
        step_one_increase,
    })
}

/// One cluster's estimate in the run's numbering.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct ClusterOutcome {
    /// The cluster's number in the run's files.
    pub cluster: usize,
    /// Mean, risk or mean count.
    pub estimate: f64,
    /// Its standard error.
    pub standard_error: f64,
    /// 95% interval (logit scale for a risk, log scale for a mean count, then carried
    /// back); null when the estimate is outside the range the scale allows.
    pub lower: Option<f64>,
    /// Upper end.
    pub upper: Option<f64>,
}

/// A cluster against the cluster numbered 1.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct OutcomeContrast {
    /// The cluster's number.
    pub cluster: usize,
    /// Difference (continuous), risk ratio (binary) or ratio of mean counts (count),
    /// against cluster 1; null when a ratio's estimates are not both positive.
    pub estimate: Option<f64>,
    /// 95% interval (ratios: on the log scale, carried back).
    pub lower: Option<f64>,
    /// Upper end.
    pub upper: Option<f64>,
    /// Two-sided Wald p-value of no difference.
    pub p_value: Option<f64>,
}

/// A distal outcome compared across a fit's clusters, as `results.json` gives it.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct OutcomeRecord {
    /// The outcome column.
    pub outcome: String,
    /// `continuous`, `binary` or `count`.
    pub kind: OutcomeKind,
    /// What is estimated per cluster: `mean`, `risk` or `mean count`.
    pub estimate: &'static str,
    /// How clusters are compared with cluster 1: `difference`, `risk ratio` or `ratio of
    /// mean counts`.
    pub contrast: &'static str,
    /// `bch` or `ml`.
    pub method: OutcomeMethod,
    /// Rows of positive weight with the outcome (the others are left out of this
    /// comparison only).
    pub rows_used: usize,
    /// How the errors were made: `with-step-one` (the fitted model's uncertainty
    /// included), `step-one-known` (it could not be, so the errors are too small) or
    /// `bootstrap`.
    pub errors: OutcomeErrors,
    /// Bootstrap replicates used, when `errors` is `bootstrap`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub replicates_used: Option<usize>,
    /// With `errors` `with-step-one`: the largest relative increase of a cluster's
    /// standard error over its error with the fitted model taken as known.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub step_one_increase: Option<f64>,
    /// Per cluster, by number.
    pub clusters: Vec<ClusterOutcome>,
    /// Clusters 2.. against cluster 1.
    pub contrasts: Vec<OutcomeContrast>,
    /// Wald statistic of one value in every cluster.
    pub joint_statistic: Option<f64>,
    /// Its degrees of freedom, G − 1.
    pub joint_df: usize,
    /// Its chi-squared p-value.
    pub joint_p_value: Option<f64>,
}

/// The record of an estimate with clusters by their `numbers` (fitted cluster k + 1 is
/// number `numbers[k]`).
pub fn record(e: &OutcomeEstimate, numbers: &[usize]) -> OutcomeRecord {
    let g = e.values.len();
    let mut order: Vec<usize> = (0..g).collect();
    order.sort_by_key(|k| numbers.get(*k).copied().unwrap_or(k + 1));
    let number = |k: usize| numbers.get(k).copied().unwrap_or(k + 1);
    let se = |k: usize| e.covariance[(k, k)].max(0.0).sqrt();
    let clusters = order
        .iter()
        .map(|&k| {
            let (v, s) = (e.values[k], se(k));
            let (lower, upper) = interval(e.kind, v, s);
            ClusterOutcome {
                cluster: number(k),
                estimate: v,
                standard_error: s,
                lower,
                upper,
            }
        })
        .collect();
    let first = order[0];
    let contrasts = order[1..].iter().map(|&k| contrast(e, first, k, number(k))).collect();
    let (joint_statistic, joint_p_value) = match joint_wald(&e.values, &e.covariance) {
        Some(w) => (Some(w), Some(chi_squared_p_value(w, g - 1))),
        None => (None, None),
    };
    OutcomeRecord {
        outcome: e.outcome.clone(),
        kind: e.kind,
        estimate: e.kind.estimate_word(),
        contrast: e.kind.contrast_word(),
        method: e.method,
        rows_used: e.rows,
        errors: e.errors,
        replicates_used: e.replicates.map(|r| r.0),
        step_one_increase: e.step_one_increase,
        clusters,
        contrasts,
        joint_statistic,
        joint_df: g - 1,
        joint_p_value,
    }
}

/// A 95% interval for a value with standard error `se`, on the scale that keeps it in
/// range.
fn interval(kind: OutcomeKind, v: f64, se: f64) -> (Option<f64>, Option<f64>) {
    match kind {
        OutcomeKind::Continuous => (Some(v - Z_95 * se), Some(v + Z_95 * se)),
        OutcomeKind::Binary if v > 0.0 && v < 1.0 => {
            let l = (v / (1.0 - v)).ln();
            let s = se / (v * (1.0 - v));
            let back = |x: f64| 1.0 / (1.0 + (-x).exp());
            (Some(back(l - Z_95 * s)), Some(back(l + Z_95 * s)))
        }
        OutcomeKind::Count if v > 0.0 => {
            let s = se / v;
            (Some(v * (-Z_95 * s).exp()), Some(v * (Z_95 * s).exp()))
        }
        _ => (None, None),
    }
}

/// Fitted cluster `k` against fitted cluster `base`.
fn contrast(e: &OutcomeEstimate, base: usize, k: usize, number: usize) -> OutcomeContrast {
    let v = &e.covariance;
    let (a, b) = (e.values[base], e.values[k]);
    let none = OutcomeContrast {
        cluster: number,
        estimate: None,
        lower: None,
        upper: None,
        p_value: None,
    };
    let p = |z: f64| Some(super::effects::normal_p_value(z));
    match e.kind {
        OutcomeKind::Continuous => {
            let d = b - a;
            let se = (v[(k, k)] + v[(base, base)] - 2.0 * v[(k, base)]).max(0.0).sqrt();
            OutcomeContrast {
                cluster: number,
                estimate: Some(d),
                lower: Some(d - Z_95 * se),
                upper: Some(d + Z_95 * se),
                p_value: if se > 0.0 { p(d / se) } else { None },
            }
        }
        _ if a > 0.0 && b > 0.0 => {
            let l = (b / a).ln();
            let var = v[(k, k)] / (b * b) + v[(base, base)] / (a * a) - 2.0 * v[(k, base)] / (a * b);
            let se = var.max(0.0).sqrt();
            OutcomeContrast {
                cluster: number,
                estimate: Some(b / a),
                lower: Some((l - Z_95 * se).exp()),
                upper: Some((l + Z_95 * se).exp()),
                p_value: if se > 0.0 { p(l / se) } else { None },
            }
        }
        _ => none,
    }
}

/// The Wald statistic of equal values in every cluster: the contrasts with the first,
/// c = L v, and c′ (L V L′)⁻¹ c. None with one cluster or a singular L V L′.
pub fn joint_wald(values: &[f64], covariance: &DMatrix<f64>) -> Option<f64> {
    let g = values.len();
    if g < 2 {
        return None;
    }
    let l = DMatrix::from_fn(g - 1, g, |r, c| {
        if c == 0 {
            -1.0
        } else if c == r + 1 {
            1.0
        } else {
            0.0
        }
    });
    let c = &l * nalgebra::DVector::from_column_slice(values);
    let inverse = (&l * covariance * l.transpose()).cholesky()?.inverse();
    let w = (c.transpose() * inverse * &c)[(0, 0)];
    w.is_finite().then_some(w)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// With perfect classification (posteriors 0 or 1), BCH is the plain mean of each
    /// assigned group and its error the usual sandwich of a mean.
    #[test]
    fn bch_with_certain_assignments_is_the_group_mean() {
        let tau = [1.0, 0.0, 1.0, 0.0, 0.0, 1.0, 0.0, 1.0, 0.0, 1.0];
        let y = [1.0, 3.0, 10.0, 12.0, 14.0];
        let w = [1.0; 5];
        let data = OutcomeData {
            kind: OutcomeKind::Continuous,
            y: &y,
            weights: &w,
            weight_type: None,
            survey: None,
        };
        let assigned = assignments(&tau, 2);
        let f = fitted(OutcomeMethod::Bch, &data, &tau, 2, &assigned).unwrap();
        assert_eq!(f.values, vec![2.0, 12.0]);
        let v = own_covariance(&f, &data).unwrap();
        // Σ (y − ȳ_s)² / n_s² × m/(m − 1): (1 + 1)/4 × 5/4 and (4 + 0 + 4)/9 × 5/4.
        assert!((v[(0, 0)] - 2.0 / 4.0 * 1.25).abs() < 1e-12);
        assert!((v[(1, 1)] - 8.0 / 9.0 * 1.25).abs() < 1e-12);
        assert!(v[(0, 1)].abs() < 1e-12);
    }

    /// A known misclassification: BCH undoes it exactly in expectation. Cluster 1 has
    /// mean 0, cluster 2 mean 10; D = [[0.8, 0.2], [0.1, 0.9]]. The rows are laid out so
    /// that the assigned groups hold those shares exactly.
    #[test]
    fn bch_undoes_a_known_misclassification() {
        // 10 rows of cluster 1 (8 assigned to 1, 2 to 2), 10 of cluster 2 (1 to 1, 9 to 2).
        let mut tau = Vec::new();
        let mut y = Vec::new();
        let mut assigned = Vec::new();
        for (truth, to, count) in [(0, 0, 8), (0, 1, 2), (1, 0, 1), (1, 1, 9)] {
            for _ in 0..count {
                // Posteriors that reproduce D: P(s | assigned t) = N_s D[s][t] / N_t.
                let p1 = if to == 0 { 8.0 / 9.0 } else { 2.0 / 11.0 };
                tau.extend([p1, 1.0 - p1]);
                y.push(if truth == 0 { 0.0 } else { 10.0 });
                assigned.push(to);
            }
        }
        let w = vec![1.0; y.len()];
        let data = OutcomeData {
            kind: OutcomeKind::Continuous,
            y: &y,
            weights: &w,
            weight_type: None,
            survey: None,
        };
        let (d, _) = classification(&tau, 2, &w, &assigned).unwrap();
        assert!((d[0][0] - 0.8).abs() < 1e-12 && (d[1][1] - 0.9).abs() < 1e-12);
        let v = values(OutcomeMethod::Bch, &data, &tau, 2, &assigned).unwrap();
        assert!(v[0].abs() < 1e-12 && (v[1] - 10.0).abs() < 1e-12, "{v:?}");
    }

    #[test]
    fn the_joint_test_is_zero_for_equal_values_and_a_squared_z_for_two() {
        let v = DMatrix::from_row_slice(2, 2, &[0.25, 0.0, 0.0, 0.75]);
        assert_eq!(joint_wald(&[3.0, 3.0], &v), Some(0.0));
        // (5 − 3)² / (0.25 + 0.75) = 4.
        assert!((joint_wald(&[3.0, 5.0], &v).unwrap() - 4.0).abs() < 1e-12);
        assert_eq!(joint_wald(&[3.0], &DMatrix::from_element(1, 1, 1.0)), None);
    }
}
