//! The placement comparison: criteria, clusters aligned across placements, profiles,
//! gating effects, cross-tables and sentences.
//!
//! For each placement the chosen fit (lowest BIC, or lowest BIC at the cluster count the
//! spec fixes) is aligned to the reference placement's chosen fit by maximising agreement:
//! the cross-table of summed posteriors C[a][b] = Σ_i c_i τ_ref(i, a) τ(i, b) goes through
//! the Hungarian method, so a cluster keeps one number (and colour) everywhere. Clusters
//! without a counterpart get new numbers after the reference's.
//!
//! Everything here is plain data for the report; no numbers are computed in the report.

pub mod assign;

use crate::data::{Dataset, Design};
use crate::fit::{FitResult, PreparedPlacement};
use crate::model::family::ParamBlock;
use crate::model::gating::Gating;
use crate::spec::CompareSettings;
use serde::Serialize;

/// One row of the criteria table.
#[derive(Debug, Clone, Serialize)]
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
    /// ICL = BIC + 2 × classification entropy (smaller is better; Biernacki, Celeux &
    /// Govaert 2000).
    pub icl: Option<f64>,
    /// Approximate posterior probability of this model among the placement's fits,
    /// exp(−ΔBIC/2) normalised.
    pub bic_weight: Option<f64>,
    /// Relative entropy 1 − EN/(n ln G): 1 = crisp classification (not defined for G = 1).
    pub relative_entropy: Option<f64>,
    /// Mean of the largest posterior among the rows assigned to each cluster.
    pub average_posterior: Vec<f64>,
    /// Smallest cluster share (weighted posterior).
    pub smallest_share: Option<f64>,
    /// Rows assigned (most likely) to the smallest cluster.
    pub smallest_count: Option<usize>,
    /// Starts within 1e-6 of the best.
    pub starts_reaching_best: usize,
    /// Starts run to their end (see [`crate::fit::FitResult::finished_starts`]).
    pub starts: usize,
    /// Whether this fit is the one the comparison uses for its placement.
    pub chosen: bool,
}

/// How one placement's chosen clusters map onto the aligned clusters.
#[derive(Debug, Clone, Serialize)]
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
#[derive(Debug, Clone, Serialize)]
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
    /// Profile values averaged over the sample, weighted by the posterior.
    pub population_averaged: Vec<f64>,
}

/// A gating effect as a relative risk ratio against aligned cluster 1.
#[derive(Debug, Clone, Serialize)]
pub struct GatingEffect {
    /// Placement.
    pub placement: String,
    /// Aligned cluster compared with aligned cluster 1.
    pub cluster: usize,
    /// Gating term.
    pub term: String,
    /// Units of the term per which the ratio is given (`[inference].per`, else 1).
    pub per: f64,
    /// exp(per × coefficient): multiplies the relative risk of the cluster versus
    /// cluster 1 per `per` units of the term.
    pub rrr: f64,
    /// 95% confidence interval of the ratio, when standard errors are available.
    pub interval: Option<(f64, f64)>,
    /// Wald p-value against a ratio of 1, when standard errors are available.
    pub p_value: Option<f64>,
}

/// A component covariate effect of a compared fit, by aligned cluster.
#[derive(Debug, Clone, Serialize)]
pub struct ComponentEffect {
    /// Placement.
    pub placement: String,
    /// Aligned cluster.
    pub cluster: usize,
    /// The effect, its measure and interval.
    #[serde(flatten)]
    pub effect: crate::inference::effects::Effect,
}

/// A three-step placement's gating effect: the corrected estimate beside plain
/// classify-analyze, which is biased toward no effect and shown only as a contrast.
#[derive(Debug, Clone, Serialize)]
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
#[derive(Debug, Clone, Serialize)]
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
    /// Per fit (indexed as the fits): its standard errors, why they are missing, or None
    /// when they were not computed.
    pub by_fit: &'a [Option<std::result::Result<crate::inference::Uncertainty, String>>],
    /// The direct-effect screen of the compared fits.
    pub screen: &'a [crate::inference::screen::DirectEffectTest],
    /// Bootstrap tests of the compared fits' cluster counts.
    pub cluster_tests: &'a [crate::inference::cluster_test::ClusterCountTest],
}

