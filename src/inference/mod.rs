//! Inference for a fitted model: standard errors of every reported parameter, and effect
//! sizes with confidence intervals.
//!
//! Three ways to get the covariance matrix of the free parameters θ (see [`chart`]):
//! - **observed information** (default): −∂²ℓ/∂θ∂θ' of the observed-data log-likelihood,
//!   by central differences of its analytic score;
//! - **sandwich** (robust): H⁻¹ (Σ_i s_i s_i') H⁻¹ with the row scores s_i, also valid
//!   under case weights and a misspecified model;
//! - **bootstrap**: refits on rows resampled with replacement, each started from the
//!   fitted responsibilities, and the covariance of the reported parameters over the
//!   replicates.
//!
//! Reported parameters are on the original covariate scale, so the first two methods
//! carry the covariance to them by the delta method, with a numerical Jacobian.
//! Penalties (gating ridge, covariance prior, item smoothing) are left out of the
//! information: the standard errors are those of the log-likelihood at the estimate.

pub mod chart;
pub mod cluster_test;
pub mod effects;
pub mod outcomes;
pub mod screen;
pub mod step_three;

use crate::data::{Dataset, SurveyDesign};
use crate::fit::em::{self, EmSettings};
use crate::fit::{fit_data, PreparedPlacement};
use crate::model::family::{ParamBlock, Parameter};
use crate::model::gating::Gating;
use crate::model::{FitData, Model};
use crate::rng::Stream;
pub use crate::spec::ErrorMethod;
use crate::spec::WeightType;
use chart::Chart;
use nalgebra::DMatrix;
use rayon::prelude::*;

/// Relative step of the central differences of the score (times the coordinate's scale).
const SCORE_STEP: f64 = 1e-4;
/// Relative step of the Jacobian of the reported parameters.
const JACOBIAN_STEP: f64 = 1e-5;

/// Settings of the inference step.
#[derive(Debug, Clone, PartialEq)]
pub struct InferenceSettings {
    /// Method.
    pub method: ErrorMethod,
    /// Bootstrap replicates.
    pub replicates: usize,
    /// Master seed (bootstrap).
    pub seed: u64,
    /// EM settings of the bootstrap refits.
    pub em: EmSettings,
    /// What the case weights mean (None: no weights).
    pub weight_type: Option<WeightType>,
    /// Strata and sampling units (design-based sandwich), when the data have them.
    pub survey: Option<std::sync::Arc<SurveyDesign>>,
}

/// The covariance of a fit's reported parameters.
#[derive(Debug, Clone)]
pub struct Uncertainty {
    /// Method used.
    pub method: ErrorMethod,
    /// Reported parameters, in [`named_parameters`] order.
    pub parameters: Vec<Parameter>,
    /// Their covariance matrix.
    pub covariance: DMatrix<f64>,
    /// Bootstrap: replicates that gave a usable refit, of those drawn.
    pub replicates: Option<(usize, usize)>,
}

impl Uncertainty {
    /// Standard error of reported parameter `i`.
    pub fn se(&self, i: usize) -> f64 {
        self.covariance[(i, i)].max(0.0).sqrt()
    }

    /// Index of a reported parameter, by its block's written name.
    pub fn index(&self, block: &str, cluster: usize, indicator: Option<&str>, term: Option<&str>) -> Option<usize> {
        self.parameters.iter().position(|p| {
            p.block.name == block
                && p.cluster == cluster
                && p.indicator.as_deref() == indicator
                && p.term.as_deref() == term
        })
    }
}

/// Every reported parameter of a model: gating first, then the component blocks, on the
/// original covariate scale.
pub fn named_parameters(model: &Model, prepared: &PreparedPlacement) -> Vec<Parameter> {
    let mut out = gating_parameters(&model.gating, prepared.design_of(&model.gating));
    out.extend(model.components.parameters());
    out
}

