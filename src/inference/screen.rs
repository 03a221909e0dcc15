//! Direct-effect screen: for each covariate × indicator pair a compared fit leaves out,
//! a likelihood-ratio test of adding the covariate as a direct effect on that indicator
//! (an effect inside every cluster, on top of any effect on membership).
//!
//! The null model is the placement's model with its gating covariates in the gating
//! network (for a three-step placement: the one-step model its step 3 approximates, whose
//! assumption is exactly that the covariates have no direct effects), plus the tested
//! covariate in the gating network if it is not there already, so that the test asks
//! about an effect beyond the one on membership. Both models are refitted by EM from the
//! compared fit's posteriors (to the polish tolerance, `fit::POLISH_TOLERANCE`), so they sit
//! at neighbouring optima.
//! Continuous indicators share one regression design, so a covariate is tested on all
//! of them at once. Pairs are flagged by Holm's step-down procedure over the pairs tested
//! in the placement (Holm 1979), which holds the family-wise error rate at 0.05 like
//! Bonferroni's correction and flags at least as many. Under sampling weights or a survey
//! design the rows are not independent draws of equal weight, and the statistic is divided
//! by the tested parameters' mean design effect before its p-value ([`design_effect`]).

use crate::data::Dataset;
use crate::fit::em::{self, EmSettings};
use crate::fit::{fit_data, initial_model, FitResult, ModelOptions, PreparedPlacement};
use crate::model::family::Families;
use crate::spec::{Method, Study};
use rayon::prelude::*;
use serde::Serialize;

/// One pair's test.
#[derive(Debug, Clone, PartialEq, Serialize, schemars::JsonSchema)]
pub struct DirectEffectTest {
    /// Placement.
    pub placement: String,
    /// Covariate.
    pub covariate: String,
    /// Indicator, or the group of indicators that share one design ("continuous
    /// indicators").
    pub indicator: String,
    /// Likelihood-ratio statistic 2(ℓ₁ − ℓ₀), when both fits were usable.
    pub statistic: Option<f64>,
    /// Parameters added.
    pub df: usize,
    /// Chi-squared p-value.
    pub p_value: Option<f64>,
    /// Flagged by Holm's procedure over the placement's tests (family-wise 0.05).
    pub flagged: bool,
    /// For a three-step placement, whether the covariate is one of its step-3 covariates
    /// (a flagged pair then breaks the three-step assumption).
    pub step_three_covariate: bool,
    /// Under sampling weights or a survey design: the mean design effect δ̄ by which the
    /// likelihood-ratio statistic was divided before its p-value (see [`design_effect`]);
    /// `statistic` is the uncorrected one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub design_effect: Option<f64>,
    /// Why there is no statistic, when there is none.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
}

/// The family-wise error rate of the screen.
pub const FAMILY_WISE_LEVEL: f64 = 0.05;

/// Holm's step-down procedure (Holm 1979): with the m p-values sorted ascending, reject
/// while p_(j) < alpha / (m − j + 1) (j from 1), and stop at the first that is not. A test
/// without a p-value counts among the m (it was attempted) but is never rejected.
pub fn holm(p_values: &[Option<f64>], alpha: f64) -> Vec<bool> {
    let m = p_values.len();
    let mut order: Vec<usize> = (0..m).filter(|i| p_values[*i].is_some()).collect();
    order.sort_by(|a, b| p_values[*a].unwrap().total_cmp(&p_values[*b].unwrap()).then(a.cmp(b)));
    let mut flagged = vec![false; m];
    for (j, i) in order.into_iter().enumerate() {
        if p_values[i].unwrap() < alpha / (m - j) as f64 {
            flagged[i] = true;
        } else {
            break;
        }
    }
    flagged
}

/// A refit's log-likelihood, parameter count and, when the test is design-based, the trace
/// tr(I⁻¹ J) of its information I and design-based score variance J (or why it could not be
/// computed); or why the refit failed.
type Refit = Result<(f64, usize, Option<Result<f64, String>>), String>;

/// The mean design effect of the parameters a nested test adds: with q = k₁ − k₀ of them,
/// δ̄ = (tr(I₁⁻¹ J₁) − tr(I₀⁻¹ J₀)) / q, the first-order correction of Rao & Scott (1984) in the
/// form of Satorra & Bentler's (2001) scaled difference. Under the null the statistic's mean
/// is about q δ̄, so LR / δ̄ is referred to χ²(q). None when δ̄ is not positive (it can fall
/// below 0 in small samples).
pub fn design_effect(trace_null: f64, trace_alternative: f64, q: usize) -> Option<f64> {
    let d = (trace_alternative - trace_null) / q as f64;
    (q > 0 && d.is_finite() && d > 0.0).then_some(d)
}

