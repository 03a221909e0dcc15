//! The output types of a run: `results.json` as serialise-only values (a documented wire
//! format, `docs/results-schema.md`; change them only with a new [`SCHEMA_VERSION`]),
//! built once from the fits, their inference and the comparison. The renderers read
//! only these.

use crate::compare::Numbering;
use crate::data::Dataset;
use crate::fit::{FitResult, PreparedPlacement};
use crate::inference::FitInference;
use crate::model::family::Parameter;
use crate::model::gating::Gating;
use crate::spec::Study;
use serde::Serialize;

/// Version of the `results.json` layout (4: `newton_steps_failed` per fit; 5: every
/// cluster by its number in the run's files, with its place in the fit beside it; 6: declared
/// weight types and the statistics that follow them; 7: distal outcomes per fit).
pub const SCHEMA_VERSION: u32 = 8;

fn is_zero(n: &usize) -> bool {
    *n == 0
}

/// What `results.json` holds, but for the comparison's sentences and notes, which
/// `render::json` adds.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct Results {
    /// Layout version.
    pub schema_version: u32,
    /// Program name and version.
    pub program: Program,
    /// What was analysed.
    pub study: StudySummary,
    /// Conventions a reader needs.
    pub conventions: Conventions,
    /// One entry per fitted (placement, cluster count).
    pub fits: Vec<FitRecord>,
    /// The lowest-BIC fit of each placement.
    pub chosen: Vec<Chosen>,
    /// The placement comparison (after `compare`; absent after `fit`). Written by the
    /// JSON renderer, with its findings in words.
    #[serde(skip)]
    pub comparison: Option<crate::compare::Comparison>,
}

/// Program identity.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct Program {
    /// Always `cohortmix`.
    pub name: &'static str,
    /// Crate version.
    pub version: &'static str,
}

/// The study and its data.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct StudySummary {
    /// Title from the spec.
    pub title: String,
    /// Spec file as given.
    pub spec_file: String,
    /// Data file as resolved.
    pub data_file: String,
    /// Data rows in the file.
    pub rows_read: usize,
    /// Rows used by every fit.
    pub rows_used: usize,
    /// Rows excluded for a missing needed value.
    pub rows_excluded: usize,
    /// Missing values per needed column.
    pub missing_by_column: Vec<MissingCount>,
    /// Weight column, if any.
    pub weights: Option<String>,
    /// What the weights mean: `frequency` or `sampling` (null without weights).
    pub weight_type: Option<&'static str>,
    /// The n of BIC, ICL and sample-size-adjusted BIC: the sum of frequency weights, else
    /// the rows used.
    pub sample_size: f64,
    /// Strata and sampling units of a survey sample (null without them).
    pub survey_design: Option<SurveyRecord>,
    /// Component family.
    pub family: &'static str,
    /// Indicator columns.
    pub indicators: Vec<String>,
    /// Master seed.
    pub seed: u64,
    /// Whether the spec says the data are simulated.
    pub simulated: bool,
    /// What reading the data noticed (levels that differ only in case).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub data_warnings: Vec<String>,
    /// Starts per fit (one-cluster fits need one).
    pub starts: usize,
    /// Iteration cap.
    pub max_iterations: usize,
    /// Convergence tolerance (relative log-likelihood change).
    pub tolerance: f64,
    /// EM iterations of every start before the starts still running are ranked.
    pub warmup_iterations: usize,
    /// How many of those run on to the end (at least `starts`: every start runs to its end).
    pub finish_best: usize,
    /// Whether EM steps were extrapolated (squared extrapolation).
    pub accelerate: bool,
    /// Ridge penalty on gating slopes.
    pub gating_ridge: f64,
    /// Covariance structures fitted, in words.
    pub covariance_structures: Vec<String>,
    /// Whether covariances are posterior-mode estimates under the conjugate prior of
    /// Fraley & Raftery (2007).
    pub covariance_prior: bool,
    /// Variance floor relative to the smallest indicator variance (0 = off).
    pub variance_floor: f64,
    /// How each indicator is modelled: `gaussian`, `item` or `count`, in `indicators` order.
    pub indicator_kinds: Vec<&'static str>,
    /// Item values missing in the rows used (skipped in those rows' likelihood).
    pub item_values_missing: usize,
    /// Pseudo-count per item and cluster keeping item probabilities off 0 and 1 (0 = none).
    pub item_smoothing: f64,
    /// Exposure (person-time) column of the counts, whose log is their offset.
    pub exposure: Option<String>,
}

