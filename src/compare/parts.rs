//! What the comparison says of each placement's chosen fit, by aligned cluster: sizes,
//! profiles, certainty, gating effects (with the effect curves), three-step estimates,
//! component effects and how its standard errors were obtained.

use super::{
    ComponentEffect, EffectCurve, GatingEffect, GatingTest, InferenceNote, OutcomeComparison, Profile, ThreeStepEffect,
};
use crate::data::{Dataset, Design};
use crate::fit::{FitResult, PreparedPlacement};
use crate::inference::FitInference;
use crate::model::family::ParamBlock;
use crate::model::gating::Gating;
use crate::numerics::most_likely;
use std::collections::BTreeMap;

/// The comparison's per-placement tables, filled placement by placement.
#[derive(Default)]
pub struct Parts {
    pub profiles: Vec<Profile>,
    pub gating_effects: Vec<GatingEffect>,
    pub effect_curves: Vec<EffectCurve>,
    pub certainty: Vec<(String, Vec<f64>)>,
    pub gating_tests: Vec<GatingTest>,
    pub three_step: Vec<ThreeStepEffect>,
    pub outcomes: Vec<OutcomeComparison>,
    pub component_effects: Vec<ComponentEffect>,
    pub inference_notes: Vec<InferenceNote>,
}

impl Parts {
    /// Add placement `pp`'s chosen fit `f`, whose fitted cluster k is aligned cluster
    /// `aligned[k]`, with its standard errors and effects when they were computed.
    pub fn add(
        &mut self,
        data: &Dataset,
        pp: &PreparedPlacement,
        f: &FitResult,
        aligned: &[usize],
        inference: Option<&FitInference>,
        input: &super::InferenceInput,
    ) {
        let per = input.per;
        let uncertainty = inference.and_then(|fi| {
            self.inference_notes.push(InferenceNote {
                placement: f.placement.clone(),
                outcome: fi
                    .uncertainty
                    .as_ref()
                    .map(|u| (u.method, u.replicates))
                    .map_err(Clone::clone),
            });
            fi.uncertainty.as_ref().ok()
        });
        if let Some(fi) = inference.filter(|fi| fi.uncertainty.is_ok()) {
            self.gating_tests.extend(fi.gating_tests.iter().map(|test| GatingTest {
                placement: f.placement.clone(),
                test: test.clone(),
            }));
            self.component_effects
                .extend(
                    fi.effects
                        .iter()
                        .filter(|e| !e.block.is_gating())
                        .map(|effect| ComponentEffect {
                            placement: f.placement.clone(),
                            cluster: aligned[effect.cluster - 1],
                            effect: effect.clone(),
                        }),
                );
        }
        if let Some(fi) = inference {
            self.outcomes
                .extend(fi.outcomes.iter().map(|(name, r)| OutcomeComparison {
                    placement: f.placement.clone(),
                    outcome: name.clone(),
                    comparison: r.as_ref().ok().map(|e| crate::inference::outcomes::record(e, aligned)),
                    unavailable: r.as_ref().err().cloned(),
                }));
        }
        self.add_sizes(
            data,
            f,
            aligned,
            inference.map_or(&[][..], |fi| &fi.profile_intervals[..]),
        );
        let best = f.best.as_ref().expect("labelled fits have a best start");
        let gating = f.reported_gating().unwrap_or_else(|| best.run.model.gating.clone());
        let design = pp.reported_design(f);
        if let Some(Ok(st)) = &f.step_three {
            self.three_step
                .extend(three_step_effects(st, design, aligned, &f.placement, uncertainty, per));
        }
        self.gating_effects.extend(
            effects(&gating, design, aligned, &f.placement, uncertainty, per)
                .into_iter()
                .map(|mut e| {
                    if let Some(term) = design.terms.iter().find(|t| t.name == e.term) {
                        e.words = super::terms::term_words(term, data, input.words);
                    }
                    e
                }),
        );
        self.effect_curves
            .extend(curves(data, &gating, design, aligned, &f.placement, &|c: &str| {
                // A covariate's joint Wald statistic, when the fit has standard errors.
                inference
                    .and_then(|fi| fi.gating_tests.iter().find(|t| t.covariate == c))
                    .map_or(0.0, |t| t.statistic)
            }));
    }