/// The indicator groups a covariate can act on, in block order: each family's
/// ([`crate::model::family::Family::effect_groups`]; the continuous indicators together).
fn groups(data: &Dataset, families: &Families) -> Vec<(String, Vec<String>)> {
    data.indicator_sets
        .iter()
        .flat_map(|set| families.of(set).effect_groups(set))
        .collect()
}

/// Screen the fits listed in `which` (indices into `fits`).
pub fn screen(
    study: &Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[FitResult],
    which: &[usize],
) -> Vec<DirectEffectTest> {
    let covariates: Vec<String> = study.all_covariates().iter().map(|c| c.name.clone()).collect();
    let mut out = Vec::new();
    for &fi in which {
        let f = &fits[fi];
        let Some(best) = &f.best else { continue };
        let pp = &prepared[f.placement_index];
        let mut null = pp.placement.clone();
        null.method = Method::OneStep;
        let fit = FitScreen {
            study,
            data,
            pp,
            f,
            tau: &best.run.tau,
            // Refits run to the polish tolerance, as the fits they start from did, so that
            // the statistic is a difference of two optima.
            settings: EmSettings {
                tolerance: crate::fit::POLISH_TOLERANCE,
                ..EmSettings::for_search(&study.search)
            },
            options: ModelOptions::for_study(study, f.structure),
            null,
        };
        out.extend(fit.tests(&covariates));
    }
    out
}

/// The screen of one compared fit.
struct FitScreen<'a> {
    study: &'a Study,
    data: &'a Dataset,
    pp: &'a PreparedPlacement,
    f: &'a FitResult,
    /// The fit's posteriors, every refit's start.
    tau: &'a [f64],
    settings: EmSettings,
    options: ModelOptions,
    /// The placement as one step (the model a three-step estimate approximates).
    null: crate::spec::Placement,
}