/// The survey design standard errors were computed by.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct SurveyRecord {
    /// Strata column (null: one stratum).
    pub strata: Option<String>,
    /// Strata in the rows used.
    pub strata_count: usize,
    /// Primary sampling unit column (null: every row is a unit).
    pub psu: Option<String>,
    /// Sampling units of positive weight in the rows used.
    pub units: usize,
}

/// Missing values of one column.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct MissingCount {
    /// Column.
    pub column: String,
    /// Rows missing it.
    pub missing: usize,
}

/// Conventions stated once.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct Conventions {
    /// How BIC is defined.
    pub bic: &'static str,
    /// How AIC is defined.
    pub aic: &'static str,
    /// How the sample-size-adjusted BIC is defined.
    pub sabic: &'static str,
    /// How ICL is defined.
    pub icl: &'static str,
    /// Which cluster is the gating reference.
    pub reference_cluster: &'static str,
    /// How clusters are numbered.
    pub cluster_order: &'static str,
    /// Scale of reported coefficients.
    pub coefficient_scale: &'static str,
}

/// One fit.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct FitRecord {
    /// Placement name.
    pub placement: String,
    /// Gating covariates.
    pub gating_covariates: Vec<String>,
    /// Component covariates.
    pub component_covariates: Vec<String>,
    /// Clusters.
    pub clusters: usize,
    /// Covariance structure, in words.
    pub covariance: String,
    /// How the gating network is parameterised.
    pub gating_model: &'static str,
    /// `converged`, `iteration_cap`, `degenerate` or `numerical_fault`.
    pub status: String,
    /// Why, when the fit failed.
    pub reason: Option<String>,
    /// Weighted log-likelihood of the best start.
    pub loglik: Option<f64>,
    /// Free parameters.
    pub parameters: usize,
    /// Rows used (the n in BIC).
    pub rows: usize,
    /// BIC (smaller is better).
    pub bic: Option<f64>,
    /// AIC (smaller is better).
    pub aic: Option<f64>,
    /// Sample-size-adjusted BIC (smaller is better; Sclove 1987).
    pub sabic: Option<f64>,
    /// EM iterations of the best start.
    pub iterations: Option<usize>,
    /// Start summary.
    pub starts: StartSummary,
    /// The number each fitted cluster carries in every file of the run (fitted cluster k,
    /// 1-based, largest first, is `cluster_numbers[k - 1]`); empty when the fit failed.
    pub cluster_numbers: Vec<usize>,
    /// With a logit gating network: the number of its reference cluster (the fitted
    /// cluster 1), against which the gating coefficients are log relative risk ratios.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reference_cluster: Option<usize>,
    /// Cluster shares of the best fit, by cluster number.
    pub shares: Option<Vec<ClusterShare>>,
    /// Times the variance floor raised a covariance eigenvalue in the best start (0 when
    /// the floor is off or never acted).
    pub variance_floor_hits: usize,
    /// With item smoothing on: (cluster, item, level) cells of the best start with no
    /// posterior weight, whose probability smoothing held off 0 (absent without smoothing).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub item_cells_held_off_zero: Option<usize>,
    /// M-steps of the best start whose inner Newton step failed (its line search, or a
    /// singular Hessian): gating, item logits and rate regressions (absent when none did).
    #[serde(skip_serializing_if = "is_zero")]
    pub newton_steps_failed: usize,
    /// Every parameter, named, on the original scale, with its standard error when the
    /// fit's standard errors were computed.
    pub parameters_named: Vec<NamedParameter>,
    /// For the fits compared (each placement's chosen fit): how standard errors were
    /// computed, or why they could not be.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub standard_errors: Option<StandardErrors>,
    /// Covariate effects with 95% confidence intervals, when standard errors exist.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub effects: Vec<NumberedEffect>,
    /// Joint Wald tests of each gating covariate, when standard errors exist.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub gating_tests: Vec<crate::inference::effects::WaldTest>,
    /// Three-step placements: the method, the classification-error matrix and the share
    /// misclassified (the gating parameters above are the step-3 estimates).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub step_three: Option<StepThreeRecord>,
    /// The placement's distal outcomes compared across this fit's clusters (compared fits
    /// only), each with its estimates or why there are none.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub outcomes: Vec<OutcomeEntry>,
}

