//! The placement comparison: criteria, clusters aligned across placements, profiles,
//! gating effects, cross-tables and findings.
//!
//! For each placement the chosen fit (lowest BIC, or lowest BIC at the cluster count the
//! spec fixes) is aligned to the reference placement's chosen fit by maximising agreement:
//! the cross-table of summed posteriors C[a][b] = Σ_i c_i τ_ref(i, a) τ(i, b) goes through
//! the Hungarian method, so a cluster keeps one number (and colour) everywhere. Clusters
//! without a counterpart get new numbers after the reference's.
//!
//! Everything here is plain data for the report; no numbers are computed in the report.

mod align;
pub mod assign;
pub mod findings;
mod parts;
pub mod table_one;
pub mod terms;

pub use align::{Numbering, ALL_PAIRS_UP_TO};
pub use findings::{findings, Finding, RowRef, Source, TableId};

use crate::data::Dataset;
use crate::fit::{chosen_fits, FitResult, PreparedPlacement};
use crate::inference::FitInference;
use crate::spec::CompareSettings;
use serde::Serialize;

/// One row of the criteria table.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct Criteria {
    /// Placement.
    pub placement: String,
    /// Clusters.
    pub clusters: usize,
    /// Covariance structure in words.
    pub covariance: String,
    /// How the fit ended.
    pub status: String,
    /// Log-likelihood.
    pub loglik: Option<f64>,
    /// Free parameters.
    pub parameters: usize,
    /// BIC (smaller is better).
    pub bic: Option<f64>,
    /// AIC (smaller is better).
    pub aic: Option<f64>,
    /// Sample-size-adjusted BIC (smaller is better; Sclove 1987).
    pub sabic: Option<f64>,
    /// ICL = BIC − 2 Σ_i w_i ln τ_i,MAP, the log of each row's largest posterior (smaller
    /// is better; Biernacki, Celeux & Govaert 2000).
    pub icl: Option<f64>,
    /// BIC + 2 × the classification entropy EN (the soft form of ICL; smaller is better).
    pub bic_entropy: Option<f64>,
    /// Approximate posterior probability of this model among the placement's fits,
    /// exp(−ΔBIC/2) normalised.
    pub bic_weight: Option<f64>,
    /// Relative entropy 1 − EN/(n ln G): 1 = crisp classification (not defined for G = 1).
    pub relative_entropy: Option<f64>,
    /// Weighted mean of the largest posterior among the rows assigned to each cluster, by
    /// cluster number.
    pub average_posterior: Vec<ClusterValue>,
    /// Smallest cluster share (weighted posterior).
    pub smallest_share: Option<f64>,
    /// Weighted count of the rows assigned (most likely) to the smallest cluster: people
    /// under frequency weights, rows without weights.
    pub smallest_count: Option<f64>,
    /// Starts on the best start's optimum (see [`crate::fit::same_optimum`]).
    pub starts_reaching_best: usize,
    /// Starts run to their end (see [`crate::fit::FitResult::finished_starts`]).
    pub starts: usize,
    /// Whether this fit is the one the comparison uses for its placement.
    pub chosen: bool,
}

/// A value of one cluster, by its number.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct ClusterValue {
    /// The cluster's number (as in every file of the run).
    pub cluster: usize,
    /// The value.
    pub value: f64,
}

/// How one placement's chosen clusters map onto the aligned clusters.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct Alignment {
    /// Placement.
    pub placement: String,
    /// Clusters of its chosen fit.
    pub clusters: usize,
    /// Covariance structure of its chosen fit.
    pub covariance: String,
    /// For each fitted cluster (1-based order), its aligned number.
    pub aligned: Vec<usize>,
    /// For each fitted cluster, the share of its posterior weight that lies in the matched
    /// reference cluster (None for clusters with no counterpart).
    pub overlap: Vec<Option<f64>>,
}

