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
    /// Either of the pair's tests flagged by Holm's procedure over all the placement's tests,
    /// shared and per cluster (family-wise 0.05).
    pub flagged: bool,
    /// The per-cluster test (this row's `statistic`) flagged.
    pub by_cluster_flagged: bool,
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
    /// The first test: one effect shared by every cluster, by a score test at the model
    /// without it. `statistic`, `df` and `p_value` above are the follow-up, an effect of
    /// its own in each cluster, by likelihood ratio.
    pub shared: SharedEffectTest,
}

/// The score test of one direct effect shared by the clusters (df (L − 1)·t for an item with
/// L levels and t terms; t per continuous indicator or count).
#[derive(Debug, Clone, PartialEq, Serialize, schemars::JsonSchema)]
pub struct SharedEffectTest {
    /// Score statistic U′V⁻¹U of the added coefficients at the model without them.
    pub statistic: Option<f64>,
    /// Parameters added.
    pub df: usize,
    /// Chi-squared p-value.
    pub p_value: Option<f64>,
    /// Flagged by Holm's procedure over all the placement's tests.
    pub flagged: bool,
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

/// A refit: its log-likelihood, parameter count, model and, when the test is design-based,
/// the trace tr(I⁻¹ J) of its information I and design-based score variance J (or why it
/// could not be computed); or why the refit failed.
type Refit = Result<Refitted, String>;

/// A usable refit.
struct Refitted {
    loglik: f64,
    k: usize,
    model: crate::model::Model,
    trace: Option<Result<f64, String>>,
}

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
        if let Some(fit) = FitScreen::new(study, data, prepared, &fits[fi]) {
            out.extend(fit.tests(&covariates));
        }
    }
    out
}

/// (covariate, indicator, score statistic, likelihood-ratio statistic, df) of one pair.
pub type ScoreBesideRatio = (String, String, Option<f64>, Option<f64>, usize);