/// A distal outcome compared across a fit's clusters, or why it could not be.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct OutcomeEntry {
    /// The outcome column.
    pub outcome: String,
    /// The comparison (null when it failed).
    pub comparison: Option<crate::inference::outcomes::OutcomeRecord>,
    /// Why it failed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unavailable: Option<String>,
}

/// One cluster's share.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct ClusterShare {
    /// The cluster's number in the run's files.
    pub cluster: usize,
    /// Its place in the fit (1 = largest).
    pub fitted_cluster: usize,
    /// Its weighted share of the rows.
    pub share: f64,
}

/// An effect, with its cluster by number (`cluster`) and as fitted.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct NumberedEffect {
    /// The effect; its `cluster` is the cluster's number in the run's files.
    #[serde(flatten)]
    pub effect: crate::inference::effects::Effect,
    /// The cluster's place in the fit (1 = largest).
    pub fitted_cluster: usize,
}

/// Step 3 of a three-step placement, with its clusters by number.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct StepThreeRecord {
    /// BCH, ML or two-step.
    pub method: crate::spec::Method,
    /// The cluster numbers of the classification matrix's rows and columns, in order.
    pub clusters: Vec<usize>,
    /// `classification[s][t]` = P(assigned to cluster `clusters[t]` | in cluster
    /// `clusters[s]`).
    pub classification: Vec<Vec<f64>>,
    /// Weighted share of rows whose assignment differs from their cluster, as the
    /// posteriors estimate it.
    pub misclassified: f64,
    /// Whether the step-3 optimiser met its tolerance.
    pub converged: bool,
    /// How the step-3 coefficients' standard errors include step 1's uncertainty:
    /// `step-1-added` (V₃ + C V₁ C′, Bakk, Oberski & Vermunt 2014) or `bootstrap` (each
    /// replicate reran the three steps); null without standard errors.
    pub errors_include_step_one: Option<&'static str>,
    /// The largest relative change of a step-3 standard error from step 3's own:
    /// corrected / own − 1 (above 0 when step 1's part is added; a bootstrap's can be
    /// below).
    pub step_one_increase: Option<f64>,
}

impl StepThreeRecord {
    /// Step 3's record with its rows and columns in the order of the cluster numbers.
    fn numbered(
        st: &crate::fit::three_step::StepThree,
        numbers: &[usize],
        errors: Option<&crate::inference::StepThreeErrors>,
    ) -> StepThreeRecord {
        let mut order: Vec<usize> = (0..numbers.len()).collect();
        order.sort_by_key(|k| numbers[*k]);
        StepThreeRecord {
            method: st.method,
            clusters: order.iter().map(|k| numbers[*k]).collect(),
            classification: order
                .iter()
                .map(|s| order.iter().map(|t| st.classification[*s][*t]).collect())
                .collect(),
            misclassified: st.misclassified,
            converged: st.converged,
            errors_include_step_one: errors.map(|e| if e.bootstrap { "bootstrap" } else { "step-1-added" }),
            step_one_increase: errors.map(|e| e.largest_increase),
        }
    }
}

/// A named parameter and its standard error.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct NamedParameter {
    /// The parameter; its `cluster` is the cluster's number in the run's files.
    #[serde(flatten)]
    pub parameter: Parameter,
    /// The cluster's place in the fit (1 = largest).
    pub fitted_cluster: usize,
    /// Standard error (on the parameter's scale), when computed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub se: Option<f64>,
}

