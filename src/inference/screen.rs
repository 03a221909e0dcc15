//! Direct-effect screen: for each covariate × indicator pair a compared fit leaves out,
//! a likelihood-ratio test of adding the covariate as a direct effect on that indicator
//! (an effect inside every cluster, on top of any effect on membership).
//!
//! The null model is the placement's model with its gating covariates in the gating
//! network (for a three-step placement: the one-step model its step 3 approximates, whose
//! assumption is exactly that the covariates have no direct effects), plus the tested
//! covariate in the gating network if it is not there already, so that the test asks
//! about an effect beyond the one on membership. Both models are refitted by EM from the
//! compared fit's posteriors, so they sit at neighbouring optima.
//! Continuous indicators share one regression design, so a covariate is tested on all
//! of them at once. A pair is flagged when its p-value is below 0.05 divided by the
//! number of pairs tested in the placement (Bonferroni).

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
    /// Below the Bonferroni threshold of the placement.
    pub flagged: bool,
    /// For a three-step placement, whether the covariate is one of its step-3 covariates
    /// (a flagged pair then breaks the three-step assumption).
    pub step_three_covariate: bool,
    /// Why there is no statistic, when there is none.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub note: Option<String>,
}

/// A refit's log-likelihood and parameter count, or why it failed.
type Refit = Result<(f64, usize), String>;

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
            settings: EmSettings::for_search(&study.search),
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
    /// Every pair's test, flagged by Bonferroni over the placement's tests.
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
        let threshold = 0.05 / tests.len() as f64;
        tests
            .into_iter()
            .map(|mut t| {
                t.flagged = t.p_value.is_some_and(|p| p < threshold);
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
        if run.termination.usable() {
            Ok((run.loglik, k))
        } else {
            Err(run.termination.reason().unwrap_or("the refit failed").to_string())
        }
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
            (Ok((l0, k0)), Ok((l1, k1))) => Ok((2.0 * (l1 - l0), k1 - k0)),
            (Err(e), _) => Err(format!("the model without the effect failed: {e}")),
            (_, Err(e)) => Err(format!("the model with the effect failed: {e}")),
        };
        let (statistic, df, note) = match result {
            Ok((lr, df)) => (Some(lr.max(0.0)), df, None),
            Err(e) => (None, 0, Some(e)),
        };
        let placement = &self.pp.placement;
        DirectEffectTest {
            placement: self.f.placement.clone(),
            covariate: c.to_string(),
            indicator: group.to_string(),
            statistic,
            df,
            p_value: statistic.map(|x| super::effects::chi_squared_p_value(x, df)),
            flagged: false,
            step_three_covariate: placement.method.is_three_step() && placement.gating.iter().any(|x| x.name == c),
            note,
        }
    }
}
