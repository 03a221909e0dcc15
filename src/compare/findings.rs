//! Findings: what the comparison says in words, as typed values. Each finding carries
//! its numbers and the table row they come from ([`Source`], by a typed table id); the
//! renderer phrases it. Which findings are made (the largest change of a size, the
//! clearest change of direction) is decided here.

use super::{Alignment, Comparison, CrossTable, GatingEffect, Profile};
use crate::inference::screen::DirectEffectTest;

/// The tables of a comparison, as findings refer to them.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum TableId {
    /// Criteria of every fit.
    Criteria,
    /// How each placement's clusters map onto the aligned ones.
    Alignment,
    /// Aligned cluster sizes per placement.
    ClusterSizes,
    /// Profiles per aligned cluster and placement.
    Profiles,
    /// Gating relative risk ratios.
    GatingEffects,
    /// Joint Wald tests of gating covariates.
    GatingTests,
    /// Three-step estimates.
    ThreeStep,
    /// Distal outcomes by cluster.
    Outcomes,
    /// Covariates and indicators by cluster of one placement's compared fit.
    TableOne {
        /// The placement.
        placement: String,
    },
    /// Bootstrap tests of the cluster count.
    ClusterCountTests,
    /// The direct-effect screen.
    DirectEffects,
    /// Component covariate effects.
    ComponentEffects,
    /// The cross-table of two placements' most likely clusters.
    CrossTable {
        /// Row placement.
        rows: String,
        /// Column placement.
        columns: String,
    },
}

/// Where a finding's numbers are.
#[derive(Debug, Clone, PartialEq)]
pub struct Source {
    /// The table.
    pub table: TableId,
    /// The row (and column) within it.
    pub row: RowRef,
}

/// A row of a table.
#[derive(Debug, Clone, PartialEq)]
pub enum RowRef {
    /// The whole table.
    Whole,
    /// The criteria row of a placement's fit at a cluster count.
    Fit {
        /// Placement.
        placement: String,
        /// Cluster count.
        clusters: usize,
    },
    /// An aligned cluster's row.
    Cluster(usize),
    /// An aligned cluster's row, one indicator's column.
    ClusterColumn {
        /// Aligned cluster.
        cluster: usize,
        /// Profile column.
        column: String,
    },
    /// The rows of one cluster and gating term (one per placement), or the row of one
    /// placement.
    ClusterTerm {
        /// Aligned cluster.
        cluster: usize,
        /// Gating term.
        term: String,
        /// Placement, when the row is one placement's.
        placement: Option<String>,
    },
    /// A direct-effect test's row.
    Test {
        /// Placement.
        placement: String,
        /// Covariate.
        covariate: String,
        /// Indicator or group.
        indicator: String,
    },
}