/// How a fit's standard errors were obtained.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct StandardErrors {
    /// `observed-information`, `sandwich` or `bootstrap`.
    pub method: Option<&'static str>,
    /// Bootstrap: replicates drawn.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub replicates: Option<usize>,
    /// Bootstrap: replicates whose refit was usable.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub replicates_usable: Option<usize>,
    /// Why there are none, when there are none.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unavailable: Option<String>,
}

/// How the starts went.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct StartSummary {
    /// Starts run.
    pub total: usize,
    /// Starts run to their end (all but those the two-stage search set aside after the
    /// warm-up).
    pub finished: usize,
    /// Starts that converged or hit the cap (not degenerate, not spurious, not set aside).
    pub usable: usize,
    /// Starts that ended at a spurious solution (a cluster fitting a few rows too
    /// closely), set apart and never chosen.
    pub spurious: usize,
    /// Starts on the best start's optimum: within 0.01 of its log-likelihood (or 1e-9 of
    /// its size) where the search tolerance stopped them.
    pub reaching_best: usize,
    /// The best start (1-based).
    pub best_start: Option<usize>,
    /// True when the best value was reached by one start only of several.
    pub best_reached_once: bool,
    /// Every start.
    pub each: Vec<crate::fit::StartRecord>,
}

/// The chosen fit of a placement.
#[derive(Debug, Serialize, schemars::JsonSchema)]
pub struct Chosen {
    /// Placement.
    pub placement: String,
    /// Clusters of its lowest-BIC fit.
    pub clusters: usize,
    /// Covariance structure of that fit.
    pub covariance: String,
    /// That BIC.
    pub bic: f64,
}

fn gating_word(g: &Gating) -> &'static str {
    match g {
        Gating::Equal { g: 1 } => "single cluster",
        Gating::Equal { .. } => "equal proportions",
        Gating::Fixed { .. } => "fixed proportions",
        Gating::Free { .. } => "free proportions",
        Gating::Logit { .. } => "multinomial logit",
    }
}

fn status_word(t: &crate::fit::em::Termination) -> String {
    t.word().replace(' ', "_")
}

/// Assemble `results.json` (without the comparison).
pub fn results(
    study: &Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[FitResult],
    inference: &[Option<FitInference>],
    numbering: &Numbering,
) -> Results {
    let records = fits
        .iter()
        .enumerate()
        .map(|(fi, f)| {
            fit_record(
                &prepared[f.placement_index],
                f,
                inference.get(fi).and_then(Option::as_ref),
                data,
                numbering.of(fi),
            )
        })
        .collect();
    Results {
        schema_version: SCHEMA_VERSION,
        program: Program {
            name: "cohortmix",
            version: env!("CARGO_PKG_VERSION"),
        },
        study: study_summary(study, data),
        conventions: Conventions {
            bic: "BIC = -2 loglik + parameters * ln(n), n = study.sample_size (the sum of frequency weights, else the rows used); smaller is better",
            aic: "AIC = -2 loglik + 2 * parameters; smaller is better",
            sabic: "SABIC = -2 loglik + parameters * ln((n + 2) / 24) (Sclove 1987); smaller is better",
            icl: "ICL = BIC - 2 * sum over rows of weight * ln(largest posterior) (Biernacki, Celeux & Govaert 2000); bic_entropy = BIC + 2 * classification entropy; smaller is better",
            reference_cluster:
                "gating coefficients are log relative risk ratios against each fit's reference_cluster (its largest cluster)",
            cluster_order: CLUSTER_ORDER,
            coefficient_scale: "coefficients are per unit of each covariate on its original scale",
        },
        fits: records,
        chosen: chosen(fits),
        comparison: None,
    }
}

/// How clusters are numbered, as `results.json` states it.
pub const CLUSTER_ORDER: &str = "every file of a run numbers clusters alike: in a comparison, each cluster takes the number of the reference placement's compared cluster it agrees with most (clusters without a counterpart are numbered after them); after `fit`, clusters are numbered by decreasing share (fixed proportions keep the spec's order). fitted_cluster gives a cluster's place in its own fit";