/// One aligned cluster under one placement.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct Profile {
    /// Aligned cluster number.
    pub cluster: usize,
    /// Placement.
    pub placement: String,
    /// Weighted posterior share.
    pub share: f64,
    /// Rows whose most likely cluster it is.
    pub count: usize,
    /// Profile values (see [`Comparison::indicators`]) at the reference covariate values
    /// (sample mean of continuous and count covariates, reference level of categorical
    /// and binary ones).
    pub at_reference: Vec<f64>,
    /// 95% intervals of `at_reference` ([`crate::inference::profile_intervals`]: delta
    /// method with the fit's analytic errors, on the logit scale for probabilities and the
    /// log scale for rates), null where a value has none; empty without analytic errors.
    pub at_reference_interval: Vec<Option<[f64; 2]>>,
    /// Profile values averaged over the sample, weighted by the posterior.
    pub population_averaged: Vec<f64>,
}

/// A gating effect as a relative risk ratio against aligned cluster 1.
#[derive(Debug, Clone, PartialEq, Serialize, schemars::JsonSchema)]
pub struct GatingEffect {
    /// Placement.
    pub placement: String,
    /// Aligned cluster compared with aligned cluster 1.
    pub cluster: usize,
    /// Gating term.
    pub term: String,
    /// The term in words.
    pub words: terms::TermWords,
    /// Units of the term per which the ratio is given (`[inference].per`, else 1).
    pub per: f64,
    /// exp(per × coefficient): multiplies the relative risk of the cluster versus
    /// cluster 1 per `per` units of the term.
    pub rrr: f64,
    /// 95% confidence interval of the ratio, when standard errors are available.
    pub interval: Option<(f64, f64)>,
    /// Wald p-value against a ratio of 1, when standard errors are available.
    pub p_value: Option<f64>,
    /// The term separates the two clusters (quasi-complete separation): the ratio runs off
    /// towards 0 or infinity and is not an estimate of an effect (see
    /// [`GatingEffect::separates`]). The ratio, interval and p-value are then not shown.
    pub separation: bool,
}

/// |ln RRR| above which a gating ratio is taken as separation rather than an effect:
/// a factor of e^15 ≈ 3 million (per the stated units) is not an effect a cohort can
/// estimate but a coefficient running away.
pub const SEPARATION_LOG_RATIO: f64 = 15.0;

/// With a standard error of ln RRR above this (a 95% interval spanning a factor of more
/// than e^(2 × 1.96 × 5) ≈ 3 × 10^8), a ratio beyond e^5 ≈ 150 (or below its inverse) is
/// taken as separation too: a coefficient on its way out, stopped by the tolerance.
pub const SEPARATION_LOG_SE: f64 = 5.0;

impl GatingEffect {
    /// Whether an estimate ln RRR with standard error `se` (log scale; None without
    /// standard errors) shows separation: a runaway coefficient, or a large one whose
    /// interval is not finite or too wide to mean anything. A term whose estimate is near
    /// 1 but whose interval is wide (because another term separates) is not flagged: it
    /// does not separate, its interval says how little is known.
    pub fn separates(log_ratio: f64, se: Option<f64>) -> bool {
        let wide = se.is_some_and(|s| !s.is_finite() || s > SEPARATION_LOG_SE);
        !log_ratio.is_finite()
            || log_ratio.abs() > SEPARATION_LOG_RATIO
            || (wide && log_ratio.abs() > SEPARATION_LOG_SE)
    }
}

/// A component covariate effect of a compared fit, by aligned cluster.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct ComponentEffect {
    /// Placement.
    pub placement: String,
    /// Aligned cluster.
    pub cluster: usize,
    /// The effect, its measure and interval.
    #[serde(flatten)]
    pub effect: crate::inference::effects::Effect,
}

/// A distal outcome compared across a placement's clusters.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct OutcomeComparison {
    /// Placement.
    pub placement: String,
    /// Outcome column.
    pub outcome: String,
    /// The comparison, clusters by their aligned numbers (null when it failed).
    pub comparison: Option<crate::inference::outcomes::OutcomeRecord>,
    /// Why it failed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unavailable: Option<String>,
}