/// Named gating parameters on the original covariate scale: logit coefficients of
/// clusters 2..G against cluster 1, or the log odds log(π_k/π_1) of free proportions.
pub fn gating_parameters(gating: &Gating, design: &crate::data::Design) -> Vec<Parameter> {
    let mut out = Vec::new();
    let mut push = |cluster: usize, term: &str, value: f64| {
        out.push(Parameter {
            block: ParamBlock::GATING,
            cluster,
            indicator: None,
            term: Some(term.to_string()),
            value,
        })
    };
    match gating {
        Gating::Logit { g, p, gamma, .. } => {
            for k in 1..*g {
                let orig = design.to_original_scale(&gamma[(k - 1) * p..k * p]);
                for (term, value) in design.terms.iter().zip(orig) {
                    push(k + 1, &term.name, value);
                }
            }
        }
        Gating::Free { log_pi } => {
            for (k, l) in log_pi.iter().enumerate().skip(1) {
                push(k + 1, "intercept", l - log_pi[0]);
            }
        }
        Gating::Equal { .. } | Gating::Fixed { .. } => {}
    }
    out
}

/// The observed information −∂²ℓ/∂θ∂θ' at the fit, by central differences of the
/// analytic score, symmetrised. Columns are computed in parallel.
pub fn observed_information(chart: &Chart, fd: &FitData) -> Result<DMatrix<f64>, String> {
    let p = chart.len();
    let columns: Vec<Result<Vec<f64>, String>> = (0..p)
        .into_par_iter()
        .map(|j| {
            let h = SCORE_STEP * chart.scale(j);
            let mut theta = vec![0.0; p];
            theta[j] = h;
            let up = chart.total_score(&theta, fd).map_err(|e| e.reason)?;
            theta[j] = -h;
            let down = chart.total_score(&theta, fd).map_err(|e| e.reason)?;
            Ok(up.iter().zip(&down).map(|(a, b)| -(a - b) / (2.0 * h)).collect())
        })
        .collect();
    let mut info = DMatrix::zeros(p, p);
    for (j, col) in columns.into_iter().enumerate() {
        for (i, v) in col?.into_iter().enumerate() {
            info[(i, j)] = v;
        }
    }
    Ok(0.5 * (&info + info.transpose()))
}

/// The middle of the sandwich: the variance of the total score, estimated from the row
/// scores s_i = c_i ∂ℓ_i/∂θ (which add up to 0 at the fit).
///
/// With a survey design, the linearisation estimator of Binder (1983) over its sampling
/// units within strata ([`SurveyDesign::score_variance`]). Otherwise rows are the sampling
/// units, drawn with replacement from one stratum: m/(m − 1) Σ_i s_i s_i′ over the m rows
/// of positive weight. Under frequency weights a row is c_i people with the same score, so
/// the sum is over people: N/(N − 1) Σ_i c_i (s_i/c_i)(s_i/c_i)′ with N = Σ c_i, which is
/// what the same rows written out one per person give.
pub fn score_outer_product(
    chart: &Chart,
    fd: &FitData,
    weight_type: Option<WeightType>,
    survey: Option<&SurveyDesign>,
) -> Result<DMatrix<f64>, String> {
    let p = chart.len();
    if let Some(design) = survey {
        let zero = vec![0.0; p];
        return design.score_variance(p, fd.weights, |f| {
            chart
                .scores(&zero, fd, |i, s| f(i, s))
                .map(|_| ())
                .map_err(|e| e.reason)
        });
    }
    let frequency = weight_type == Some(WeightType::Frequency);
    let mut meat = DMatrix::zeros(p, p);
    chart
        .scores(&vec![0.0; p], fd, |i, s| {
            let c = fd.weights[i];
            if c <= 0.0 {
                return;
            }
            let scale = if frequency { 1.0 / c } else { 1.0 };
            for a in 0..p {
                if s[a] == 0.0 {
                    continue;
                }
                for b in 0..=a {
                    meat[(a, b)] += scale * s[a] * s[b];
                }
            }
        })
        .map_err(|e| e.reason)?;
    let units = if frequency {
        crate::numerics::sum(fd.weights)
    } else {
        fd.weights.iter().filter(|c| **c > 0.0).count() as f64
    };
    let correction = if units > 1.0 { units / (units - 1.0) } else { 1.0 };
    for a in 0..p {
        for b in 0..=a {
            meat[(a, b)] *= correction;
            meat[(b, a)] = meat[(a, b)];
        }
    }
    Ok(meat)
}