static NO_UNITS: std::collections::BTreeMap<String, f64> = std::collections::BTreeMap::new();

impl InferenceInput<'static> {
    /// No standard errors: effects without intervals, per unit.
    pub fn none() -> InferenceInput<'static> {
        InferenceInput {
            per: &NO_UNITS,
            by_fit: &[],
            screen: &[],
            cluster_tests: &[],
        }
    }
}

/// Most-likely clusters of two placements cross-tabulated (aligned numbers).
#[derive(Debug, Clone, Serialize)]
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

/// Membership probabilities against one continuous gating covariate, with the other
/// covariates at their reference values (one curve set per level of a categorical
/// gating covariate, when there is one).
#[derive(Debug, Clone, Serialize)]
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

/// A generated sentence with the table row it comes from.
#[derive(Debug, Clone, Serialize)]
pub struct Sentence {
    /// The sentence.
    pub text: String,
    /// Where its numbers are: table and row.
    pub source: String,
    /// The numbers it quotes, as printed in that table.
    pub numbers: Vec<String>,
}

/// The whole comparison.
#[derive(Debug, Clone, Serialize)]
pub struct Comparison {
    /// Reference placement.
    pub reference: String,
    /// Cluster count fixed by the spec, if any.
    pub fixed_clusters: Option<usize>,
    /// How reference covariate values are set for profiles.
    pub reference_values: String,
    /// Profile columns: a continuous indicator's name (its mean), `item=level` (that
    /// level's probability; binary items show level 1 only) or `count (rate)` (events per
    /// unit of exposure, or the mean count without an exposure).
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
    /// Likelihood-ratio tests of direct effects the compared fits leave out.
    pub direct_effects: Vec<crate::inference::screen::DirectEffectTest>,
    /// Bootstrap likelihood-ratio tests of each compared fit's cluster count against one
    /// fewer.
    pub cluster_count_tests: Vec<crate::inference::cluster_test::ClusterCountTest>,
    /// Component covariate effects (mean differences, odds ratios, rate ratios).
    pub component_effects: Vec<ComponentEffect>,
    /// How standard errors were computed, and per placement why they are missing.
    pub inference_notes: Vec<String>,
    /// Cross-tables between each pair of placements.
    pub cross_tables: Vec<CrossTable>,
    /// Posterior certainty (largest posterior per row) histogram per placement: 10 bins on
    /// [0, 1], weighted counts.
    pub certainty: Vec<(String, Vec<f64>)>,
    /// Effect curves of gating covariates.
    pub effect_curves: Vec<EffectCurve>,
    /// Generated sentences.
    pub sentences: Vec<Sentence>,
}

/// Format a share as a percentage with one decimal, the way every table prints it.
pub fn pct(x: f64) -> String {
    format!("{:.1}%", 100.0 * x)
}

/// Format an indicator value the way every table prints it.
pub fn val(x: f64) -> String {
    format!("{x:.2}")
}

/// Format a p-value the way every table prints it: three decimals, or "<0.001".
pub fn p_value(p: f64) -> String {
    if p < 0.001 {
        "<0.001".to_string()
    } else {
        format!("{p:.3}")
    }
}

/// Format a relative risk ratio the way every table prints it.
pub fn ratio(x: f64) -> String {
    format!("{x:.3}")
}

use crate::numerics::most_likely;