/// A three-step placement's gating effect: the corrected estimate beside plain
/// classify-analyze, which is biased toward no effect and shown only as a contrast.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct ThreeStepEffect {
    /// Placement.
    pub placement: String,
    /// `three-step-bch` or `three-step-ml`.
    pub method: &'static str,
    /// Weighted share of rows assigned to another cluster than their own (estimated).
    pub misclassified: f64,
    /// Aligned cluster.
    pub cluster: usize,
    /// Aligned cluster it is compared with (the placement's fitted cluster 1).
    pub versus: usize,
    /// Gating term.
    pub term: String,
    /// Units of the term per which the ratios are given.
    pub per: f64,
    /// Corrected relative risk ratio with its 95% interval.
    pub corrected: crate::inference::effects::Interval,
    /// Classify-analyze relative risk ratio with its 95% interval (biased; a contrast).
    pub classify_analyze: crate::inference::effects::Interval,
}

/// A joint Wald test of a gating covariate in a compared fit.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct GatingTest {
    /// Placement.
    pub placement: String,
    /// The test.
    #[serde(flatten)]
    pub test: crate::inference::effects::WaldTest,
}

/// What the comparison knows of the compared fits' uncertainty.
#[derive(Debug, Clone, Copy)]
pub struct InferenceInput<'a> {
    /// Units per which covariate effects are shown.
    pub per: &'a std::collections::BTreeMap<String, f64>,
    /// Per fit (indexed as the fits): its standard errors and effects, or None when they
    /// were not computed.
    pub by_fit: &'a [Option<FitInference>],
    /// The direct-effect screen of the compared fits.
    pub screen: &'a [crate::inference::screen::DirectEffectTest],
    /// Bootstrap tests of the compared fits' cluster counts.
    pub cluster_tests: &'a [crate::inference::cluster_test::ClusterCountTest],
    /// Labels and units of the columns (`[variables]`).
    pub words: &'a std::collections::BTreeMap<String, crate::spec::ColumnWords>,
}

static NO_UNITS: std::collections::BTreeMap<String, f64> = std::collections::BTreeMap::new();
static NO_WORDS: std::collections::BTreeMap<String, crate::spec::ColumnWords> = std::collections::BTreeMap::new();

impl InferenceInput<'static> {
    /// No standard errors: effects without intervals, per unit.
    pub fn none() -> InferenceInput<'static> {
        InferenceInput {
            per: &NO_UNITS,
            by_fit: &[],
            screen: &[],
            cluster_tests: &[],
            words: &NO_WORDS,
        }
    }
}

/// How a compared fit's standard errors were obtained, or why there are none.
#[derive(Debug, Clone, PartialEq)]
pub struct InferenceNote {
    /// Placement.
    pub placement: String,
    /// The method and, for the bootstrap, replicates usable of those drawn; or why there
    /// are no standard errors.
    pub outcome: std::result::Result<(crate::spec::ErrorMethod, Option<(usize, usize)>), String>,
}

/// Most-likely clusters of two placements cross-tabulated (aligned numbers).
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct CrossTable {
    /// Row placement.
    pub rows: String,
    /// Column placement.
    pub columns: String,
    /// Aligned numbers on the rows.
    pub row_clusters: Vec<usize>,
    /// Aligned numbers on the columns.
    pub column_clusters: Vec<usize>,
    /// Counts.
    pub counts: Vec<Vec<usize>>,
    /// Adjusted Rand index (Hubert & Arabie 1985).
    pub adjusted_rand_index: f64,
    /// Per row cluster: share of its rows with the same aligned cluster in the column
    /// placement (None when that placement has no such cluster).
    pub agreement: Vec<Option<f64>>,
}

