//! Effects as epidemiologists read them: relative risk ratios of the gating network,
//! mean differences, odds ratios and rate ratios of the components, each with a 95%
//! Wald confidence interval and p-value, and a joint Wald test per gating covariate.

use super::Uncertainty;
use crate::data::Design;
use crate::model::family::ParamBlock;
use nalgebra::{DMatrix, DVector};
use serde::Serialize;
use statrs::distribution::{ChiSquared, ContinuousCDF};
use std::collections::BTreeMap;

/// The 97.5% point of the standard normal distribution.
pub const Z_95: f64 = 1.959_963_984_540_054;

/// Two-sided p-value of a standard normal statistic.
pub fn normal_p_value(z: f64) -> f64 {
    statrs::function::erf::erfc(z.abs() / std::f64::consts::SQRT_2)
}

/// Upper tail of a chi-squared distribution.
pub fn chi_squared_p_value(x: f64, df: usize) -> f64 {
    ChiSquared::new(df as f64).map_or(f64::NAN, |c| c.sf(x.max(0.0)))
}

/// An estimate on the coefficient scale with its standard error, shown on the natural
/// scale of its measure.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, schemars::JsonSchema)]
pub struct Interval {
    /// Point estimate on the natural scale.
    pub estimate: f64,
    /// Lower 95% limit.
    pub lower: f64,
    /// Upper 95% limit.
    pub upper: f64,
    /// Standard error on the coefficient scale (log scale for ratios), per `per` units.
    pub se: f64,
    /// Two-sided Wald p-value against no effect.
    pub p_value: f64,
}

impl Interval {
    /// From a coefficient and its standard error (both per `per` units already);
    /// `ratio` exponentiates (relative risk, odds and rate ratios).
    pub fn new(coef: f64, se: f64, ratio: bool) -> Interval {
        let (lo, hi) = (coef - Z_95 * se, coef + Z_95 * se);
        let f = |x: f64| if ratio { x.exp() } else { x };
        Interval {
            estimate: f(coef),
            lower: f(lo),
            upper: f(hi),
            se,
            p_value: normal_p_value(coef / se),
        }
    }
}

/// The units per which a term's effect is shown: the spec's `per` for a numeric
/// covariate's own term, 1 otherwise (a level against the reference level).
pub fn per_units(term: &str, per: &BTreeMap<String, f64>) -> f64 {
    per.get(term).copied().unwrap_or(1.0)
}

/// A covariate effect of one fit with its interval.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct Effect {
    /// Parameter block (`gating`, `mean`, `item_logit`, `count_log_rate`).
    pub block: ParamBlock,
    /// What the estimate measures.
    pub measure: &'static str,
    /// 1-based cluster (for gating, against cluster 1).
    pub cluster: usize,
    /// Indicator (or item level), for component effects.
    pub indicator: Option<String>,
    /// Design term.
    pub term: String,
    /// Units of the covariate per which the effect is shown.
    pub per: f64,
    /// Estimate, interval, p-value.
    #[serde(flatten)]
    pub interval: Interval,
}

/// Every covariate effect (non-intercept coefficient) of a fit.
pub fn effects(u: &Uncertainty, per: &BTreeMap<String, f64>) -> Vec<Effect> {
    u.parameters
        .iter()
        .enumerate()
        .filter_map(|(i, p)| {
            let term = p.term.as_deref()?;
            if term == "intercept" {
                return None;
            }
            let measure = p.block.measure?;
            let scale = per_units(term, per);
            Some(Effect {
                block: p.block,
                measure: measure.name,
                cluster: p.cluster,
                indicator: p.indicator.clone(),
                term: term.to_string(),
                per: scale,
                interval: Interval::new(p.value * scale, u.se(i) * scale, measure.ratio),
            })
        })
        .collect()
}

/// The difference of two reported parameters (either may be absent, meaning 0, as for
/// the reference cluster's gating coefficients) and its standard error.
pub fn contrast(u: &Uncertainty, a: Option<usize>, b: Option<usize>) -> (f64, f64) {
    let value = |i: Option<usize>| i.map_or(0.0, |i| u.parameters[i].value);
    let var = |i: Option<usize>, j: Option<usize>| match (i, j) {
        (Some(i), Some(j)) => u.covariance[(i, j)],
        _ => 0.0,
    };
    let v = var(a, a) + var(b, b) - 2.0 * var(a, b);
    (value(a) - value(b), v.max(0.0).sqrt())
}

/// A joint Wald test that a gating covariate has no effect on membership: all its terms
/// across the G − 1 contrasts at once (the same whichever cluster is the reference).
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct WaldTest {
    /// Covariate.
    pub covariate: String,
    /// Wald statistic.
    pub statistic: f64,
    /// Degrees of freedom: terms × (G − 1).
    pub df: usize,
    /// Chi-squared p-value.
    pub p_value: f64,
}

/// Joint Wald tests of every gating covariate of `design`.
pub fn gating_wald_tests(u: &Uncertainty, design: &Design) -> Vec<WaldTest> {
    let mut covariates: Vec<&str> = Vec::new();
    for t in &design.terms {
        if let Some(c) = t.covariate.as_deref() {
            if !covariates.contains(&c) {
                covariates.push(c);
            }
        }
    }
    covariates
        .into_iter()
        .filter_map(|cov| {
            let terms: Vec<&str> = design
                .terms
                .iter()
                .filter(|t| t.covariate.as_deref() == Some(cov))
                .map(|t| t.name.as_str())
                .collect();
            let idx: Vec<usize> = u
                .parameters
                .iter()
                .enumerate()
                .filter(|(_, p)| p.block.is_gating() && p.term.as_deref().is_some_and(|t| terms.contains(&t)))
                .map(|(i, _)| i)
                .collect();
            if idx.is_empty() {
                return None;
            }
            let beta = DVector::from_iterator(idx.len(), idx.iter().map(|i| u.parameters[*i].value));
            let v = DMatrix::from_fn(idx.len(), idx.len(), |a, b| u.covariance[(idx[a], idx[b])]);
            let statistic = v.cholesky().map(|c| beta.dot(&c.solve(&beta)))?;
            Some(WaldTest {
                covariate: cov.to_string(),
                statistic,
                df: idx.len(),
                p_value: chi_squared_p_value(statistic, idx.len()),
            })
        })
        .collect()
}