/// Inverse of a symmetric positive-definite matrix, or why not.
fn spd_inverse(m: &DMatrix<f64>) -> Result<DMatrix<f64>, String> {
    m.clone().cholesky().map(|c| c.inverse()).ok_or_else(|| {
        "the information matrix is not positive definite: the fit is not a strict maximum \
         or some parameters are not identified (a cluster with tied covariance axes, an \
         empty level, or too many clusters)"
            .to_string()
    })
}

/// The covariance of the free parameters θ by the observed information or the sandwich.
pub fn parameter_covariance(
    chart: &Chart,
    fd: &FitData,
    method: ErrorMethod,
    weight_type: Option<WeightType>,
    survey: Option<&SurveyDesign>,
) -> Result<DMatrix<f64>, String> {
    let info = observed_information(chart, fd)?;
    let inv = spd_inverse(&info)?;
    match method {
        ErrorMethod::Sandwich => {
            let meat = score_outer_product(chart, fd, weight_type, survey)?;
            Ok(&inv * meat * &inv)
        }
        _ => Ok(inv),
    }
}

/// Jacobian of the reported parameters with respect to θ, by central differences.
fn reported_jacobian(
    chart: &Chart,
    reported: &(dyn Fn(&Model) -> Vec<Parameter> + Sync),
    r: usize,
) -> Result<DMatrix<f64>, String> {
    chart_jacobian(chart, r, &|m| reported(m).into_iter().map(|p| p.value).collect())
}

/// Jacobian of the r values `f` makes of a model with respect to the chart's θ, by
/// central differences of relative step [`JACOBIAN_STEP`].
fn chart_jacobian(chart: &Chart, r: usize, f: &dyn Fn(&Model) -> Vec<f64>) -> Result<DMatrix<f64>, String> {
    let p = chart.len();
    let mut jac = DMatrix::zeros(r, p);
    for j in 0..p {
        let h = JACOBIAN_STEP * chart.scale(j);
        let mut theta = vec![0.0; p];
        theta[j] = h;
        let up = f(&chart.model(&theta).map_err(|e| e.reason)?);
        theta[j] = -h;
        let down = f(&chart.model(&theta).map_err(|e| e.reason)?);
        for (i, (a, b)) in up.iter().zip(&down).enumerate() {
            jac[(i, j)] = (a - b) / (2.0 * h);
        }
    }
    Ok(jac)
}

/// Standard errors of a fitted model's reported parameters.
///
/// `tau` are the fit's responsibilities (the bootstrap starts from them); `label` names
/// the fit in the bootstrap's random streams.
pub fn uncertainty(
    model: &Model,
    tau: &[f64],
    data: &Dataset,
    prepared: &PreparedPlacement,
    settings: &InferenceSettings,
    label: &str,
) -> Result<Uncertainty, String> {
    let fd = fit_data(data, prepared);
    uncertainty_of(model, tau, &fd, &|m| named_parameters(m, prepared), settings, label)
}

/// [`uncertainty`] for any data and any reported function of the model (the tests use
/// it with hand-built designs).
pub fn uncertainty_of(
    model: &Model,
    tau: &[f64],
    fd: &FitData,
    reported: &(dyn Fn(&Model) -> Vec<Parameter> + Sync),
    settings: &InferenceSettings,
    label: &str,
) -> Result<Uncertainty, String> {
    let parameters = reported(model);
    if settings.method == ErrorMethod::Bootstrap {
        let (covariance, used) = bootstrap(model, tau, fd, reported, settings, label)?;
        return Ok(Uncertainty {
            method: settings.method,
            parameters,
            covariance,
            replicates: Some((used, settings.replicates)),
        });
    }
    let chart = Chart::new(model)?;
    analytic(&chart, parameters, fd, reported, settings).map(|(u, _)| u)
}

/// The observed-information or sandwich uncertainty of `reported` at the chart's model, and
/// the covariance V of the chart's coordinates it came from.
fn analytic(
    chart: &Chart,
    parameters: Vec<Parameter>,
    fd: &FitData,
    reported: &(dyn Fn(&Model) -> Vec<Parameter> + Sync),
    settings: &InferenceSettings,
) -> Result<(Uncertainty, DMatrix<f64>), String> {
    let v = parameter_covariance(
        chart,
        fd,
        settings.method,
        settings.weight_type,
        settings.survey.as_deref(),
    )?;
    let jac = reported_jacobian(chart, reported, parameters.len())?;
    let u = Uncertainty {
        method: settings.method,
        parameters,
        covariance: &jac * &v * jac.transpose(),
        replicates: None,
    };
    Ok((u, v))
}