/// How the reference placement's clusters split from one cluster count to the next: the
/// rows (weighted) by most likely cluster under the best fit with `from` clusters and under
/// the best with `to` = `from` + 1, both of the compared fit's covariance structure, in the
/// run's cluster numbers.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct SplitStep {
    /// Placement.
    pub placement: String,
    /// The smaller count.
    pub from: usize,
    /// The larger count.
    pub to: usize,
    /// Cluster numbers of the `from` fit.
    pub from_clusters: Vec<usize>,
    /// Cluster numbers of the `to` fit.
    pub to_clusters: Vec<usize>,
    /// Weighted rows, `counts[a][b]`: most likely cluster `from_clusters[a]`, then
    /// `to_clusters[b]`.
    pub counts: Vec<Vec<f64>>,
}

/// The reference placement's split steps over the counts fitted, at the compared fit's
/// structure.
fn splits(
    fits: &[FitResult],
    numbering: &Numbering,
    chosen: &[Option<usize>],
    reference: usize,
    weights: &[f64],
) -> Vec<SplitStep> {
    let Some(compared) = chosen.get(reference).copied().flatten() else {
        return Vec::new();
    };
    let structure = fits[compared].structure;
    let mut by_count: Vec<usize> = fits
        .iter()
        .enumerate()
        .filter(|(_, f)| f.placement_index == reference && f.structure == structure && f.best.is_some())
        .map(|(i, _)| i)
        .collect();
    by_count.sort_by_key(|i| fits[*i].clusters);
    let mut out = Vec::new();
    for pair in by_count.windows(2) {
        let (a, b) = (&fits[pair[0]], &fits[pair[1]]);
        if b.clusters != a.clusters + 1 {
            continue;
        }
        let (Some(ba), Some(bb)) = (&a.best, &b.best) else {
            continue;
        };
        let (ga, gb) = (a.clusters, b.clusters);
        let mut counts = vec![vec![0.0; gb]; ga];
        for (i, w) in weights.iter().enumerate() {
            let ka = crate::numerics::most_likely(&ba.run.tau[i * ga..(i + 1) * ga]);
            let kb = crate::numerics::most_likely(&bb.run.tau[i * gb..(i + 1) * gb]);
            counts[ka][kb] += w;
        }
        // Rows and columns in the order of their numbers.
        let order = |numbers: &[usize]| {
            let mut o: Vec<usize> = (0..numbers.len()).collect();
            o.sort_by_key(|k| numbers[*k]);
            o
        };
        let (na, nb) = (numbering.of(pair[0]), numbering.of(pair[1]));
        let (oa, ob) = (order(na), order(nb));
        out.push(SplitStep {
            placement: a.placement.clone(),
            from: ga,
            to: gb,
            from_clusters: oa.iter().map(|k| na[*k]).collect(),
            to_clusters: ob.iter().map(|k| nb[*k]).collect(),
            counts: oa
                .iter()
                .map(|ka| ob.iter().map(|kb| counts[*ka][*kb]).collect())
                .collect(),
        });
    }
    out
}

/// Membership probabilities against one continuous gating covariate, with the other
/// covariates at their reference values (one curve set per level of a categorical
/// gating covariate, when there is one).
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct EffectCurve {
    /// Placement.
    pub placement: String,
    /// The covariate on the x axis.
    pub covariate: String,
    /// The categorical covariate and level this curve set is for, if any.
    pub level: Option<(String, String)>,
    /// Covariate values.
    pub x: Vec<f64>,
    /// Aligned cluster numbers, in the order of `probabilities`.
    pub clusters: Vec<usize>,
    /// `probabilities[c][i]`: probability of aligned cluster `clusters[c]` at `x[i]`.
    pub probabilities: Vec<Vec<f64>>,
}