impl FitScreen<'_> {
    /// Every pair's test, flagged by Holm's procedure over the placement's tests.
    fn tests(&self, covariates: &[String]) -> Vec<DirectEffectTest> {
        let null = &self.null;
        let pairs: Vec<(String, String, Vec<String>)> = covariates
            .iter()
            .flat_map(|c| {
                groups(self.data, &self.pp.families)
                    .into_iter()
                    .map(move |(g, members)| (c.clone(), g, members))
            })
            .filter(|(c, _, members)| !(null.components.iter().any(|x| &x.name == c) && null.acts_on(c, &members[0])))
            .collect();
        if pairs.is_empty() {
            return Vec::new();
        }
        let bases: Vec<(String, Refit)> = covariates
            .par_iter()
            .filter(|c| pairs.iter().any(|(x, _, _)| x == *c))
            .map(|c| (c.clone(), self.refit(&self.with_gating(c))))
            .collect();
        let tests: Vec<DirectEffectTest> = pairs
            .par_iter()
            .map(|(c, group, members)| {
                let base = &bases.iter().find(|(x, _)| x == c).expect("a base per covariate").1;
                self.test(c, group, members, base)
            })
            .collect();
        let flags = holm(&tests.iter().map(|t| t.p_value).collect::<Vec<_>>(), FAMILY_WISE_LEVEL);
        tests
            .into_iter()
            .zip(flags)
            .map(|(mut t, flagged)| {
                t.flagged = flagged;
                t
            })
            .collect()
    }

    /// The placement refitted by EM from the fit's posteriors: its log-likelihood and
    /// parameter count, or why it failed.
    fn refit(&self, placement: &crate::spec::Placement) -> Refit {
        let (study, data) = (self.study, self.data);
        let prep = crate::fit::prepare_placement(study, data, placement, &self.pp.families)
            .map_err(|e| e.diagnostic().message.clone())?;
        let fd = fit_data(data, &prep);
        let mut model = initial_model(&fd, &prep.blocks, placement, self.f.clusters, self.options);
        model.gating.prepare_bound(fd.w, fd.weights);
        let k = model.n_params();
        let run = em::run(&fd, model, self.tau.to_vec(), self.settings);
        if !run.termination.usable() {
            return Err(run.termination.reason().unwrap_or("the refit failed").to_string());
        }
        let trace = self.design_based().then(|| self.trace(&run.model, &fd));
        Ok((run.loglik, k, trace))
    }

    /// Whether the rows are not independent draws of equal weight: sampling weights or a
    /// survey design, under which the likelihood-ratio statistic is corrected.
    fn design_based(&self) -> bool {
        self.study.weight_type == Some(crate::spec::WeightType::Sampling) || self.data.survey.is_some()
    }

    /// tr(I⁻¹ J) at a refit: I its observed information, J the design-based variance of its
    /// score (the middle of the sandwich).
    fn trace(&self, model: &crate::model::Model, fd: &crate::model::FitData) -> Result<f64, String> {
        let chart = super::chart::Chart::new(model)?;
        let info = super::observed_information(&chart, fd)?;
        let meat = super::score_outer_product(&chart, fd, self.study.weight_type, self.data.survey.as_deref())?;
        let inverse = info
            .cholesky()
            .ok_or("the refit's information is not positive definite")?
            .inverse();
        Ok((inverse * meat).trace())
    }

    /// A study covariate's column.
    fn column(&self, c: &str) -> crate::spec::ColumnRef {
        self.study
            .all_covariates()
            .into_iter()
            .find(|x| x.name == c)
            .expect("a study covariate")
            .clone()
    }

    /// The null model of a covariate: the placement with the covariate also in the gating
    /// network.
    fn with_gating(&self, c: &str) -> crate::spec::Placement {
        let mut p = self.null.clone();
        if p.proportions == crate::spec::Proportions::Free && !p.gating.iter().any(|x| x.name == c) {
            p.gating.push(self.column(c));
        }
        p
    }

    /// The test of covariate `c` acting directly on `members` (the group `group`), against
    /// the null model's refit `base`.
    fn test(&self, c: &str, group: &str, members: &[String], base: &Refit) -> DirectEffectTest {
        let mut alt = self.with_gating(c);
        let already = alt.components.iter().any(|x| x.name == c);
        if already {
            alt.acts_on
                .entry(c.to_string())
                .or_default()
                .extend(members.iter().cloned());
        } else {
            alt.components.push(self.column(c));
            alt.acts_on.insert(c.to_string(), members.to_vec());
        }
        let result = match (base, self.refit(&alt)) {
            (Ok((l0, k0, t0)), Ok((l1, k1, t1))) => Ok((2.0 * (l1 - l0), k1 - k0, t0.clone().zip(t1))),
            (Err(e), _) => Err(format!("the model without the effect failed: {e}")),
            (_, Err(e)) => Err(format!("the model with the effect failed: {e}")),
        };
        let (statistic, df, mut note, traces) = match result {
            Ok((lr, df, traces)) => (Some(lr.max(0.0)), df, None, traces),
            Err(e) => (None, 0, Some(e), None),
        };
        let design = traces.map(|(t0, t1)| match (t0, t1) {
            (Ok(t0), Ok(t1)) => design_effect(t0, t1, df).ok_or_else(|| "it was not positive".to_string()),
            (Err(e), _) | (_, Err(e)) => Err(e),
        });
        let design_effect = design.as_ref().and_then(|d| d.as_ref().ok().copied());
        let p_value = match (statistic, design) {
            (Some(x), None) => Some(super::effects::chi_squared_p_value(x, df)),
            (Some(x), Some(Ok(d))) => Some(super::effects::chi_squared_p_value(x / d, df)),
            (Some(_), Some(Err(why))) => {
                note = Some(format!(
                    "the design effect of this test could not be estimated ({why}), so the statistic has no p-value"
                ));
                None
            }
            (None, _) => None,
        };
        let placement = &self.pp.placement;
        DirectEffectTest {
            placement: self.f.placement.clone(),
            covariate: c.to_string(),
            indicator: group.to_string(),
            statistic,
            df,
            p_value,
            flagged: false,
            step_three_covariate: placement.method.is_stepwise() && placement.gating.iter().any(|x| x.name == c),
            design_effect,
            note,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::{design_effect, holm};

    #[test]
    fn the_design_effect_is_the_mean_added_trace_and_none_when_not_positive() {
        // Two parameters added; the traces grow from 10 to 16: each added parameter's
        // statistic is about 3 times a chi-squared one.
        assert_eq!(design_effect(10.0, 16.0, 2), Some(3.0));
        assert_eq!(design_effect(10.0, 9.0, 2), None);
        assert_eq!(design_effect(10.0, 12.0, 0), None);
    }

    #[test]
    fn holm_steps_down_and_flags_at_least_what_bonferroni_does() {
        // m = 4: thresholds 0.0125, 0.0167, 0.025, 0.05 in order. Bonferroni (0.0125)
        // flags only 0.01; Holm flags all four.
        let p = [Some(0.04), Some(0.01), Some(0.015), Some(0.02)];
        assert_eq!(holm(&p, 0.05), vec![true, true, true, true]);
        // A step that fails stops the procedure, even if a later p-value would pass its own.
        let p = [Some(0.01), Some(0.03), Some(0.02), Some(0.049)];
        assert_eq!(holm(&p, 0.05), vec![true, false, false, false]);
        // A missing p-value counts among the tests (0.03 ≥ 0.05/2) but is never flagged.
        let p = [Some(0.03), None];
        assert_eq!(holm(&p, 0.05), vec![false, false]);
        assert_eq!(holm(&[Some(0.03)], 0.05), vec![true]);
    }
}