/// Nonparametric bootstrap: each replicate draws n rows with replacement (as multiplicities
/// on the case weights; under frequency weights it draws N = Σ c people, a row with the
/// probability c_i/N, and their multiplicities are the weights), refits from the fitted
/// responsibilities, and records the reported parameters. Replicates run in parallel, each
/// on its own random stream, so the result does not depend on the thread count.
fn bootstrap(
    model: &Model,
    tau: &[f64],
    fd: &FitData,
    reported: &(dyn Fn(&Model) -> Vec<Parameter> + Sync),
    settings: &InferenceSettings,
    label: &str,
) -> Result<(DMatrix<f64>, usize), String> {
    let draws = bootstrap_draws(model, tau, fd, settings, label, &|refit, _| {
        Some(reported(refit).into_iter().map(|p| p.value).collect())
    })?;
    Ok((covariance_of(&draws), draws.len()))
}

/// The bootstrap's replicates: what `record` makes of each usable refit (given the refit
/// and its resampled rows), at least two of them.
pub(crate) fn bootstrap_draws(
    model: &Model,
    tau: &[f64],
    fd: &FitData,
    settings: &InferenceSettings,
    label: &str,
    record: &(dyn Fn(&Model, &FitData) -> Option<Vec<f64>> + Sync),
) -> Result<Vec<Vec<f64>>, String> {
    let n = fd.n;
    // Under frequency weights, the cumulative weights to draw people from.
    let people = (settings.weight_type == Some(WeightType::Frequency)).then(|| {
        let mut total = 0.0;
        fd.weights
            .iter()
            .map(|c| {
                total += c;
                total
            })
            .collect::<Vec<f64>>()
    });
    let draws: Vec<Option<Vec<f64>>> = (0..settings.replicates)
        .into_par_iter()
        .map(|b| {
            let mut rng = Stream::new(settings.seed, &format!("bootstrap|{label}|{}", b + 1));
            let weights = match &people {
                Some(cumulative) => draw_people(cumulative, &mut rng),
                None => {
                    let mut times = vec![0.0; n];
                    for _ in 0..n {
                        times[rng.index(n)] += 1.0;
                    }
                    fd.weights.iter().zip(&times).map(|(c, t)| c * t).collect()
                }
            };
            let resampled = FitData {
                weights: &weights,
                ..*fd
            };
            let mut start = model.clone();
            start.gating.prepare_bound(resampled.w, resampled.weights);
            let run = em::run(&resampled, start, tau.to_vec(), settings.em);
            run.termination
                .usable()
                .then(|| record(&run.model, &resampled))
                .flatten()
        })
        .collect();
    let ok: Vec<Vec<f64>> = draws.into_iter().flatten().collect();
    if ok.len() < 2 {
        return Err(format!(
            "fewer than 2 of {} bootstrap refits were usable",
            settings.replicates
        ));
    }
    Ok(ok)
}

/// The covariance of the replicates (rows of `draws`), with m − 1 in the denominator.
pub(crate) fn covariance_of(draws: &[Vec<f64>]) -> DMatrix<f64> {
    let r = draws[0].len();
    let m = draws.len() as f64;
    let mean: Vec<f64> = (0..r).map(|i| draws.iter().map(|v| v[i]).sum::<f64>() / m).collect();
    let mut cov = DMatrix::zeros(r, r);
    for v in draws {
        for a in 0..r {
            for b in 0..=a {
                cov[(a, b)] += (v[a] - mean[a]) * (v[b] - mean[b]) / (m - 1.0);
            }
        }
    }
    for a in 0..r {
        for b in 0..a {
            cov[(b, a)] = cov[(a, b)];
        }
    }
    cov
}

/// Multiplicities of the rows when round(N) people are drawn with replacement, a row with
/// probability proportional to its weight (`cumulative`: the running sums of the weights).
fn draw_people(cumulative: &[f64], rng: &mut Stream) -> Vec<f64> {
    let total = cumulative.last().copied().unwrap_or(0.0);
    let mut times = vec![0.0; cumulative.len()];
    for _ in 0..total.round() as u64 {
        let u = rng.uniform() * total;
        let i = cumulative.partition_point(|c| *c <= u).min(cumulative.len() - 1);
        times[i] += 1.0;
    }
    times
}