/// The whole comparison.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct Comparison {
    /// Reference placement.
    pub reference: String,
    /// Names of aligned clusters, by number (`[compare] names`).
    pub cluster_names: std::collections::BTreeMap<usize, String>,
    /// Cluster count fixed by the spec, if any.
    pub fixed_clusters: Option<usize>,
    /// How reference covariate values are set for profiles.
    pub reference_values: String,
    /// Profile columns in words ([`terms::profile_label`]): a continuous indicator's label
    /// and unit (its mean), `item: level` (that level's probability; binary items show
    /// level 1 only) or `count (rate)` (events per unit of exposure, or the mean count
    /// without an exposure).
    pub indicators: Vec<String>,
    /// Criteria, one row per fit.
    pub criteria: Vec<Criteria>,
    /// Alignment per placement (reference first).
    pub alignments: Vec<Alignment>,
    /// Profiles per aligned cluster and placement.
    pub profiles: Vec<Profile>,
    /// Gating effects.
    pub gating_effects: Vec<GatingEffect>,
    /// Joint Wald tests of each gating covariate.
    pub gating_tests: Vec<GatingTest>,
    /// Three-step placements: corrected and classify-analyze gating effects.
    pub three_step: Vec<ThreeStepEffect>,
    /// Distal outcomes compared across each placement's clusters.
    pub outcomes: Vec<OutcomeComparison>,
    /// "Table 1": every covariate and indicator per aligned cluster of each compared fit,
    /// posterior-weighted and by most likely cluster ([`table_one`]).
    pub table_one: Vec<table_one::TableOneCell>,
    /// Likelihood-ratio tests of direct effects the compared fits leave out.
    pub direct_effects: Vec<crate::inference::screen::DirectEffectTest>,
    /// Bootstrap likelihood-ratio tests of each compared fit's cluster count against one
    /// fewer.
    pub cluster_count_tests: Vec<crate::inference::cluster_test::ClusterCountTest>,
    /// How the reference placement's clusters split as the count grows.
    pub splits: Vec<SplitStep>,
    /// Approximate probability of each cluster count per placement: the BIC weights of
    /// the placement's fits at that count, summed over covariance structures.
    pub count_probabilities: Vec<CountProbability>,
    /// Component covariate effects (mean differences, odds ratios, rate ratios).
    pub component_effects: Vec<ComponentEffect>,
    /// How standard errors were computed, and per placement why they are missing
    /// (written with the findings, in words).
    #[serde(skip)]
    pub inference_notes: Vec<InferenceNote>,
    /// Cross-tables between each pair of placements.
    pub cross_tables: Vec<CrossTable>,
    /// Posterior certainty (largest posterior per row) histogram per placement: 10 bins on
    /// [0, 1], weighted counts.
    pub certainty: Vec<(String, Vec<f64>)>,
    /// Effect curves of gating covariates.
    pub effect_curves: Vec<EffectCurve>,
    /// What the comparison says, as typed findings (written in words, as `sentences`).
    #[serde(skip)]
    pub findings: Vec<Finding>,
}

