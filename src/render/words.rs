//! The comparison's findings and notes in words: each finding becomes a sentence, with
//! the table row its numbers come from and those numbers as every table prints them.

use super::{p_value, pct, per_phrase, ratio, val};
use crate::compare::{Finding, InferenceNote, RowRef, Source, TableId};
use serde::Serialize;

/// A finding in words.
#[derive(Debug, Clone, PartialEq, Serialize, schemars::JsonSchema)]
pub struct Sentence {
    /// The sentence.
    pub text: String,
    /// Where its numbers are: table and row.
    pub source: String,
    /// The numbers it quotes, as printed in that table.
    pub numbers: Vec<String>,
}

/// The name a table is shown and referred to by.
pub fn table_name(t: &TableId) -> String {
    match t {
        TableId::Criteria => "criteria table".into(),
        TableId::Alignment => "alignment table".into(),
        TableId::ClusterSizes => "cluster sizes table".into(),
        TableId::Profiles => "profiles table".into(),
        TableId::GatingEffects => "gating effects table".into(),
        TableId::GatingTests => "gating tests table".into(),
        TableId::ThreeStep => "three-step table".into(),
        TableId::Outcomes => "distal outcomes table".into(),
        TableId::TableOne { placement } => format!("Table 1 of '{placement}'"),
        TableId::ClusterCountTests => "cluster count test table".into(),
        TableId::DirectEffects => "direct-effect screen table".into(),
        TableId::ComponentEffects => "component effects table".into(),
        TableId::CrossTable { rows, columns } => format!("cross-table '{rows}' × '{columns}'"),
    }
}

/// Where a finding's numbers are, in words.
pub fn source(s: &Source) -> String {
    let table = table_name(&s.table);
    match &s.row {
        RowRef::Whole => table,
        RowRef::Fit { placement, clusters } => format!("{table}, placement '{placement}', {clusters} clusters"),
        RowRef::Cluster(k) => format!("{table}, row 'cluster {k}'"),
        RowRef::ClusterColumn { cluster, column } => format!("{table}, row 'cluster {cluster}', column '{column}'"),
        RowRef::ClusterTerm {
            cluster,
            term,
            placement: None,
        } => format!("{table}, rows 'cluster {cluster}, {term}'"),
        RowRef::ClusterTerm {
            cluster,
            term,
            placement: Some(p),
        } => format!("{table}, row 'cluster {cluster}, {term}', placement '{p}'"),
        RowRef::Test {
            placement,
            covariate,
            indicator,
        } => format!("{table}, row '{placement}, {covariate}, {indicator}'"),
    }
}

/// A finding as a sentence, its clusters with their `names` ([`super::name_clusters`]).
pub fn sentence(f: &Finding, names: &std::collections::BTreeMap<usize, String>) -> Sentence {
    let (text, numbers) = phrase(f);
    Sentence {
        text: super::name_clusters(&text, names),
        source: super::name_clusters(&source(&f.source()), names),
        numbers,
    }
}

/// A finding's text and the numbers it quotes.
fn phrase(f: &Finding) -> (String, Vec<String>) {
    match f {
        Finding::ModelChoice {
            placement,
            clusters,
            covariance,
            bic,
        } => (
            format!("Under '{placement}' the comparison uses {clusters} clusters ({covariance}), BIC {bic:.1}."),
            vec![format!("{bic:.1}")],
        ),
        Finding::CriteriaDisagree {
            placement,
            clusters,
            others,
            suggest_count_test,
        } => {
            let list = others
                .iter()
                .map(|(name, k, v)| {
                    // Common practice: AIC's penalty is light, and in mixtures it tends to
                    // favour more components than BIC.
                    let aside = if *name == "AIC" && k > clusters {
                        ", which tends to favour more clusters than BIC in mixtures,"
                    } else {
                        ""
                    };
                    format!("{name}{aside} would choose {k} ({name} {v:.1})")
                })
                .collect::<Vec<_>>()
                .join(" and ");
            let test = if *suggest_count_test {
                " The bootstrap test of the cluster count did not run; [inference] cluster_count_replicates runs it."
                    .to_string()
            } else {
                String::new()
            };
            (
                format!(
                    "Under '{placement}' the criteria disagree on the number of clusters: BIC chooses {clusters}, while {list}. The count is uncertain: read the neighbouring solutions beside the chosen one.{test}"
                ),
                others.iter().map(|(_, _, v)| format!("{v:.1}")).collect(),
            )
        }
        Finding::EdgeOfRange {
            placement,
            clusters,
            largest,
            bic,
        } => (
            if *largest {
                format!(
                    "Under '{placement}' BIC chooses {clusters} clusters (BIC {bic:.1}), the largest count fitted: more clusters might fit better; fit a wider range before settling on it."
                )
            } else {
                format!(
                    "Under '{placement}' BIC chooses {clusters} clusters (BIC {bic:.1}), the smallest count fitted: fewer clusters were not tried; fit a wider range before settling on it."
                )
            },
            vec![format!("{bic:.1}")],
        ),
        Finding::FewStarts {
            placement,
            clusters,
            reached,
            starts,
        } => (
            format!(
                "Under '{placement}' the best fit with {clusters} clusters was reached by {reached}/{starts} starts: another search may find a better one; run more starts ([search] starts) to confirm it."
            ),
            vec![format!("{reached}/{starts}")],
        ),
        Finding::ShareChange {
            reference,
            placement,
            cluster,
            from,
            to,
        } => {
            let verb = if to > from { "grows" } else { "shrinks" };
            (
                format!(
                    "Against '{reference}', the largest change in size under '{placement}': cluster {cluster} {verb} from {} of the cohort to {}.",
                    pct(*from),
                    pct(*to)
                ),
                vec![pct(*from), pct(*to)],
            )
        }
        Finding::ProfileShift {
            cluster,
            column,
            reference,
            from,
            placement,
            to,
        } => (
            format!(
                "The largest shift in a profile: cluster {cluster}'s average {column} is {} under '{reference}' and {} under '{placement}'.",
                val(*from),
                val(*to)
            ),
            vec![val(*from), val(*to)],
        ),
        _ => phrase_effects(f),
    }
}