/// One fit's record: its criteria, starts, named parameters with their standard errors,
/// effects and tests, with clusters by their `numbers`.
fn fit_record(
    pp: &PreparedPlacement,
    f: &FitResult,
    by_fit: Option<&FitInference>,
    data: &Dataset,
    numbers: &[usize],
) -> FitRecord {
    let number = |k: usize| numbers.get(k - 1).copied().unwrap_or(k);
    let termination = f.termination();
    let (parameters_named, gating_model) = match &f.best {
        Some(b) => (
            crate::inference::named_parameters(&f.reported_model().unwrap_or_else(|| b.run.model.clone()), pp),
            gating_word(&b.run.model.gating),
        ),
        None => (Vec::new(), "none"),
    };
    let usable = f.starts.iter().filter(|s| s.termination.usable()).count();
    let u = by_fit.map(|i| &i.uncertainty);
    let ok = u.and_then(|r| r.as_ref().ok());
    let parameters_named = parameters_named
        .into_iter()
        .enumerate()
        .map(|(i, parameter)| NamedParameter {
            fitted_cluster: parameter.cluster,
            parameter: Parameter {
                cluster: number(parameter.cluster),
                ..parameter
            },
            se: ok.map(|u| u.se(i)),
        })
        .collect();
    let standard_errors = u.map(|r| match r {
        Ok(u) => StandardErrors {
            method: Some(u.method.word()),
            replicates: u.replicates.map(|r| r.1),
            replicates_usable: u.replicates.map(|r| r.0),
            unavailable: None,
        },
        Err(reason) => StandardErrors {
            method: None,
            replicates: None,
            replicates_usable: None,
            unavailable: Some(reason.clone()),
        },
    });
    let effects = by_fit.map_or_else(Vec::new, |i| {
        i.effects
            .iter()
            .map(|e| NumberedEffect {
                fitted_cluster: e.cluster,
                effect: crate::inference::effects::Effect {
                    cluster: number(e.cluster),
                    ..e.clone()
                },
            })
            .collect()
    });
    let shares = f.shares(&data.weights).map(|shares| {
        let mut shares: Vec<ClusterShare> = shares
            .into_iter()
            .enumerate()
            .map(|(k, share)| ClusterShare {
                cluster: number(k + 1),
                fitted_cluster: k + 1,
                share,
            })
            .collect();
        shares.sort_by_key(|s| s.cluster);
        shares
    });
    let logit = f
        .best
        .as_ref()
        .is_some_and(|b| matches!(b.run.model.gating, Gating::Logit { .. }));
    let gating_tests = by_fit.map_or_else(Vec::new, |i| i.gating_tests.clone());
    FitRecord {
        placement: f.placement.clone(),
        gating_covariates: pp.placement.gating.iter().map(|c| c.name.clone()).collect(),
        component_covariates: pp.placement.components.iter().map(|c| c.name.clone()).collect(),
        clusters: f.clusters,
        covariance: f.covariance(),
        gating_model,
        status: status_word(&termination),
        reason: termination.reason().map(str::to_string),
        loglik: f.loglik(),
        parameters: f.n_params,
        rows: f.n_rows,
        bic: f.bic(),
        aic: f.aic(),
        sabic: f.sabic(),
        iterations: f.best.as_ref().map(|b| b.run.iterations),
        starts: StartSummary {
            total: f.starts.len(),
            finished: f.finished_starts(),
            usable,
            spurious: f
                .starts
                .iter()
                .filter(|s| matches!(s.termination, crate::fit::em::Termination::Spurious(_)))
                .count(),
            reaching_best: f.best.as_ref().map_or(0, |b| b.reaching),
            best_start: f.best.as_ref().map(|b| b.start),
            best_reached_once: f.best.as_ref().is_some_and(|b| b.reaching == 1 && usable > 1),
            each: f.starts.clone(),
        },
        cluster_numbers: if f.best.is_some() { numbers.to_vec() } else { Vec::new() },
        reference_cluster: logit.then(|| number(1)),
        shares,
        variance_floor_hits: f
            .best
            .as_ref()
            .and_then(|b| b.run.model.components.guard(crate::model::family::VARIANCE_FLOOR_HITS))
            .unwrap_or(0),
        item_cells_held_off_zero: f.best.as_ref().and_then(|b| {
            b.run
                .model
                .components
                .guard(crate::model::family::ITEM_CELLS_HELD_OFF_ZERO)
        }),
        newton_steps_failed: f.best.as_ref().map_or(0, |b| {
            b.run.gating_failed
                + b.run
                    .model
                    .components
                    .guard(crate::model::family::NEWTON_STEPS_FAILED)
                    .unwrap_or(0)
        }),
        parameters_named,
        standard_errors,
        effects,
        gating_tests,
        step_three: f
            .step_three
            .as_ref()
            .and_then(|r| r.as_ref().ok())
            .map(|st| StepThreeRecord::numbered(st, numbers, by_fit.and_then(|i| i.step_three_errors.as_ref()))),
        outcomes: by_fit.map_or_else(Vec::new, |i| {
            i.outcomes
                .iter()
                .map(|(name, r)| OutcomeEntry {
                    outcome: name.clone(),
                    comparison: r.as_ref().ok().map(|e| crate::inference::outcomes::record(e, numbers)),
                    unavailable: r.as_ref().err().cloned(),
                })
                .collect()
        }),
    }
}