fn criteria(fits: &[FitResult], weights: &[f64], chosen: &[Option<usize>], numbering: &Numbering) -> Vec<Criteria> {
    let mut out = Vec::new();
    for (i, f) in fits.iter().enumerate() {
        let g = f.clusters;
        let (mut icl, mut bic_entropy, mut rel, mut avg, mut smallest, mut smallest_n) =
            (None, None, None, Vec::new(), None, None);
        if let Some(b) = &f.best {
            let tau = &b.run.tau;
            let en: f64 = tau
                .chunks_exact(g)
                .zip(weights)
                .map(|(row, c)| -c * row.iter().filter(|t| **t > 0.0).map(|t| t * t.ln()).sum::<f64>())
                .sum();
            bic_entropy = f.bic().map(|bic| bic + 2.0 * en);
            // The classification likelihood of the most likely labels: Σ w_i ln τ_i,MAP.
            let map_loglik: f64 = tau
                .chunks_exact(g)
                .zip(weights)
                .map(|(row, c)| c * row[crate::numerics::most_likely(row)].max(f64::MIN_POSITIVE).ln())
                .sum();
            icl = f.bic().map(|bic| bic - 2.0 * map_loglik);
            if g > 1 {
                let total: f64 = weights.iter().sum();
                rel = Some(1.0 - en / (total * (g as f64).ln()));
            }
            let mut sums = vec![0.0; g];
            let mut counts = vec![0.0; g];
            for (row, c) in tau.chunks_exact(g).zip(weights) {
                let k = crate::numerics::most_likely(row);
                sums[k] += c * row[k];
                counts[k] += c;
            }
            avg = sums
                .iter()
                .zip(&counts)
                .zip(numbering.of(i))
                .map(|((s, c), number)| ClusterValue {
                    cluster: *number,
                    value: if *c > 0.0 { s / c } else { 0.0 },
                })
                .collect();
            avg.sort_by_key(|v| v.cluster);
            let shares = crate::fit::cluster_shares(tau, weights, g);
            let k_min = (0..g).min_by(|a, b| shares[*a].total_cmp(&shares[*b])).unwrap_or(0);
            smallest = Some(shares[k_min]);
            smallest_n = Some(counts[k_min]);
        }
        out.push(Criteria {
            placement: f.placement.clone(),
            clusters: g,
            covariance: f.covariance(),
            status: f.termination().word().replace(' ', "_"),
            loglik: f.loglik(),
            parameters: f.n_params,
            bic: f.bic(),
            aic: f.aic(),
            sabic: f.sabic(),
            icl,
            bic_entropy,
            bic_weight: None,
            relative_entropy: rel,
            average_posterior: avg,
            smallest_share: smallest,
            smallest_count: smallest_n,
            starts_reaching_best: f.best.as_ref().map_or(0, |b| b.reaching),
            starts: f.finished_starts(),
            chosen: chosen.contains(&Some(i)),
        });
    }
    // Posterior model probabilities within each placement.
    let names: Vec<String> = out.iter().map(|c| c.placement.clone()).collect();
    for name in names.iter() {
        let best = out
            .iter()
            .filter(|c| &c.placement == name)
            .filter_map(|c| c.bic)
            .fold(f64::INFINITY, f64::min);
        let total: f64 = out
            .iter()
            .filter(|c| &c.placement == name)
            .filter_map(|c| c.bic)
            .map(|b| (-(b - best) / 2.0).exp())
            .sum();
        for c in out.iter_mut().filter(|c| &c.placement == name) {
            c.bic_weight = c.bic.map(|b| (-(b - best) / 2.0).exp() / total);
        }
    }
    out
}

/// The approximate probability of one cluster count in one placement.
#[derive(Debug, Clone, PartialEq, Serialize, schemars::JsonSchema)]
pub struct CountProbability {
    /// Placement.
    pub placement: String,
    /// Number of clusters.
    pub clusters: usize,
    /// Σ of the BIC weights of the placement's fits with this many clusters (one per
    /// covariance structure): exp(−ΔBIC/2) normalised within the placement, a
    /// large-sample approximation that takes one of the fitted models to be true.
    pub probability: f64,
    /// Whether the placement is compared at this count.
    pub chosen: bool,
}

/// [`CountProbability`] for every placement and fitted count (fits without a BIC add
/// nothing; a count with none is left out), placements and counts in criteria order.
pub fn count_probabilities(criteria: &[Criteria]) -> Vec<CountProbability> {
    let mut out: Vec<CountProbability> = Vec::new();
    for r in criteria {
        let Some(weight) = r.bic_weight else { continue };
        match out
            .iter_mut()
            .find(|o| o.placement == r.placement && o.clusters == r.clusters)
        {
            Some(o) => {
                o.probability += weight;
                o.chosen |= r.chosen;
            }
            None => out.push(CountProbability {
                placement: r.placement.clone(),
                clusters: r.clusters,
                probability: weight,
                chosen: r.chosen,
            }),
        }
    }
    out.sort_by(|a, b| {
        let first = |p: &str| criteria.iter().position(|r| r.placement == p);
        first(&a.placement)
            .cmp(&first(&b.placement))
            .then(a.clusters.cmp(&b.clusters))
    });
    out
}