/// One thing the comparison says.
#[derive(Debug, Clone, PartialEq)]
pub enum Finding {
    /// The fit a placement is compared with.
    ModelChoice {
        /// Placement.
        placement: String,
        /// Clusters.
        clusters: usize,
        /// Covariance structure in words.
        covariance: String,
        /// Its BIC.
        bic: f64,
    },
    /// The largest change of an aligned cluster's share against the reference.
    ShareChange {
        /// Reference placement.
        reference: String,
        /// Placement.
        placement: String,
        /// Aligned cluster.
        cluster: usize,
        /// Share under the reference.
        from: f64,
        /// Share under the placement.
        to: f64,
    },
    /// The largest shift of a population-averaged profile value, measured in that
    /// column's range over the reference clusters.
    ProfileShift {
        /// Aligned cluster.
        cluster: usize,
        /// Profile column.
        column: String,
        /// Reference placement.
        reference: String,
        /// Value under the reference.
        from: f64,
        /// Placement.
        placement: String,
        /// Value under the placement.
        to: f64,
    },
    /// A gating effect whose direction differs between two placements.
    DirectionChange {
        /// The effect under the first placement.
        first: GatingEffect,
        /// The effect under the second.
        second: GatingEffect,
    },
    /// The strongest gating effect (when no direction changes).
    StrongestEffect(GatingEffect),
    /// A gating term that separates two clusters: no effect size can be estimated.
    Separation(GatingEffect),
    /// A placement's cluster with no counterpart in the reference.
    NoCounterpart {
        /// Placement.
        placement: String,
        /// Reference placement.
        reference: String,
        /// Its aligned number.
        cluster: usize,
        /// Its share.
        share: f64,
    },
    /// Agreement of a placement's most likely clusters with the reference's.
    Agreement {
        /// Reference placement.
        rows: String,
        /// Placement.
        columns: String,
        /// Adjusted Rand index.
        ari: f64,
    },
    /// A direct effect the screen flags.
    DirectEffect(DirectEffectTest),
    /// Criteria that would choose another cluster count than BIC does.
    CriteriaDisagree {
        /// Placement.
        placement: String,
        /// The count BIC chooses (the compared fit's).
        clusters: usize,
        /// Each disagreeing criterion: its name, the count it chooses and its value there.
        others: Vec<(&'static str, usize, f64)>,
        /// Whether to suggest the bootstrap test of the cluster count: it did not run for
        /// the placement, and no earlier finding suggested it.
        suggest_count_test: bool,
    },
    /// The compared fit's count is the largest (or, above 1, the smallest) count fitted, so
    /// the best count may lie outside the range.
    EdgeOfRange {
        /// Placement.
        placement: String,
        /// The compared fit's count.
        clusters: usize,
        /// Whether it is the largest count fitted (else the smallest).
        largest: bool,
        /// Its BIC.
        bic: f64,
    },
    /// The compared fit's best optimum was reached by a single start.
    FewStarts {
        /// Placement.
        placement: String,
        /// Clusters.
        clusters: usize,
        /// Starts on the best optimum.
        reached: usize,
        /// Starts run.
        starts: usize,
    },
}

impl Finding {
    /// Where its numbers are.
    pub fn source(&self) -> Source {
        let (table, row) = match self {
            Finding::ModelChoice {
                placement, clusters, ..
            } => (
                TableId::Criteria,
                RowRef::Fit {
                    placement: placement.clone(),
                    clusters: *clusters,
                },
            ),
            Finding::ShareChange { cluster, .. } | Finding::NoCounterpart { cluster, .. } => {
                (TableId::ClusterSizes, RowRef::Cluster(*cluster))
            }
            Finding::ProfileShift { cluster, column, .. } => (
                TableId::Profiles,
                RowRef::ClusterColumn {
                    cluster: *cluster,
                    column: column.clone(),
                },
            ),
            Finding::DirectionChange { first, .. } => (
                TableId::GatingEffects,
                RowRef::ClusterTerm {
                    cluster: first.cluster,
                    term: first.term.clone(),
                    placement: None,
                },
            ),
            Finding::StrongestEffect(e) | Finding::Separation(e) => (
                TableId::GatingEffects,
                RowRef::ClusterTerm {
                    cluster: e.cluster,
                    term: e.term.clone(),
                    placement: Some(e.placement.clone()),
                },
            ),
            Finding::Agreement { rows, columns, .. } => (
                TableId::CrossTable {
                    rows: rows.clone(),
                    columns: columns.clone(),
                },
                RowRef::Whole,
            ),
            Finding::CriteriaDisagree {
                placement, clusters, ..
            }
            | Finding::EdgeOfRange {
                placement, clusters, ..
            }
            | Finding::FewStarts {
                placement, clusters, ..
            } => (
                TableId::Criteria,
                RowRef::Fit {
                    placement: placement.clone(),
                    clusters: *clusters,
                },
            ),
            Finding::DirectEffect(t) => (
                TableId::DirectEffects,
                RowRef::Test {
                    placement: t.placement.clone(),
                    covariate: t.covariate.clone(),
                    indicator: t.indicator.clone(),
                },
            ),
        };
        Source { table, row }
    }
}

/// Every finding of a comparison, in the order they are shown.
pub fn findings(c: &Comparison) -> Vec<Finding> {
    let mut out: Vec<Finding> = c
        .criteria
        .iter()
        .filter(|r| r.chosen)
        .map(|r| Finding::ModelChoice {
            placement: r.placement.clone(),
            clusters: r.clusters,
            covariance: r.covariance.clone(),
            bic: r.bic.unwrap_or(f64::NAN),
        })
        .collect();
    out.extend(count_choice(c));
    out.extend(share_changes(&c.reference, &c.profiles));
    out.extend(profile_shift(&c.reference, &c.indicators, &c.profiles));
    out.extend(gating_finding(&c.gating_effects));
    out.extend(
        c.gating_effects
            .iter()
            .filter(|e| e.separation)
            .map(|e| Finding::Separation(e.clone())),
    );
    out.extend(no_counterparts(&c.reference, &c.alignments, &c.profiles));
    out.extend(agreements(&c.reference, &c.cross_tables));
    out.extend(
        c.direct_effects
            .iter()
            .filter(|t| t.flagged)
            .map(|t| Finding::DirectEffect(t.clone())),
    );
    out
}

/// What qualifies each placement's choice of cluster count: criteria that choose another
/// count, a choice at the edge of the fitted range, a best optimum reached by one start.
fn count_choice(c: &Comparison) -> Vec<Finding> {
    let mut out = Vec::new();
    let mut placements: Vec<&str> = Vec::new();
    for r in &c.criteria {
        if !placements.contains(&r.placement.as_str()) {
            placements.push(&r.placement);
        }
    }
    for placement in placements {
        let rows: Vec<&super::Criteria> = c.criteria.iter().filter(|r| r.placement == placement).collect();
        let Some(chosen) = rows.iter().find(|r| r.chosen) else {
            continue;
        };
        let best_by = |value: fn(&super::Criteria) -> Option<f64>| {
            rows.iter()
                .filter_map(|r| value(r).map(|v| (r.clusters, v)))
                .min_by(|a, b| a.1.total_cmp(&b.1))
        };
        let others: Vec<(&'static str, usize, f64)> = [("AIC", best_by(|r| r.aic)), ("ICL", best_by(|r| r.icl))]
            .into_iter()
            .filter_map(|(name, best)| best.map(|(k, v)| (name, k, v)))
            .filter(|(_, k, _)| *k != chosen.clusters)
            .collect();
        if !others.is_empty() {
            out.push(Finding::CriteriaDisagree {
                placement: placement.to_string(),
                clusters: chosen.clusters,
                others,
                suggest_count_test: !c.cluster_count_tests.iter().any(|t| t.placement == placement)
                    && !out.iter().any(|f| {
                        matches!(
                            f,
                            Finding::CriteriaDisagree {
                                suggest_count_test: true,
                                ..
                            }
                        )
                    }),
            });
        }
        let fitted: Vec<usize> = rows.iter().filter(|r| r.bic.is_some()).map(|r| r.clusters).collect();
        let (lo, hi) = (
            fitted.iter().copied().min().unwrap_or(0),
            fitted.iter().copied().max().unwrap_or(0),
        );
        if hi > lo && (chosen.clusters == hi || (chosen.clusters == lo && lo > 1)) {
            out.push(Finding::EdgeOfRange {
                placement: placement.to_string(),
                clusters: chosen.clusters,
                largest: chosen.clusters == hi,
                bic: chosen.bic.unwrap_or(f64::NAN),
            });
        }
        if chosen.clusters > 1 && chosen.starts > 1 && chosen.starts_reaching_best < 2 {
            out.push(Finding::FewStarts {
                placement: placement.to_string(),
                clusters: chosen.clusters,
                reached: chosen.starts_reaching_best,
                starts: chosen.starts,
            });
        }
    }
    out
}

/// Per placement other than the reference, the largest change of an aligned cluster's
/// share against the reference.
fn share_changes(reference: &str, profiles: &[Profile]) -> Vec<Finding> {
    let mut others: Vec<&str> = Vec::new();
    for p in profiles.iter().filter(|p| p.placement != reference) {
        if !others.contains(&p.placement.as_str()) {
            others.push(&p.placement);
        }
    }
    let mut out = Vec::new();
    for other in others {
        let mut best: Option<(f64, &Profile, &Profile)> = None;
        for p in profiles.iter().filter(|p| p.placement == other) {
            if let Some(r) = profiles
                .iter()
                .find(|r| r.placement == reference && r.cluster == p.cluster)
            {
                let diff = (p.share - r.share).abs();
                if best.is_none_or(|(d, _, _)| diff > d) {
                    best = Some((diff, r, p));
                }
            }
        }
        // A change the one-decimal percentages cannot show ("from 11.8% to 11.8%") says
        // nothing.
        let shown = |share: f64| (1000.0 * share).round();
        if let Some((_, r, p)) = best.filter(|(_, r, p)| shown(r.share) != shown(p.share)) {
            out.push(Finding::ShareChange {
                reference: reference.to_string(),
                placement: p.placement.clone(),
                cluster: p.cluster,
                from: r.share,
                to: p.share,
            });
        }
    }
    out
}

/// The largest change of a profile value (population-averaged) against the reference.
/// Columns differ in units (a mean in % predicted, a probability, a rate), so each shift
/// is measured against that column's range over the reference clusters.
fn profile_shift(reference: &str, indicators: &[String], profiles: &[Profile]) -> Option<Finding> {
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
    let mut best: Option<(f64, &Profile, &Profile, usize)> = None;
    for p in profiles.iter().filter(|p| p.placement != reference) {
        if let Some(r) = profiles
            .iter()
            .find(|r| r.placement == reference && r.cluster == p.cluster)
        {
            for (j, s) in spread.iter().enumerate() {
                let diff = (p.population_averaged[j] - r.population_averaged[j]).abs() / s;
                if best.is_none_or(|(d, _, _, _)| diff > d) {
                    best = Some((diff, r, p, j));
                }
            }
        }
    }
    best.map(|(_, r, p, j)| Finding::ProfileShift {
        cluster: p.cluster,
        column: indicators[j].clone(),
        reference: reference.to_string(),
        from: r.population_averaged[j],
        placement: p.placement.clone(),
        to: p.population_averaged[j],
    })
}

/// A change of direction between placements, counted only when both effects are at
/// least 5% per unit away from no effect (the clearest one is reported); else the
/// strongest effect.
fn gating_finding(effects: &[GatingEffect]) -> Option<Finding> {
    let effects: Vec<GatingEffect> = effects.iter().filter(|e| !e.separation).cloned().collect();
    let effects = &effects[..];
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
        return Some(Finding::DirectionChange {
            first: a.clone(),
            second: b.clone(),
        });
    }
    effects
        .iter()
        .max_by(|a, b| a.rrr.ln().abs().total_cmp(&b.rrr.ln().abs()))
        .map(|e| Finding::StrongestEffect(e.clone()))
}

/// Every cluster without a counterpart in the reference.
fn no_counterparts(reference: &str, alignments: &[Alignment], profiles: &[Profile]) -> Vec<Finding> {
    let mut out = Vec::new();
    for a in alignments {
        for (k, o) in a.overlap.iter().enumerate() {
            if o.is_none() {
                let share = profiles
                    .iter()
                    .find(|p| p.placement == a.placement && p.cluster == a.aligned[k])
                    .map_or(0.0, |p| p.share);
                out.push(Finding::NoCounterpart {
                    placement: a.placement.clone(),
                    reference: reference.to_string(),
                    cluster: a.aligned[k],
                    share,
                });
            }
        }
    }
    out
}

/// Agreement of each placement with the reference.
fn agreements(reference: &str, tables: &[CrossTable]) -> Vec<Finding> {
    tables
        .iter()
        .filter(|t| t.rows == reference)
        .map(|t| Finding::Agreement {
            rows: t.rows.clone(),
            columns: t.columns.clone(),
            ari: t.adjusted_rand_index,
        })
        .collect()
}

#[cfg(test)]
mod share_change_tests {
    use super::*;

    fn profile(placement: &str, cluster: usize, share: f64) -> Profile {
        Profile {
            cluster,
            placement: placement.to_string(),
            share,
            count: 0,
            at_reference: Vec::new(),
            at_reference_interval: Vec::new(),
            population_averaged: Vec::new(),
        }
    }

    #[test]
    fn a_size_change_is_said_only_when_the_printed_shares_differ() {
        let same = [profile("a", 1, 0.1181), profile("b", 1, 0.1176)];
        assert!(share_changes("a", &same).is_empty());
        let moved = [profile("a", 1, 0.118), profile("b", 1, 0.128)];
        assert_eq!(share_changes("a", &moved).len(), 1);
    }
}