/// The score statistics of the per-cluster effects (each cluster's effect its own
/// coordinate) for every pair of the fits listed, beside the screen's likelihood-ratio
/// statistics of the same effects: (covariate, indicator, score, LR, df). The two are
/// asymptotically equivalent, so near the null they agree; a check of the score machinery.
pub fn per_cluster_scores(
    study: &Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[FitResult],
    which: usize,
) -> Vec<ScoreBesideRatio> {
    let covariates: Vec<String> = study.all_covariates().iter().map(|c| c.name.clone()).collect();
    let Some(screen) = FitScreen::new(study, data, prepared, &fits[which]) else {
        return Vec::new();
    };
    let pp = screen.pp;
    screen
        .tests(&covariates)
        .into_iter()
        .map(|t| {
            let c = t.covariate.clone();
            let members: Vec<String> = groups(data, &pp.families)
                .into_iter()
                .find(|(g, _)| *g == t.indicator)
                .map(|(_, m)| m)
                .unwrap_or_default();
            let base = screen.refit(&screen.with_gating(&c));
            let alt = screen.alternative(&c, &members);
            let score = base
                .ok()
                .and_then(|b| screen.score_statistic(&c, &members, &alt, &b, false).ok())
                .map(|x| x.0);
            (c, t.indicator, score, t.statistic, t.df)
        })
        .collect()
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

impl<'a> FitScreen<'a> {
    /// The screen of compared fit `f`, when it has a best start.
    fn new(study: &'a Study, data: &'a Dataset, prepared: &'a [PreparedPlacement], f: &'a FitResult) -> Option<Self> {
        let best = f.best.as_ref()?;
        let pp = &prepared[f.placement_index];
        let mut null = pp.placement.clone();
        null.method = Method::OneStep;
        Some(FitScreen {
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
        })
    }

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
        // One family: every pair's shared test, then every pair's per-cluster test.
        let p_values: Vec<Option<f64>> = tests
            .iter()
            .map(|t| t.shared.p_value)
            .chain(tests.iter().map(|t| t.p_value))
            .collect();
        let flags = holm(&p_values, FAMILY_WISE_LEVEL);
        let m = tests.len();
        tests
            .into_iter()
            .enumerate()
            .map(|(i, mut t)| {
                t.shared.flagged = flags[i];
                t.by_cluster_flagged = flags[m + i];
                t.flagged = flags[i] || flags[m + i];
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
        Ok(Refitted {
            loglik: run.loglik,
            k,
            model: run.model,
            trace,
        })
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

    /// The null model of `c` with `c` also acting on `members` in every cluster.
    fn alternative(&self, c: &str, members: &[String]) -> crate::spec::Placement {
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
        alt
    }

    /// The test of covariate `c` acting directly on `members` (the group `group`), against
    /// the null model's refit `base`.
    fn test(&self, c: &str, group: &str, members: &[String], base: &Refit) -> DirectEffectTest {
        let alt = self.alternative(c, members);
        let shared = match base {
            Ok(b) => self.shared_test(c, members, &alt, b),
            Err(e) => SharedEffectTest {
                statistic: None,
                df: 0,
                p_value: None,
                flagged: false,
                note: Some(format!("the model without the effect failed: {e}")),
            },
        };
        let result = match (base, self.refit(&alt)) {
            (Ok(b0), Ok(b1)) => Ok((
                2.0 * (b1.loglik - b0.loglik),
                b1.k - b0.k,
                b0.trace.clone().zip(b1.trace),
            )),
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
            by_cluster_flagged: false,
            step_three_covariate: placement.method.is_stepwise() && placement.gating.iter().any(|x| x.name == c),
            design_effect,
            note,
            shared,
        }
    }

    /// The score test of covariate `c` acting on `members` with one effect shared by the
    /// clusters, at the null refit `base`; `alt` is the placement with an effect per cluster.
    fn shared_test(
        &self,
        c: &str,
        members: &[String],
        alt: &crate::spec::Placement,
        base: &Refitted,
    ) -> SharedEffectTest {
        match self.score_statistic(c, members, alt, base, true) {
            Ok((x, df)) => SharedEffectTest {
                statistic: Some(x),
                df,
                p_value: Some(super::effects::chi_squared_p_value(x, df)),
                flagged: false,
                note: None,
            },
            Err(why) => SharedEffectTest {
                statistic: None,
                df: 0,
                p_value: None,
                flagged: false,
                note: Some(format!("the shared effect could not be tested: {why}")),
            },
        }
    }

    /// The shared effect's score statistic and degrees of freedom.
    ///
    /// The model with an effect per cluster is set at the null fit with the effects at 0
    /// ([`crate::model::family::Block::embed`]; its log-likelihood must equal the null's).
    /// In its chart, the coordinates of the added effects are found by which reported
    /// parameters they move, and each cluster's copy of an effect is tied into one shared
    /// coordinate (the coordinates summed: the chain rule of β_k = β). With U the score of
    /// the shared coordinates, I the observed information in the tied chart and J the score
    /// variance (the sandwich's middle; design-based under sampling weights or a survey
    /// design), the efficient score is U* = U − I_βθ I_θθ⁻¹ U_θ with variance
    /// V = A J A′, A = [−I_βθ I_θθ⁻¹, 1]; without a design V = I_ββ − I_βθ I_θθ⁻¹ I_θβ, the
    /// textbook score test (Rao 1948), and under a design the generalised score test
    /// (Boos 1992), which needs no Rao–Scott correction.
    fn score_statistic(
        &self,
        c: &str,
        members: &[String],
        alt: &crate::spec::Placement,
        base: &Refitted,
        tie: bool,
    ) -> Result<(f64, usize), String> {
        use nalgebra::{DMatrix, DVector};
        let (study, data) = (self.study, self.data);
        let prep = crate::fit::prepare_placement(study, data, alt, &self.pp.families)
            .map_err(|e| e.diagnostic().message.clone())?;
        let fd = fit_data(data, &prep);
        let mut model = initial_model(&fd, &prep.blocks, alt, self.f.clusters, self.options);
        model.gating = base.model.gating.clone();
        if model.components.blocks.len() != base.model.components.blocks.len() {
            return Err("the models have different blocks".into());
        }
        for (large, small) in model.components.blocks.iter_mut().zip(&base.model.components.blocks) {
            large.embed(small.as_ref())?;
        }
        let chart = super::chart::Chart::new(&model)?;
        let p = chart.len();
        let zero = vec![0.0; p];
        let score = chart.total_score(&zero, &fd).map_err(|e| e.reason)?;
        let loglik = chart.scores(&zero, &fd, |_, _| {}).map_err(|e| e.reason)?;
        if (loglik - base.loglik).abs() > 1e-8 * (1.0 + base.loglik.abs()) {
            return Err(format!(
                "the model with the effect at 0 has log-likelihood {loglik} where the model without it has {}",
                base.loglik
            ));
        }
        // The added coordinates: those that move a reported effect of `c` on a member.
        let on_member = |ind: &Option<String>| {
            ind.as_deref()
                .is_some_and(|i| members.iter().any(|m| i == m || i.starts_with(&format!("{m}="))))
        };
        let reported = |m: &crate::model::Model| -> Vec<(usize, String, f64)> {
            m.components
                .parameters()
                .into_iter()
                .filter(|x| {
                    x.term.as_deref() == Some(c) || x.term.as_deref().is_some_and(|t| t.starts_with(&format!("{c}=")))
                })
                .filter(|x| on_member(&x.indicator))
                .map(|x| {
                    (
                        x.cluster,
                        format!("{}|{}", x.indicator.unwrap_or_default(), x.term.unwrap_or_default()),
                        x.value,
                    )
                })
                .collect()
        };
        let at_fit = reported(&model);
        let mut groups: Vec<(String, Vec<(usize, usize)>)> = Vec::new();
        for j in 0..p {
            let mut theta = zero.clone();
            theta[j] = 1e-3 * chart.scale(j);
            let moved: Vec<(usize, String)> = reported(&chart.model(&theta).map_err(|e| e.reason)?)
                .into_iter()
                .zip(&at_fit)
                .filter(|(a, b)| (a.2 - b.2).abs() > 1e-12 * (1.0 + b.2.abs()))
                .map(|(a, _)| (a.0, a.1))
                .collect();
            let Some(first) = moved.first() else { continue };
            if moved.len() != 1 {
                return Err("a coordinate moves more than one added effect".into());
            }
            match groups.iter_mut().find(|(key, _)| *key == first.1) {
                Some((_, list)) => list.push((first.0, j)),
                None => groups.push((first.1.clone(), vec![(first.0, j)])),
            }
        }
        let g = self.f.clusters;
        if groups.is_empty() || groups.iter().any(|(_, list)| list.len() != g) {
            return Err("the added effects were not found once per cluster".into());
        }
        if !tie {
            // Each cluster's effect a coordinate of its own: the score test of the
            // per-cluster effects, which the likelihood-ratio test also tests.
            groups = groups
                .into_iter()
                .flat_map(|(key, list)| list.into_iter().map(move |x| (key.clone(), vec![x])))
                .collect();
        }
        // The tied chart: the untouched coordinates, then one per shared effect.
        let added: Vec<usize> = groups.iter().flat_map(|(_, l)| l.iter().map(|x| x.1)).collect();
        let kept: Vec<usize> = (0..p).filter(|j| !added.contains(j)).collect();
        let (r, q) = (kept.len(), groups.len());
        let mut tie = DMatrix::zeros(p, r + q);
        for (a, &j) in kept.iter().enumerate() {
            tie[(j, a)] = 1.0;
        }
        for (b, (_, list)) in groups.iter().enumerate() {
            for &(_, j) in list {
                tie[(j, r + b)] = 1.0;
            }
        }
        let info = super::observed_information(&chart, &fd)?;
        let info = tie.transpose() * info * &tie;
        let u = tie.transpose() * DVector::from_vec(score);
        let i_tt = info.view((0, 0), (r, r)).into_owned();
        let i_bt = info.view((r, 0), (q, r)).into_owned();
        let inv_tt = i_tt
            .cholesky()
            .ok_or("the information of the model without the effect is not positive definite")?
            .inverse();
        let proj = &i_bt * &inv_tt;
        let mut a = DMatrix::zeros(q, r + q);
        a.view_mut((0, 0), (q, r)).copy_from(&(-&proj));
        a.view_mut((0, r), (q, q)).fill_with_identity();
        let efficient = &a * &u;
        let variance = if self.design_based() {
            let meat = super::score_outer_product(&chart, &fd, study.weight_type, data.survey.as_deref())?;
            &a * (tie.transpose() * meat * &tie) * a.transpose()
        } else {
            &a * &info * a.transpose()
        };
        let inv = variance
            .cholesky()
            .ok_or("the variance of the shared effects' score is not positive definite")?
            .inverse();
        let x = (efficient.transpose() * inv * &efficient)[(0, 0)];
        Ok((x.max(0.0), q))
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
