//! Standard errors of three-step gating effects that include step 1's uncertainty.
//!
//! Step 3 treats the step-1 model (and so the classification-error matrix D) as known, so
//! its own covariance V₃ is too small. Bakk, Oberski & Vermunt (2014) add step 1's part:
//! V = V₃ + C V₁ C′, with V₁ the covariance of the step-1 parameters θ₁ and C = ∂γ̂₃/∂θ₁.
//! C is found by central differences: the step-1 model is moved along each coordinate of
//! its chart, the posteriors and D recomputed, and step 3 refitted, the assignments of step
//! 2 held as they are (they are step 3's data). With `standard_errors = "bootstrap"` each
//! replicate reruns all three steps instead.

use super::chart::Chart;
use super::{bootstrap_draws, covariance_of, InferenceSettings};
use crate::data::Design;
use crate::fit::three_step::{assignments, log_shares, re_estimate, StepThree};
use crate::model::family::Parameter;
use crate::model::{e_step, FitData, Model};
use nalgebra::DMatrix;
use rayon::prelude::*;

/// Relative step of the differences through step 1 (times the coordinate's scale).
const STEP_ONE_STEP: f64 = 1e-4;

/// The step-1 posteriors of `model` on `fd`.
pub(crate) fn posteriors(model: &Model, fd: &FitData) -> Vec<f64> {
    let mut tau = vec![0.0; fd.n * model.clusters()];
    e_step(model, fd, &mut tau, None);
    tau
}

/// C V₁ C′: step 1's part of the step-3 covariance (fitting scale), with V₁ the covariance
/// of the step-1 model's `chart` coordinates. `tau` are the fit's step-1 posteriors, from
/// which step 2 assigned the rows.
pub fn step_one_part(
    chart: &Chart,
    v1: &DMatrix<f64>,
    tau: &[f64],
    fd: &FitData,
    st: &StepThree,
    design: &Design,
) -> Result<DMatrix<f64>, String> {
    let g = st.classification.len();
    let assigned = assignments(tau, g);
    let re = |moved: &Model| {
        let t = posteriors(moved, fd);
        re_estimate(
            st.method,
            &t,
            &log_shares(moved),
            g,
            fd.weights,
            design,
            &assigned,
            &st.gamma,
        )
    };
    through_step_one(chart, v1, st.gamma.len(), &re)
}

/// Estimates again from a moved step-1 model, or why they could not be.
pub type ReEstimate<'a> = dyn Fn(&Model) -> Result<Vec<f64>, String> + Sync + 'a;

/// C V₁ C′ for any estimate that step 1 feeds: `re` gives the m estimates from a moved
/// step-1 model (the assignments of step 2 held as they are), and C is found by central
/// differences of `re` along each coordinate of the step-1 model's `chart`, whose
/// covariance is `v1`.
pub fn through_step_one(chart: &Chart, v1: &DMatrix<f64>, m: usize, re: &ReEstimate) -> Result<DMatrix<f64>, String> {
    let p1 = chart.len();
    let columns: Vec<Result<Vec<f64>, String>> = (0..p1)
        .into_par_iter()
        .map(|j| {
            let h = STEP_ONE_STEP * chart.scale(j);
            let at = |x: f64| -> Result<Vec<f64>, String> {
                let mut theta = vec![0.0; p1];
                theta[j] = x;
                re(&chart.model(&theta).map_err(|e| e.reason)?)
            };
            let (up, down) = (at(h)?, at(-h)?);
            Ok(up.iter().zip(&down).map(|(a, b)| (a - b) / (2.0 * h)).collect())
        })
        .collect();
    let mut c = DMatrix::zeros(m, p1);
    for (j, column) in columns.into_iter().enumerate() {
        for (i, v) in column?.into_iter().enumerate() {
            c[(i, j)] = v;
        }
    }
    if c.iter().any(|v| !v.is_finite()) {
        return Err("the estimates do not change smoothly with the step-1 parameters".to_string());
    }
    Ok(&c * v1 * c.transpose())
}

/// The bootstrap of all three steps: each replicate refits step 1 on the resampled rows
/// (from the fitted posteriors), assigns the rows again and refits step 3. Returns the
/// covariance of the `reported` measurement parameters and that of the step-3 coefficients
/// (fitting scale), and the usable replicates.
#[allow(clippy::too_many_arguments)] // the fit, its data and step 3's inputs
pub fn bootstrap(
    model: &Model,
    tau: &[f64],
    fd: &FitData,
    st: &StepThree,
    design: &Design,
    reported: &(dyn Fn(&Model) -> Vec<Parameter> + Sync),
    settings: &InferenceSettings,
    label: &str,
) -> Result<(DMatrix<f64>, DMatrix<f64>, usize), String> {
    let g = model.clusters();
    let r = reported(model).len();
    let draws = bootstrap_draws(model, tau, fd, settings, label, &|refit, resampled| {
        let t = posteriors(refit, resampled);
        let assigned = assignments(&t, g);
        let gamma = re_estimate(
            st.method,
            &t,
            &log_shares(refit),
            g,
            resampled.weights,
            design,
            &assigned,
            &st.gamma,
        )
        .ok()?;
        gamma.iter().all(|v| v.is_finite()).then(|| {
            let mut values: Vec<f64> = reported(refit).into_iter().map(|p| p.value).collect();
            values.extend(gamma);
            values
        })
    })?;
    let cov = covariance_of(&draws);
    let m = st.gamma.len();
    let measurement = cov.view((0, 0), (r, r)).into_owned();
    let gating = cov.view((r, r), (m, m)).into_owned();
    Ok((measurement, gating, draws.len()))
}