fn criteria(fits: &[FitResult], weights: &[f64], chosen: &[Option<usize>]) -> Vec<Criteria> {
    let mut out = Vec::new();
    for (i, f) in fits.iter().enumerate() {
        let g = f.clusters;
        let (mut icl, mut rel, mut avg, mut smallest, mut smallest_n) = (None, None, Vec::new(), None, None);
        if let Some(b) = &f.best {
            let tau = &b.run.tau;
            let en: f64 = tau
                .chunks_exact(g)
                .zip(weights)
                .map(|(row, c)| -c * row.iter().filter(|t| **t > 0.0).map(|t| t * t.ln()).sum::<f64>())
                .sum();
            icl = f.bic().map(|bic| bic + 2.0 * en);
            if g > 1 {
                let total: f64 = weights.iter().sum();
                rel = Some(1.0 - en / (total * (g as f64).ln()));
            }
            let mut sums = vec![0.0; g];
            let mut counts = vec![0usize; g];
            for row in tau.chunks_exact(g) {
                let k = most_likely(row);
                sums[k] += row[k];
                counts[k] += 1;
            }
            avg = sums
                .iter()
                .zip(&counts)
                .map(|(s, c)| if *c > 0 { s / *c as f64 } else { 0.0 })
                .collect();
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
            icl,
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

pub use crate::fit::chosen_fits;

/// The comparison of every placement's chosen fit against the reference placement's.
pub fn compare(
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[FitResult],
    settings: &CompareSettings,
    inference: InferenceInput,
) -> Comparison {
    let weights = &data.weights;
    let chosen = chosen_fits(fits, prepared.len(), settings.clusters);
    let criteria = criteria(fits, weights, &chosen);
    let reference_fit = chosen[settings.reference];
    let mut alignments = Vec::new();
    let mut next_new = reference_fit.map_or(1, |i| fits[i].clusters + 1);
    // Reference first, then the others in spec order.
    let mut order: Vec<usize> = vec![settings.reference];
    order.extend((0..prepared.len()).filter(|p| *p != settings.reference));
    let mut labelled: Vec<(usize, usize, Vec<usize>)> = Vec::new(); // (placement, fit index, aligned per fitted cluster)
    for &p in &order {
        let Some(fi) = chosen[p] else { continue };
        let f = &fits[fi];
        let Some(best) = &f.best else { continue };
        let g = f.clusters;
        let (aligned, overlap) = match reference_fit.and_then(|r| fits[r].best.as_ref().map(|b| (r, b))) {
            Some((r, rb)) if r != fi => {
                let gr = fits[r].clusters;
                let mut c = vec![vec![0.0; gr]; g];
                for ((tr, to), w) in rb
                    .run
                    .tau
                    .chunks_exact(gr)
                    .zip(best.run.tau.chunks_exact(g))
                    .zip(weights)
                {
                    for (b, cb) in c.iter_mut().enumerate() {
                        for (a, cell) in cb.iter_mut().enumerate() {
                            *cell += w * tr[a] * to[b];
                        }
                    }
                }
                let assignment = assign::max_weight_assignment(&c);
                let mut aligned = Vec::with_capacity(g);
                let mut overlap = Vec::with_capacity(g);
                for (b, a) in assignment.iter().enumerate() {
                    match a {
                        Some(a) => {
                            aligned.push(a + 1);
                            let total: f64 = c[b].iter().sum();
                            overlap.push(Some(if total > 0.0 { c[b][*a] / total } else { 0.0 }));
                        }
                        None => {
                            aligned.push(next_new);
                            next_new += 1;
                            overlap.push(None);
                        }
                    }
                }
                (aligned, overlap)
            }
            _ => ((1..=g).collect(), vec![Some(1.0); g]),
        };
        alignments.push(Alignment {
            placement: f.placement.clone(),
            clusters: g,
            covariance: f.covariance(),
            aligned: aligned.clone(),
            overlap,
        });
        labelled.push((p, fi, aligned));
    }

    // Profiles and gating effects, by aligned cluster.
    let mut profiles = Vec::new();
    let mut gating_effects = Vec::new();
    let mut effect_curves = Vec::new();
    let mut certainty = Vec::new();
    let mut gating_tests = Vec::new();
    let mut three_step = Vec::new();
    let mut component_effects = Vec::new();
    let mut inference_notes = Vec::new();
    for (p, fi, aligned) in &labelled {
        let f = &fits[*fi];
        let uncertainty = match inference.by_fit.get(*fi).and_then(Option::as_ref) {
            Some(Ok(u)) => {
                let detail = match u.replicates {
                    Some((used, drawn)) => format!(" ({used} of {drawn} replicates usable)"),
                    None => String::new(),
                };
                inference_notes.push(format!(
                    "'{}': standard errors by {}{detail}.",
                    f.placement,
                    u.method.word()
                ));
                Some(u)
            }
            Some(Err(reason)) => {
                inference_notes.push(format!("'{}': no standard errors: {reason}.", f.placement));
                None
            }
            None => None,
        };
        if let Some(u) = uncertainty {
            gating_tests.extend(
                crate::inference::effects::gating_wald_tests(u, prepared[*p].reported_design(f))
                    .into_iter()
                    .map(|test| GatingTest {
                        placement: f.placement.clone(),
                        test,
                    }),
            );
            component_effects.extend(
                crate::inference::effects::effects(u, inference.per)
                    .into_iter()
                    .filter(|e| !e.block.is_gating())
                    .map(|effect| ComponentEffect {
                        placement: f.placement.clone(),
                        cluster: aligned[effect.cluster - 1],
                        effect,
                    }),
            );
        }
        let best = f.best.as_ref().expect("labelled fits have a best start");
        let g = f.clusters;
        let shares = crate::fit::cluster_shares(&best.run.tau, weights, g);
        let mut counts = vec![0usize; g];
        let mut hist = vec![0.0; 10];
        for (row, w) in best.run.tau.chunks_exact(g).zip(weights) {
            let k = most_likely(row);
            counts[k] += 1;
            hist[((row[k] * 10.0) as usize).min(9)] += w;
        }
        certainty.push((f.placement.clone(), hist));
        for k in 0..g {
            let (at_reference, avg) = cluster_profile(data, best, k);
            profiles.push(Profile {
                cluster: aligned[k],
                placement: f.placement.clone(),
                share: shares[k],
                count: counts[k],
                at_reference,
                population_averaged: avg,
            });
        }
        let gating = f.reported_gating().unwrap_or_else(|| best.run.model.gating.clone());
        let design = prepared[*p].reported_design(f);
        if let Some(Ok(st)) = &f.step_three {
            three_step.extend(three_step_effects(st, design, aligned, &f.placement, inference.per));
        }
        gating_effects.extend(effects(
            &gating,
            design,
            aligned,
            &f.placement,
            uncertainty,
            inference.per,
        ));
        effect_curves.extend(curves(data, &gating, design, aligned, &f.placement));
    }
    profiles.sort_by(|a, b| {
        a.cluster
            .cmp(&b.cluster)
            .then(placement_rank(&order, prepared, &a.placement).cmp(&placement_rank(&order, prepared, &b.placement)))
    });

    // Cross-tables of most-likely aligned clusters, reference against each other placement
    // and then every other pair.
    let mut cross_tables = Vec::new();
    let maps: Vec<(String, Vec<usize>)> = labelled
        .iter()
        .map(|(_, fi, aligned)| {
            let f = &fits[*fi];
            let g = f.clusters;
            let tau = &f.best.as_ref().expect("best").run.tau;
            (
                f.placement.clone(),
                tau.chunks_exact(g).map(|row| aligned[most_likely(row)]).collect(),
            )
        })
        .collect();
    for i in 0..maps.len() {
        for j in (i + 1)..maps.len() {
            let (a, b) = (&maps[i], &maps[j]);
            let mut rows: Vec<usize> = a.1.clone();
            rows.sort_unstable();
            rows.dedup();
            let mut cols: Vec<usize> = b.1.clone();
            cols.sort_unstable();
            cols.dedup();
            let mut counts = vec![vec![0usize; cols.len()]; rows.len()];
            for (x, y) in a.1.iter().zip(&b.1) {
                let r = rows.iter().position(|v| v == x).unwrap_or(0);
                let c = cols.iter().position(|v| v == y).unwrap_or(0);
                counts[r][c] += 1;
            }
            let ari = assign::adjusted_rand_index(&a.1, &b.1);
            let agreement = rows
                .iter()
                .zip(&counts)
                .map(|(r, cs)| {
                    let total: usize = cs.iter().sum();
                    cols.iter()
                        .position(|c| c == r)
                        .map(|j| cs[j] as f64 / total.max(1) as f64)
                })
                .collect();
            cross_tables.push(CrossTable {
                rows: a.0.clone(),
                columns: b.0.clone(),
                row_clusters: rows,
                column_clusters: cols,
                counts,
                adjusted_rand_index: ari,
                agreement,
            });
        }
    }

    let reference = prepared[settings.reference].placement.name.clone();
    let columns = prepared[settings.reference].profile_columns();
    let mut sentences = sentences(
        &reference,
        &columns,
        &criteria,
        &alignments,
        &profiles,
        &gating_effects,
        &cross_tables,
    );
    for t in inference.screen.iter().filter(|t| t.flagged) {
        let p = t.p_value.map_or_else(String::new, p_value);
        let text = if t.step_three_covariate {
            format!(
                "Warning: under '{}', {} has a direct effect on {} (likelihood-ratio p {p}), which the three-step estimate assumes away; prefer a placement that models it.",
                t.placement, t.covariate, t.indicator
            )
        } else {
            format!(
                "Under '{}', {} may act directly on {} (likelihood-ratio p {p}); the clusters' meaning then differs across its values unless the effect is modelled (acts_on).",
                t.placement, t.covariate, t.indicator
            )
        };
        sentences.push(Sentence {
            text,
            source: format!(
                "direct-effect screen table, row '{}, {}, {}'",
                t.placement, t.covariate, t.indicator
            ),
            numbers: vec![p],
        });
    }
    Comparison {
        reference,
        fixed_clusters: settings.clusters,
        reference_values: "profiles at the reference covariate values: continuous and count covariates at their sample mean, categorical and binary ones at their reference level".into(),
        indicators: columns,
        criteria,
        alignments,
        profiles,
        gating_effects,
        gating_tests,
        three_step,
        direct_effects: inference.screen.to_vec(),
        cluster_count_tests: inference.cluster_tests.to_vec(),
        component_effects,
        inference_notes,
        cross_tables,
        certainty,
        effect_curves,
        sentences,
    }
}

/// Profile of fitted cluster k: values at the reference covariate values and averaged
/// over the sample with posterior weights, in [`PreparedPlacement::profile_columns`]
/// order.
fn cluster_profile(data: &Dataset, best: &crate::fit::BestFit, k: usize) -> (Vec<f64>, Vec<f64>) {
    let g = best.run.model.clusters();
    let blocks = &best.run.model.components.blocks;
    let profile_at = |row: Option<usize>, out: &mut Vec<f64>| {
        out.clear();
        for b in blocks {
            b.profile(k, row, out);
        }
    };
    let mut at_reference = Vec::new();
    profile_at(None, &mut at_reference);
    let mut avg = vec![0.0; at_reference.len()];
    let mut row = Vec::with_capacity(avg.len());
    let mut total = 0.0;
    for (i, w) in data.weights.iter().enumerate() {
        let v = w * best.run.tau[i * g + k];
        if v == 0.0 {
            continue;
        }
        total += v;
        profile_at(Some(i), &mut row);
        for (a, r) in avg.iter_mut().zip(&row) {
            *a += v * r;
        }
    }
    for a in avg.iter_mut() {
        *a /= total.max(f64::MIN_POSITIVE);
    }
    (at_reference, avg)
}

/// Effect curves for the first continuous gating covariate, by the levels of the first
/// categorical one.
fn curves(data: &Dataset, gating: &Gating, design: &Design, aligned: &[usize], placement: &str) -> Vec<EffectCurve> {
    use crate::data::Column;
    let Gating::Logit { g, p, gamma, .. } = gating else {
        return Vec::new();
    };
    let (g, p) = (*g, *p);
    let x_term = design.terms.iter().position(|t| {
        t.covariate.as_ref().is_some_and(|c| matches!(data.columns.get(c), Some(Column::Numeric { kind, .. }) if *kind != crate::spec::VariableType::Binary))
    });
    let Some(xj) = x_term else { return Vec::new() };
    let x_name = design.terms[xj].covariate.clone().unwrap_or_default();
    let Some(Column::Numeric { values, .. }) = data.columns.get(&x_name) else {
        return Vec::new();
    };
    let (lo, hi) = values
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| (a.min(*v), b.max(*v)));
    let xs: Vec<f64> = (0..=40).map(|i| lo + (hi - lo) * i as f64 / 40.0).collect();
    // Levels of the first categorical gating covariate (reference level = all dummies 0).
    let by = design.terms.iter().find_map(|t| {
        let c = t.covariate.as_ref()?;
        match data.columns.get(c) {
            Some(Column::Categorical { levels, reference, .. }) => Some((c.clone(), levels.clone(), *reference)),
            _ => None,
        }
    });
    let settings: Vec<Option<(String, String)>> = match &by {
        None => vec![None],
        Some((c, levels, _)) => levels.iter().map(|l| Some((c.clone(), l.clone()))).collect(),
    };
    let mut order: Vec<usize> = (0..g).collect();
    order.sort_by_key(|k| aligned[*k]);
    let mut out = Vec::new();
    for level in settings {
        let mut probs = vec![Vec::with_capacity(xs.len()); g];
        let mut lp = vec![0.0; g];
        for x in &xs {
            let mut w = vec![0.0; p];
            w[0] = 1.0;
            let t = &design.terms[xj];
            w[xj] = (x - t.center) / t.scale;
            if let Some((c, l)) = &level {
                if let Some(j) = design.terms.iter().position(|t| t.name == format!("{c}={l}")) {
                    w[j] = 1.0;
                }
            }
            crate::numerics::log_softmax_row(gamma, p, &w, &mut lp);
            for (k, pr) in probs.iter_mut().enumerate() {
                pr.push(lp[k].exp());
            }
        }
        out.push(EffectCurve {
            placement: placement.to_string(),
            covariate: x_name.clone(),
            level,
            x: xs.clone(),
            clusters: order.iter().map(|k| aligned[*k]).collect(),
            probabilities: order.iter().map(|k| probs[*k].clone()).collect(),
        });
    }
    out
}

fn placement_rank(order: &[usize], prepared: &[PreparedPlacement], name: &str) -> usize {
    order
        .iter()
        .position(|p| prepared[*p].placement.name == name)
        .unwrap_or(usize::MAX)
}

/// Gating effects against aligned cluster 1 (or, when the placement has no counterpart of
/// it, against its own cluster 1), per `per` units on the original scale, with Wald
/// intervals from the fit's uncertainty when there is one.
fn effects(
    gating: &Gating,
    design: &Design,
    aligned: &[usize],
    placement: &str,
    uncertainty: Option<&crate::inference::Uncertainty>,
    per: &std::collections::BTreeMap<String, f64>,
) -> Vec<GatingEffect> {
    let Gating::Logit { g, p, gamma, .. } = gating else {
        return Vec::new();
    };
    let (g, p) = (*g, *p);
    // Full coefficient rows on the original scale, fitted cluster 1 = 0.
    let rows: Vec<Vec<f64>> = (0..g)
        .map(|k| {
            if k == 0 {
                vec![0.0; p]
            } else {
                design.to_original_scale(&gamma[(k - 1) * p..k * p])
            }
        })
        .collect();
    let base = aligned.iter().position(|a| *a == 1).unwrap_or(0);
    let mut out = Vec::new();
    let mut order: Vec<usize> = (0..g).filter(|k| *k != base).collect();
    order.sort_by_key(|k| aligned[*k]);
    for k in order {
        for (j, term) in design.terms.iter().enumerate().skip(1) {
            let units = crate::inference::effects::per_units(&term.name, per);
            let coef = rows[k][j] - rows[base][j];
            let interval = uncertainty.map(|u| {
                let at = |c: usize| {
                    (c > 0)
                        .then(|| u.index(ParamBlock::GATING.name, c + 1, None, Some(&term.name)))
                        .flatten()
                };
                let (_, se) = crate::inference::effects::contrast(u, at(k), at(base));
                crate::inference::effects::Interval::new(coef * units, se * units, true)
            });
            out.push(GatingEffect {
                placement: placement.to_string(),
                cluster: aligned[k],
                term: term.name.clone(),
                per: units,
                rrr: (coef * units).exp(),
                interval: interval.map(|i| (i.lower, i.upper)),
                p_value: interval.map(|i| i.p_value),
            });
        }
    }
    out
}

fn three_step_effects(
    st: &crate::fit::three_step::StepThree,
    design: &Design,
    aligned: &[usize],
    placement: &str,
    per: &std::collections::BTreeMap<String, f64>,
) -> Vec<ThreeStepEffect> {
    use crate::inference::effects::{per_units, Interval};
    let p = design.p();
    let mut out = Vec::new();
    for k in 1..aligned.len() {
        let block = (k - 1) * p..k * p;
        let corrected = design.to_original_scale(&st.gamma[block.clone()]);
        let naive = design.to_original_scale(&st.naive_gamma[block]);
        for (j, term) in design.terms.iter().enumerate().skip(1) {
            let units = per_units(&term.name, per);
            let i = (k - 1) * p + j;
            // A slope maps to the original scale by 1/scale alone.
            let se = |cov: &nalgebra::DMatrix<f64>| cov[(i, i)].max(0.0).sqrt() / term.scale * units;
            out.push(ThreeStepEffect {
                placement: placement.to_string(),
                method: match st.method {
                    crate::spec::Method::ThreeStepMl => "three-step-ml",
                    _ => "three-step-bch",
                },
                misclassified: st.misclassified,
                cluster: aligned[k],
                versus: aligned[0],
                term: term.name.clone(),
                per: units,
                corrected: Interval::new(corrected[j] * units, se(&st.covariance), true),
                classify_analyze: Interval::new(naive[j] * units, se(&st.naive_covariance), true),
            });
        }
    }
    out
}

/// "unit of age" or "10 units of age".
pub fn per_phrase(per: f64, term: &str) -> String {
    if per == 1.0 {
        format!("unit of {term}")
    } else {
        format!("{per} units of {term}")
    }
}

fn sentences(
    reference: &str,
    indicators: &[String],
    criteria: &[Criteria],
    alignments: &[Alignment],
    profiles: &[Profile],
    effects: &[GatingEffect],
    tables: &[CrossTable],
) -> Vec<Sentence> {
    let mut out = Vec::new();
    // Model choice.
    for c in criteria.iter().filter(|c| c.chosen) {
        out.push(Sentence {
            text: format!(
                "Under '{}' the comparison uses {} clusters ({}), BIC {:.1}.",
                c.placement,
                c.clusters,
                c.covariance,
                c.bic.unwrap_or(f64::NAN)
            ),
            source: format!("criteria table, placement '{}', {} clusters", c.placement, c.clusters),
            numbers: vec![format!("{:.1}", c.bic.unwrap_or(f64::NAN))],
        });
    }
    // Largest change of a cluster's share against the reference, per placement.
    let mut others: Vec<&str> = Vec::new();
    for p in profiles.iter().filter(|p| p.placement != reference) {
        if !others.contains(&p.placement.as_str()) {
            others.push(&p.placement);
        }
    }
    for other in others {
        let mut best_share: Option<(f64, &Profile, &Profile)> = None;
        for p in profiles.iter().filter(|p| p.placement == other) {
            if let Some(r) = profiles
                .iter()
                .find(|r| r.placement == reference && r.cluster == p.cluster)
            {
                let diff = (p.share - r.share).abs();
                if best_share.is_none_or(|(d, _, _)| diff > d) {
                    best_share = Some((diff, r, p));
                }
            }
        }
        if let Some((_, r, p)) = best_share {
            let verb = if p.share > r.share { "grows" } else { "shrinks" };
            out.push(Sentence {
                text: format!(
                    "Against '{}', the largest change in size under '{}': cluster {} {verb} from {} of the cohort to {}.",
                    reference,
                    p.placement,
                    p.cluster,
                    pct(r.share),
                    pct(p.share)
                ),
                source: format!("cluster sizes table, row 'cluster {}'", p.cluster),
                numbers: vec![pct(r.share), pct(p.share)],
            });
        }
    }
    // Largest change of a profile value (population-averaged), in units of that
    // indicator's spread across the reference clusters' values.
    // Columns differ in units (a mean in % predicted, a probability, a rate), so each
    // shift is measured against that column's range over the reference clusters.
    let spread: Vec<f64> = (0..indicators.len())
        .map(|j| {
            let values = profiles
                .iter()
                .filter(|r| r.placement == reference)
                .map(|r| r.population_averaged[j]);
            let (lo, hi) = values.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| (a.min(v), b.max(v)));
            if hi > lo {
                hi - lo
            } else {
                1.0
            }
        })
        .collect();
    let mut best_profile: Option<(f64, &Profile, &Profile, usize)> = None;
    for p in profiles.iter().filter(|p| p.placement != reference) {
        if let Some(r) = profiles
            .iter()
            .find(|r| r.placement == reference && r.cluster == p.cluster)
        {
            for j in 0..indicators.len() {
                let diff = (p.population_averaged[j] - r.population_averaged[j]).abs() / spread[j];
                if best_profile.is_none_or(|(d, _, _, _)| diff > d) {
                    best_profile = Some((diff, r, p, j));
                }
            }
        }
    }
    if let Some((_, r, p, j)) = best_profile {
        out.push(Sentence {
            text: format!(
                "The largest shift in a profile: cluster {}'s average {} is {} under '{}' and {} under '{}'.",
                p.cluster,
                indicators[j],
                val(r.population_averaged[j]),
                reference,
                val(p.population_averaged[j]),
                p.placement
            ),
            source: format!(
                "profiles table, row 'cluster {}', column '{}'",
                p.cluster, indicators[j]
            ),
            numbers: vec![val(r.population_averaged[j]), val(p.population_averaged[j])],
        });
    }
    // Gating effects: a change of direction between placements, counted only when both
    // effects are at least 5% per unit away from no effect (the clearest one is reported);
    // else the strongest effect.
    let strength = |a: &GatingEffect, b: &GatingEffect| a.rrr.ln().abs().min(b.rrr.ln().abs());
    let mut flip: Option<(&GatingEffect, &GatingEffect)> = None;
    for a in effects {
        for b in effects {
            if a.placement < b.placement
                && a.cluster == b.cluster
                && a.term == b.term
                && (a.rrr - 1.0) * (b.rrr - 1.0) < 0.0
                && strength(a, b) >= 1.05f64.ln()
                && flip.is_none_or(|(x, y)| strength(a, b) > strength(x, y))
            {
                flip = Some((a, b));
            }
        }
    }
    if let Some((a, b)) = flip {
        out.push(Sentence {
            text: format!(
                "The effect of {} on belonging to cluster {} rather than cluster 1 changes direction: relative risk ratio {} per {} under '{}', {} under '{}'.",
                a.term, a.cluster, ratio(a.rrr), per_phrase(a.per, &a.term), a.placement, ratio(b.rrr), b.placement
            ),
            source: format!("gating effects table, rows 'cluster {}, {}'", a.cluster, a.term),
            numbers: vec![ratio(a.rrr), ratio(b.rrr)],
        });
    } else if let Some(e) = effects
        .iter()
        .max_by(|a, b| a.rrr.ln().abs().total_cmp(&b.rrr.ln().abs()))
    {
        let word = if e.rrr > 1.0 { "raises" } else { "lowers" };
        out.push(Sentence {
            text: format!(
                "Under '{}', each {} {word} the relative risk of cluster {} against cluster 1 by a factor of {}.",
                e.placement,
                per_phrase(e.per, &e.term),
                e.cluster,
                ratio(e.rrr)
            ),
            source: format!(
                "gating effects table, row 'cluster {}, {}', placement '{}'",
                e.cluster, e.term, e.placement
            ),
            numbers: vec![ratio(e.rrr)],
        });
    }
    // Clusters with no counterpart.
    for a in alignments {
        for (k, o) in a.overlap.iter().enumerate() {
            if o.is_none() {
                let share = profiles
                    .iter()
                    .find(|p| p.placement == a.placement && p.cluster == a.aligned[k])
                    .map_or(0.0, |p| p.share);
                out.push(Sentence {
                    text: format!(
                        "'{}' has a cluster with no counterpart under '{}': cluster {} ({}).",
                        a.placement,
                        reference,
                        a.aligned[k],
                        pct(share)
                    ),
                    source: format!("cluster sizes table, row 'cluster {}'", a.aligned[k]),
                    numbers: vec![pct(share)],
                });
            }
        }
    }
    // Agreement with the reference.
    for t in tables.iter().filter(|t| t.rows == reference) {
        out.push(Sentence {
            text: format!(
                "Most-likely clusters under '{}' and '{}' agree with an adjusted Rand index of {:.3}.",
                t.rows, t.columns, t.adjusted_rand_index
            ),
            source: format!("cross-table '{}' × '{}'", t.rows, t.columns),
            numbers: vec![format!("{:.3}", t.adjusted_rand_index)],
        });
    }
    out
}