    /// Sizes, certainty and profiles of `f`'s clusters.
    /// `intervals`: the fit's profile intervals by fitted cluster (empty when none).
    fn add_sizes(&mut self, data: &Dataset, f: &FitResult, aligned: &[usize], intervals: &[Vec<Option<(f64, f64)>>]) {
        let weights = &data.weights;
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
        self.certainty.push((f.placement.clone(), hist));
        for k in 0..g {
            let (at_reference, avg) = cluster_profile(data, best, k);
            self.profiles.push(Profile {
                cluster: aligned[k],
                placement: f.placement.clone(),
                share: shares[k],
                count: counts[k],
                at_reference_interval: intervals
                    .get(k)
                    .map(|v| v.iter().map(|i| i.map(|(a, b)| [a, b])).collect())
                    .unwrap_or_default(),
                at_reference,
                population_averaged: avg,
            });
        }
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

/// Membership probabilities along the numeric gating covariate with the largest joint
/// Wald statistic (`strength`; the first listed when there are no standard errors), one
/// curve per level of the strongest categorical or binary gating covariate, the others at
/// their reference values.
fn curves(
    data: &Dataset,
    gating: &Gating,
    design: &Design,
    aligned: &[usize],
    placement: &str,
    strength: &dyn Fn(&str) -> f64,
) -> Vec<EffectCurve> {
    use crate::data::Column;
    use crate::spec::VariableType;
    let Gating::Logit { g, p, gamma, .. } = gating else {
        return Vec::new();
    };
    let (g, p) = (*g, *p);
    // The strongest of the terms `keep` accepts (the first of equals).
    let strongest = |keep: &dyn Fn(&Column) -> bool| -> Option<usize> {
        let mut best: Option<(usize, f64)> = None;
        for (j, t) in design.terms.iter().enumerate() {
            let Some(c) = &t.covariate else { continue };
            if !data.columns.get(c).is_some_and(keep) {
                continue;
            }
            let s = strength(c);
            if best.is_none_or(|(_, b)| s > b) {
                best = Some((j, s));
            }
        }
        best.map(|(j, _)| j)
    };
    let x_term = strongest(&|c| matches!(c, Column::Numeric { kind, .. } if *kind != VariableType::Binary));
    let Some(xj) = x_term else { return Vec::new() };
    let x_name = design.terms[xj].covariate.clone().unwrap_or_default();
    let Some(Column::Numeric { values, .. }) = data.columns.get(&x_name) else {
        return Vec::new();
    };
    let (lo, hi) = values
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| (a.min(*v), b.max(*v)));
    let xs: Vec<f64> = (0..=40).map(|i| lo + (hi - lo) * i as f64 / 40.0).collect();
    // Levels of the strongest categorical or binary gating covariate (the reference level
    // has every dummy 0; a binary covariate's levels are 0 and 1).
    let by = strongest(&|c| {
        matches!(
            c,
            Column::Categorical { .. }
                | Column::Numeric {
                    kind: VariableType::Binary,
                    ..
                }
        )
    })
    .and_then(|j| {
        let c = design.terms[j].covariate.clone()?;
        match data.columns.get(&c)? {
            Column::Categorical { levels, .. } => Some((c, levels.clone())),
            _ => Some((c, vec!["0".to_string(), "1".to_string()])),
        }
    });
    let settings: Vec<Option<(String, String)>> = match &by {
        None => vec![None],
        Some((c, levels)) => levels.iter().map(|l| Some((c.clone(), l.clone()))).collect(),
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
                // A categorical level's dummy, or a binary covariate's own term at 1.
                let j = design
                    .terms
                    .iter()
                    .position(|t| t.name == format!("{c}={l}") || (t.name == *c && l == "1"));
                if let Some(j) = j {
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

/// Gating effects against aligned cluster 1 (or, when the placement has no counterpart of
/// it, against its own cluster 1), per `per` units on the original scale, with Wald
/// intervals from the fit's uncertainty when there is one.
fn effects(
    gating: &Gating,
    design: &Design,
    aligned: &[usize],
    placement: &str,
    uncertainty: Option<&crate::inference::Uncertainty>,
    per: &BTreeMap<String, f64>,
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
                words: super::terms::TermWords {
                    label: term.name.clone(),
                    unit: None,
                    numeric: true,
                },
                per: units,
                rrr: (coef * units).exp(),
                interval: interval.map(|i| (i.lower, i.upper)),
                p_value: interval.map(|i| i.p_value),
                separation: GatingEffect::separates(coef * units, interval.map(|i| i.se)),
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
    uncertainty: Option<&crate::inference::Uncertainty>,
    per: &BTreeMap<String, f64>,
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
            // The corrected error is the fit's own (with step 1's part, as in results.json);
            // step 3's alone only when the fit has no standard errors.
            let corrected_se = uncertainty
                .and_then(|u| {
                    u.index("gating", k + 1, None, Some(&term.name))
                        .map(|at| u.se(at) * units)
                })
                .unwrap_or_else(|| se(&st.covariance));
            out.push(ThreeStepEffect {
                placement: placement.to_string(),
                method: st.method.word(),
                misclassified: st.misclassified,
                cluster: aligned[k],
                versus: aligned[0],
                term: term.name.clone(),
                per: units,
                corrected: Interval::new(corrected[j] * units, corrected_se, true),
                classify_analyze: Interval::new(naive[j] * units, se(&st.naive_covariance), true),
            });
        }
    }
    out
}