/// The inference settings of a study.
pub fn settings_for(study: &crate::spec::Study) -> InferenceSettings {
    InferenceSettings {
        method: study.inference.method,
        replicates: study.inference.replicates,
        seed: study.seed,
        em: EmSettings::for_search(&study.search),
        weight_type: study.weight_type,
        survey: None,
    }
}

/// Standard errors of the fits listed in `which` (indices into `fits`); None for the
/// others and for fits without a usable start.
pub fn for_fits(
    study: &crate::spec::Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[crate::fit::FitResult],
    which: &[usize],
) -> Vec<Option<FitInference>> {
    let settings = InferenceSettings {
        survey: data.survey.clone(),
        ..settings_for(study)
    };
    fits.iter()
        .enumerate()
        .map(|(i, f)| {
            let best = f.best.as_ref().filter(|_| which.contains(&i))?;
            let label = format!("{}|{}|{}", f.placement, f.clusters, f.covariance());
            let pp = &prepared[f.placement_index];
            let (model, tau) = (&best.run.model, &best.run.tau);
            let analytic_v1 = settings.method != ErrorMethod::Bootstrap;
            // V₁: the covariance of the fitted model's chart coordinates, which the outcomes'
            // errors need for step 1's part.
            let (uncertainty, step_three_errors, v1) = match &f.step_three {
                None if analytic_v1 => {
                    let fd = fit_data(data, pp);
                    let reported = |m: &Model| named_parameters(m, pp);
                    match Chart::new(model)
                        .and_then(|chart| analytic(&chart, reported(model), &fd, &reported, &settings))
                    {
                        Ok((u, v1)) => (Ok(u), None, Some(v1)),
                        Err(e) => (Err(e), None, None),
                    }
                }
                None => (uncertainty(model, tau, data, pp, &settings, &label), None, None),
                Some(Err(reason)) => (Err(format!("step 3 failed: {reason}")), None, None),
                Some(Ok(st)) => match three_step_uncertainty(best, data, f, st, pp, &settings, &label) {
                    Ok((u, errors, v1)) => (Ok(u), errors, v1),
                    Err(e) => (Err(e), None, None),
                },
            };
            let mut inference = FitInference::new(uncertainty, &study.inference.per, pp.reported_design(f));
            inference.step_three_errors = step_three_errors;
            inference.outcomes = fit_outcomes(data, pp, model, tau, v1.as_ref(), &settings, &label);
            if let Some(v1) = &v1 {
                inference.profile_intervals = profile_intervals(model, v1).unwrap_or_default();
            }
            Some(inference)
        })
        .collect()
}

/// Every distal outcome of a fit's placement compared across its clusters (see
/// [`outcomes`]); `v1`, the covariance of the model's chart coordinates, gives analytic
/// errors step 1's part.
fn fit_outcomes(
    data: &Dataset,
    pp: &PreparedPlacement,
    model: &Model,
    tau: &[f64],
    v1: Option<&DMatrix<f64>>,
    settings: &InferenceSettings,
    label: &str,
) -> Vec<(String, Result<outcomes::OutcomeEstimate, String>)> {
    if pp.placement.outcomes.is_empty() {
        return Vec::new();
    }
    let fd = fit_data(data, pp);
    let chart = v1.and_then(|_| Chart::new(model).ok());
    let step_one = outcomes::StepOne {
        model,
        tau,
        fd: &fd,
        chart: chart.as_ref().zip(v1),
    };
    pp.placement
        .outcomes
        .iter()
        .map(|o| {
            let column = &data.outcomes[&o.name];
            let kind = outcomes::OutcomeKind::of(&column.kind).expect("outcomes are not categorical");
            let od = outcomes::OutcomeData {
                kind,
                y: &column.values,
                weights: fd.weights,
                weight_type: settings.weight_type,
                survey: settings.survey.as_deref(),
            };
            let result =
                outcomes::compare_outcome(&o.name, pp.placement.outcome_method, &od, &step_one, settings, label);
            (o.name.clone(), result)
        })
        .collect()
}