/// The findings about effects, agreement and direct effects.
fn phrase_effects(f: &Finding) -> (String, Vec<String>) {
    match f {
        Finding::DirectionChange { first: a, second: b } => (
            format!(
                "The effect of {} on belonging to cluster {} rather than cluster 1 changes direction: relative risk ratio {}{} under '{}', {} under '{}'.",
                a.words.label,
                a.cluster,
                ratio(a.rrr),
                if a.words.numeric { format!(" per {}", per_phrase(a.per, &a.words)) } else { String::new() },
                a.placement,
                ratio(b.rrr),
                b.placement
            ),
            vec![ratio(a.rrr), ratio(b.rrr)],
        ),
        Finding::StrongestEffect(e) => {
            let word = if e.rrr > 1.0 { "raises" } else { "lowers" };
            let subject = if e.words.numeric {
                format!("each {}", per_phrase(e.per, &e.words))
            } else {
                e.words.label.clone()
            };
            (
                format!(
                    "Under '{}', {subject} {word} the relative risk of cluster {} against cluster 1 by a factor of {}.",
                    e.placement,
                    e.cluster,
                    ratio(e.rrr)
                ),
                vec![ratio(e.rrr)],
            )
        }
        Finding::Separation(e) => (
            format!(
                "Under '{}', {} (nearly) perfectly separates cluster {} from cluster 1: its relative risk ratio runs off towards {} and cannot be estimated. This is separation, not an effect size; a gating ridge ([search] gating_ridge), merging rare levels, or fewer clusters gives estimable effects.",
                e.placement,
                e.words.label,
                e.cluster,
                if e.rrr > 1.0 { "infinity" } else { "0" }
            ),
            vec![crate::render::tables::SEPARATION_CELL.to_string()],
        ),
        Finding::NoCounterpart {
            placement,
            reference,
            cluster,
            share,
        } => (
            format!(
                "'{placement}' has a cluster with no counterpart under '{reference}': cluster {cluster} ({}).",
                pct(*share)
            ),
            vec![pct(*share)],
        ),
        Finding::Agreement { rows, columns, ari } => (
            format!("Most-likely clusters under '{rows}' and '{columns}' agree with an adjusted Rand index of {ari:.3}."),
            vec![format!("{ari:.3}")],
        ),
        Finding::DirectEffect(t) => {
            // The flagged tests, shared first.
            let mut evidence = Vec::new();
            let mut numbers = Vec::new();
            if let (true, Some(p)) = (t.shared.flagged, t.shared.p_value) {
                evidence.push(format!("an effect shared by the clusters: score test p {}", p_value(p)));
                numbers.push(p_value(p));
            }
            if let (true, Some(p)) = (t.by_cluster_flagged, t.p_value) {
                evidence.push(format!("an effect per cluster: likelihood-ratio p {}", p_value(p)));
                numbers.push(p_value(p));
            }
            let evidence = evidence.join("; ");
            let text = if t.step_three_covariate {
                format!(
                    "Warning: under '{}', {} has a direct effect on {} ({evidence}), which the three-step estimate assumes away; prefer a placement that models it.",
                    t.placement, t.covariate, t.indicator
                )
            } else {
                format!(
                    "Under '{}', {} may act directly on {} ({evidence}); the clusters' meaning then differs across its values unless the effect is modelled (acts_on).",
                    t.placement, t.covariate, t.indicator
                )
            };
            (text, numbers)
        }
        Finding::ModelChoice { .. }
        | Finding::ShareChange { .. }
        | Finding::ProfileShift { .. }
        | Finding::CriteriaDisagree { .. }
        | Finding::EdgeOfRange { .. }
        | Finding::FewStarts { .. } => phrase(f),
    }
}

/// How a compared fit's standard errors were obtained, in words.
pub fn inference_note(n: &InferenceNote) -> String {
    match &n.outcome {
        Ok((method, replicates)) => {
            let detail = match replicates {
                Some((used, drawn)) => format!(" ({used} of {drawn} replicates usable)"),
                None => String::new(),
            };
            format!("'{}': standard errors by {}{detail}.", n.placement, method.word())
        }
        Err(reason) => format!("'{}': no standard errors: {reason}.", n.placement),
    }
}