/// Reference first, then the other placements in spec order.
fn placement_order(n: usize, reference: usize) -> Vec<usize> {
    let mut order = vec![reference];
    order.extend((0..n).filter(|p| *p != reference));
    order
}

/// The cluster numbers of every fit in a comparison run ([`Numbering`]).
pub fn number_clusters(data: &Dataset, placements: usize, fits: &[FitResult], settings: &CompareSettings) -> Numbering {
    let chosen = chosen_fits(fits, placements, settings.clusters);
    let order = placement_order(placements, settings.reference);
    Numbering::aligned(fits, &chosen, &order, settings.reference, &data.weights)
}

/// The comparison of every placement's chosen fit against the reference placement's,
/// with clusters numbered as [`number_clusters`] numbered them.
pub fn compare(
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[FitResult],
    numbering: &Numbering,
    settings: &CompareSettings,
    inference: InferenceInput,
) -> Comparison {
    let weights = &data.weights;
    let chosen = chosen_fits(fits, prepared.len(), settings.clusters);
    let criteria = criteria(fits, weights, &chosen, numbering);
    let count_probabilities = count_probabilities(&criteria);
    let order = placement_order(prepared.len(), settings.reference);
    let (alignments, labelled) = (numbering.alignments.clone(), &numbering.labelled);
    let mut parts = parts::Parts::default();
    for l in labelled {
        let by_fit = inference.by_fit.get(l.fit).and_then(Option::as_ref);
        parts.add(
            data,
            &prepared[l.placement],
            &fits[l.fit],
            &l.aligned,
            by_fit,
            &inference,
        );
    }
    let rank = |name: &str| {
        order
            .iter()
            .position(|p| prepared[*p].placement.name == name)
            .unwrap_or(usize::MAX)
    };
    parts.profiles.sort_by(|a, b| {
        a.cluster
            .cmp(&b.cluster)
            .then(rank(&a.placement).cmp(&rank(&b.placement)))
    });
    let cross_tables = align::cross_tables(fits, labelled, weights);
    let mut c = Comparison {
        reference: prepared[settings.reference].placement.name.clone(),
        cluster_names: settings.names.clone(),
        fixed_clusters: settings.clusters,
        reference_values: terms::reference_values(&covariate_names(prepared), data, inference.words),
        indicators: prepared[settings.reference]
            .profile_columns()
            .iter()
            .map(|c| terms::profile_label(c, inference.words))
            .collect(),
        criteria,
        alignments,
        profiles: parts.profiles,
        gating_effects: parts.gating_effects,
        gating_tests: parts.gating_tests,
        three_step: parts.three_step,
        outcomes: parts.outcomes,
        table_one: labelled
            .iter()
            .flat_map(|l| {
                table_one::table_one(
                    data,
                    &fits[l.fit],
                    &l.aligned,
                    &covariate_names(prepared),
                    inference.words,
                )
            })
            .collect(),
        direct_effects: inference.screen.to_vec(),
        cluster_count_tests: inference.cluster_tests.to_vec(),
        component_effects: parts.component_effects,
        inference_notes: parts.inference_notes,
        cross_tables,
        splits: splits(fits, numbering, &chosen, settings.reference, weights),
        count_probabilities,
        certainty: parts.certainty,
        effect_curves: parts.effect_curves,
        findings: Vec::new(),
    };
    c.findings = findings::findings(&c);
    c
}

/// Every covariate of the placements, in the order first listed.
fn covariate_names(prepared: &[PreparedPlacement]) -> Vec<String> {
    let mut out: Vec<String> = Vec::new();
    for c in prepared
        .iter()
        .flat_map(|p| p.placement.gating.iter().chain(&p.placement.components))
    {
        if !out.contains(&c.name) {
            out.push(c.name.clone());
        }
    }
    out
}