/// How a three-step fit's gating errors were made, and how much step 1 added.
#[derive(Debug, Clone, PartialEq)]
pub struct StepThreeErrors {
    /// Whether each bootstrap replicate reran the three steps (else step 1's part was
    /// added to step 3's own covariance).
    pub bootstrap: bool,
    /// The largest relative increase of a step-3 coefficient's standard error over step
    /// 3's own (step 1 taken as known): corrected / own − 1.
    pub largest_increase: f64,
}

/// A three-step fit's uncertainty, how its step-3 errors include step 1, and the covariance
/// V₁ of step 1's chart coordinates (None with bootstrap errors).
type ThreeStepUncertainty = (Uncertainty, Option<StepThreeErrors>, Option<DMatrix<f64>>);

/// A three-step fit's uncertainty with step 1's part in the step-3 coefficients' errors
/// (see [`step_three`]). When step 1's part cannot be computed (a moved step 1 whose step 3
/// does not converge), the step-3 errors are step 3's own and no [`StepThreeErrors`] says
/// otherwise (results.json then has `errors_include_step_one: null`).
fn three_step_uncertainty(
    best: &crate::fit::BestFit,
    data: &Dataset,
    f: &crate::fit::FitResult,
    st: &crate::fit::three_step::StepThree,
    pp: &PreparedPlacement,
    settings: &InferenceSettings,
    label: &str,
) -> Result<ThreeStepUncertainty, String> {
    let design = pp
        .step_three
        .as_ref()
        .ok_or("a three-step placement has no step-3 design")?;
    let fd = fit_data(data, pp);
    let reported = |m: &Model| named_parameters(m, pp);
    let (model, tau) = (&best.run.model, &best.run.tau);
    let bootstrap = settings.method == ErrorMethod::Bootstrap;
    let (measurement, gating, v1) = if bootstrap {
        let (measurement, gating, used) =
            step_three::bootstrap(model, tau, &fd, st, design, &reported, settings, label)?;
        let u = Uncertainty {
            method: settings.method,
            parameters: reported(model),
            covariance: measurement,
            replicates: Some((used, settings.replicates)),
        };
        (u, gating, None)
    } else {
        // Step 1's coordinates and their covariance serve both its own errors and C V₁ C′.
        let chart = Chart::new(model)?;
        let (u, v1) = analytic(&chart, reported(model), &fd, &reported, settings)?;
        match step_three::step_one_part(&chart, &v1, tau, &fd, st, design) {
            Ok(part) => (u, &st.covariance + part, Some(v1)),
            Err(_) => return Ok((with_step_three(u, f, st, &st.covariance, pp), None, Some(v1))),
        }
    };
    let largest_increase = (0..gating.nrows())
        .map(|i| (gating[(i, i)] / st.covariance[(i, i)]).sqrt() - 1.0)
        .fold(f64::NEG_INFINITY, f64::max);
    let errors = StepThreeErrors {
        bootstrap,
        largest_increase,
    };
    Ok((with_step_three(measurement, f, st, &gating, pp), Some(errors), v1))
}

/// A fit's standard errors and what is computed from them once: every covariate effect
/// with its interval, and the joint Wald test of each gating covariate.
#[derive(Debug, Clone)]
pub struct FitInference {
    /// The covariance of the reported parameters, or why there is none.
    pub uncertainty: Result<Uncertainty, String>,
    /// Every covariate effect (empty without standard errors).
    pub effects: Vec<effects::Effect>,
    /// Joint Wald tests of the gating covariates (empty without standard errors).
    pub gating_tests: Vec<effects::WaldTest>,
    /// Three-step fits: how the step-3 errors include step 1.
    pub step_three_errors: Option<StepThreeErrors>,
    /// The placement's distal outcomes compared across the clusters, each or why not.
    pub outcomes: Vec<(String, Result<outcomes::OutcomeEstimate, String>)>,
    /// 95% intervals of each fitted cluster's profile at the reference covariate values
    /// ([`profile_intervals`]); empty without analytic errors (the bootstrap gives none).
    pub profile_intervals: ProfileIntervals,
}