/// What was analysed, and how.
fn study_summary(study: &Study, data: &Dataset) -> StudySummary {
    StudySummary {
        title: study.title.clone(),
        spec_file: study.spec_path.display().to_string(),
        data_file: study.data_path.display().to_string(),
        rows_read: data.rows_read,
        rows_used: data.n(),
        rows_excluded: data.rows_excluded,
        missing_by_column: data
            .missing_by_column
            .iter()
            .map(|(c, m)| MissingCount {
                column: c.clone(),
                missing: *m,
            })
            .collect(),
        weights: study.weights.as_ref().map(|w| w.name.clone()),
        weight_type: study.weight_type.map(|t| t.word()),
        sample_size: data.sample_size,
        survey_design: data.survey.as_ref().map(|d| SurveyRecord {
            strata: study.strata.as_ref().map(|c| c.name.clone()),
            strata_count: d.strata.len(),
            psu: study.psu.as_ref().map(|c| c.name.clone()),
            units: d.units(),
        }),
        family: study.family.word(),
        indicators: data.indicator_names.clone(),
        seed: study.seed,
        simulated: study.simulated,
        data_warnings: data.warnings.clone(),
        starts: study.search.starts,
        max_iterations: study.search.max_iterations,
        tolerance: study.search.tolerance,
        warmup_iterations: study.search.warmup_iterations,
        accelerate: study.search.accelerate,
        finish_best: study.search.finish_best,
        gating_ridge: study.search.gating_ridge,
        covariance_structures: study
            .search
            .structures
            .iter()
            .map(|s| crate::fit::covariance_label(s, study.reads(crate::spec::FamilyKey::Covariance)))
            .collect(),
        covariance_prior: study.search.covariance_prior,
        variance_floor: study.search.variance_floor,
        indicator_kinds: study.indicator_families.iter().map(|f| f.indicator_word).collect(),
        item_values_missing: data.indicator_sets.iter().map(|s| s.missing_values()).sum(),
        item_smoothing: study.smoothing,
        exposure: study.exposure.as_ref().map(|e| e.name.clone()),
    }
}

/// The lowest-BIC usable fit per placement, in placement order.
pub fn chosen(fits: &[FitResult]) -> Vec<Chosen> {
    let mut out: Vec<Chosen> = Vec::new();
    for f in fits {
        let Some(bic) = f.bic() else { continue };
        match out.iter_mut().find(|c| c.placement == f.placement) {
            Some(c) if bic < c.bic => {
                c.clusters = f.clusters;
                c.covariance = f.covariance();
                c.bic = bic;
            }
            Some(_) => {}
            None => out.push(Chosen {
                placement: f.placement.clone(),
                clusters: f.clusters,
                covariance: f.covariance(),
                bic,
            }),
        }
    }
    out
}