impl FitInference {
    /// The effects and tests of `uncertainty`, per `per` units, gating terms from
    /// `design` (the design of the reported gating network).
    pub fn new(
        uncertainty: Result<Uncertainty, String>,
        per: &std::collections::BTreeMap<String, f64>,
        design: &crate::data::Design,
    ) -> FitInference {
        let (effects, gating_tests) = match &uncertainty {
            Ok(u) => (effects::effects(u, per), effects::gating_wald_tests(u, design)),
            Err(_) => (Vec::new(), Vec::new()),
        };
        FitInference {
            uncertainty,
            effects,
            gating_tests,
            step_three_errors: None,
            outcomes: Vec::new(),
            profile_intervals: Vec::new(),
        }
    }
}

/// Per fitted cluster, per profile column, a 95% interval (None where there is none).
pub type ProfileIntervals = Vec<Vec<Option<(f64, f64)>>>;

/// 95% intervals of every cluster's profile at the reference covariate values
/// (`[fitted cluster][profile column]`), by the delta method: the profile's Jacobian in the
/// chart's coordinates (central differences) with `v`, their covariance; each interval is
/// made on its block's [`ProfileScale`](crate::model::family::ProfileScale).
pub fn profile_intervals(model: &Model, v: &DMatrix<f64>) -> Result<ProfileIntervals, String> {
    let chart = Chart::new(model)?;
    let p = chart.len();
    if v.nrows() != p || v.ncols() != p {
        return Err(format!(
            "the covariance is {}×{}, the chart has {p} coordinates",
            v.nrows(),
            v.ncols()
        ));
    }
    let g = model.clusters();
    let profiles = |m: &Model| -> Vec<f64> {
        let mut all = Vec::new();
        let mut one = Vec::new();
        for k in 0..g {
            for b in &m.components.blocks {
                one.clear();
                b.profile(k, None, &mut one);
                all.extend_from_slice(&one);
            }
        }
        all
    };
    let values = profiles(model);
    let mut scales = Vec::with_capacity(values.len());
    let mut one = Vec::new();
    for k in 0..g {
        for b in &model.components.blocks {
            one.clear();
            b.profile(k, None, &mut one);
            scales.extend(std::iter::repeat_n(b.profile_scale(), one.len()));
        }
    }
    let jac = chart_jacobian(&chart, values.len(), &profiles)?;
    let cov = &jac * v * jac.transpose();
    let per_cluster = values.len() / g.max(1);
    Ok((0..g)
        .map(|k| {
            (k * per_cluster..(k + 1) * per_cluster)
                .map(|i| scales[i].interval(values[i], cov[(i, i)].max(0.0).sqrt()))
                .collect()
        })
        .collect())
}

/// A three-step fit's uncertainty: its step-3 gating coefficients (with `gating_covariance`,
/// their covariance on the fitting scale, carried to the original scale) in place of the
/// measurement model's shares, which keep their own covariance.
fn with_step_three(
    measurement: Uncertainty,
    f: &crate::fit::FitResult,
    st: &crate::fit::three_step::StepThree,
    gating_covariance: &DMatrix<f64>,
    prepared: &PreparedPlacement,
) -> Uncertainty {
    let model = f.reported_model().expect("a fit with step 3 has a best start");
    let parameters = named_parameters(&model, prepared);
    let design = prepared.design_of(&model.gating);
    let p = design.p();
    let m = st.gamma.len();
    // The map to the original scale is linear and acts within each cluster's block.
    let mut t = DMatrix::zeros(m, m);
    for k in 0..m / p {
        for j in 0..p {
            let mut e = vec![0.0; p];
            e[j] = 1.0;
            for (a, v) in design.to_original_scale(&e).into_iter().enumerate() {
                t[(k * p + a, k * p + j)] = v;
            }
        }
    }
    let gating_cov = &t * gating_covariance * t.transpose();
    let kept: Vec<usize> = (0..measurement.parameters.len())
        .filter(|i| !measurement.parameters[*i].block.is_gating())
        .collect();
    let r = parameters.len();
    let mut cov = DMatrix::zeros(r, r);
    cov.view_mut((0, 0), (m, m)).copy_from(&gating_cov);
    for (a, &i) in kept.iter().enumerate() {
        for (b, &j) in kept.iter().enumerate() {
            cov[(m + a, m + b)] = measurement.covariance[(i, j)];
        }
    }
    Uncertainty {
        method: measurement.method,
        parameters,
        covariance: cov,
        replicates: measurement.replicates,
    }
}
