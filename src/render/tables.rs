//! The comparison's tables, built once and rendered to Markdown and HTML.

use super::words::table_name;
use super::{p_value, pct, ratio, val};
use crate::compare::{Comparison, TableId};

/// A table: which one, its note, header and rows of text cells.
#[derive(Debug, Clone, PartialEq)]
pub struct Table {
    /// Which table (the sentences refer to it by its name, [`Table::name`]).
    pub id: TableId,
    /// One-line explanation shown above it.
    pub note: String,
    /// Column headers.
    pub header: Vec<String>,
    /// Rows.
    pub rows: Vec<Vec<String>>,
}

impl Table {
    /// The name the sentences refer to it by ("cluster sizes table").
    pub fn name(&self) -> String {
        table_name(&self.id)
    }
}

fn opt(x: Option<f64>, digits: usize) -> String {
    x.map_or_else(|| "–".to_string(), |v| format!("{v:.digits$}"))
}

fn with_interval(estimate: String, interval: Option<(String, String)>) -> String {
    match interval {
        Some((a, b)) => format!("{estimate} ({a} to {b})"),
        None => estimate,
    }
}

fn units(per: f64) -> String {
    if per == per.trunc() {
        format!("{per:.0}")
    } else {
        format!("{per}")
    }
}

fn val3(x: f64) -> String {
    format!("{x:.3}")
}

/// Every table of the comparison, in report order.
pub fn tables(c: &Comparison) -> Vec<Table> {
    let mut out = Vec::new();
    let placements: Vec<String> = c.alignments.iter().map(|a| a.placement.clone()).collect();
    criteria_table(c, &mut out);
    alignment_table(c, &mut out);
    sizes_table(c, &placements, &mut out);
    profiles_table(c, &mut out);
    gating_table(c, &placements, &mut out);
    gating_tests_table(c, &mut out);
    three_step_table(c, &mut out);
    outcomes_table(c, &mut out);
    table_one(c, &placements, &mut out);
    count_tests_table(c, &mut out);
    screen_table(c, &mut out);
    component_table(c, &placements, &mut out);
    cross_tables(c, &mut out);
    // Named clusters: every cell and header that starts with a cluster number.
    for t in &mut out {
        for cell in t.rows.iter_mut().flatten().chain(t.header.iter_mut()) {
            if cell.starts_with("cluster ") {
                *cell = super::name_clusters(cell, &c.cluster_names);
            }
        }
    }
    out
}

/// The criteria of every fit; the structure column goes when every fit has the same.
fn criteria_table(c: &Comparison, out: &mut Vec<Table>) {
    let one_structure = c.criteria.iter().all(|r| r.covariance == c.criteria[0].covariance);
    let mut criteria = Table {
        id: TableId::Criteria,
        note: "BIC, AIC and ICL: smaller is better. ICL adds to BIC twice the (weighted) sum of −ln of each row's top posterior (Biernacki, Celeux & Govaert 2000), so it favours clearly separated clusters. BIC weight: approximate posterior probability of the model among its placement's fits. ✓ marks the fit each placement is compared with.".into(),
        header: ["placement", "clusters", "covariance", "loglik", "parameters", "BIC", "AIC", "ICL", "BIC weight", "relative entropy", "mean top posterior by cluster", "smallest cluster", "starts at best", "status", "compared"]
            .iter()
            .map(|s| s.to_string())
            .collect(),
        rows: c
            .criteria
            .iter()
            .map(|r| {
                vec![
                    r.placement.clone(),
                    r.clusters.to_string(),
                    r.covariance.clone(),
                    opt(r.loglik, 1),
                    r.parameters.to_string(),
                    opt(r.bic, 1),
                    opt(r.aic, 1),
                    opt(r.icl, 1),
                    opt(r.bic_weight, 3),
                    opt(r.relative_entropy, 3),
                    r.average_posterior
                        .iter()
                        .map(|v| format!("{}: {:.2}", v.cluster, v.value))
                        .collect::<Vec<_>>()
                        .join(" · "),
                    match (r.smallest_share, r.smallest_count) {
                        (Some(s), Some(n)) => format!("{} (n = {n:.0})", pct(s)),
                        _ => "–".into(),
                    },
                    format!("{}/{}", r.starts_reaching_best, r.starts),
                    r.status.replace('_', " "),
                    if r.chosen { "✓".into() } else { String::new() },
                ]
            })
            .collect(),
    };
    if one_structure && !c.criteria.is_empty() {
        // Every fit has the same covariance structure: say it once.
        criteria.note = format!(
            "{} Covariance structure of every fit: {}.",
            criteria.note, c.criteria[0].covariance
        );
        criteria.header.remove(2);
        for r in criteria.rows.iter_mut() {
            r.remove(2);
        }
    }
    out.push(criteria);
}

/// How each placement's clusters are aligned.
fn alignment_table(c: &Comparison, out: &mut Vec<Table>) {
    let mut rows = Vec::new();
    for a in &c.alignments {
        let mut order: Vec<usize> = (0..a.aligned.len()).collect();
        order.sort_by_key(|k| a.aligned[*k]);
        for k in order {
            let (al, ov) = (&a.aligned[k], &a.overlap[k]);
            rows.push(vec![
                a.placement.clone(),
                format!("{} of {}", k + 1, a.clusters),
                format!("cluster {al}"),
                ov.map_or_else(|| "no counterpart: new".to_string(), pct),
            ]);
        }
    }
    out.push(Table {
        id: TableId::Alignment,
        note: format!("Each placement's clusters matched to those of '{}' by the largest total posterior agreement (Hungarian method); overlap = share of the fitted cluster's weight in its matched reference cluster.", c.reference),
        header: vec!["placement".into(), "fitted cluster".into(), "aligned as".into(), "overlap".into()],
        rows,
    });
}

/// Aligned cluster sizes per placement.
fn sizes_table(c: &Comparison, placements: &[String], out: &mut Vec<Table>) {
    let mut clusters: Vec<usize> = c.profiles.iter().map(|p| p.cluster).collect();
    clusters.sort_unstable();
    clusters.dedup();
    let mut header = vec!["cluster".to_string()];
    header.extend(placements.iter().cloned());
    out.push(Table {
        id: TableId::ClusterSizes,
        note: "Share of the (weighted) cohort by posterior, and rows whose most likely cluster it is.".into(),
        header,
        rows: clusters
            .iter()
            .map(|k| {
                let mut row = vec![format!("cluster {k}")];
                for pl in placements {
                    row.push(
                        c.profiles
                            .iter()
                            .find(|p| p.cluster == *k && &p.placement == pl)
                            .map_or_else(|| "–".into(), |p| format!("{} ({} rows)", pct(p.share), p.count)),
                    );
                }
                row
            })
            .collect(),
    });
}

/// Profiles per aligned cluster and placement.
fn profiles_table(c: &Comparison, out: &mut Vec<Table>) {
    let mut header = vec!["cluster".to_string(), "placement".to_string(), "share".to_string()];
    for i in &c.indicators {
        header.push(format!("{i} at reference"));
        header.push(format!("{i} averaged"));
    }
    out.push(Table {
        id: TableId::Profiles,
        note: format!(
            "Indicator means per aligned cluster: {}; and averaged over the sample, weighted by each row's posterior.",
            c.reference_values
        ),
        header,
        rows: c
            .profiles
            .iter()
            .map(|p| {
                let mut row = vec![format!("cluster {}", p.cluster), p.placement.clone(), pct(p.share)];
                for (a, b) in p.at_reference.iter().zip(&p.population_averaged) {
                    row.push(val(*a));
                    row.push(val(*b));
                }
                row
            })
            .collect(),
    });
}

/// A gating ratio that is separation, not an effect.
pub const SEPARATION_CELL: &str = "separation: not estimable";

/// Gating relative risk ratios, a column per placement with gating effects.
fn gating_table(c: &Comparison, placements: &[String], out: &mut Vec<Table>) {
    let with_gating: Vec<&String> = placements
        .iter()
        .filter(|p| c.gating_effects.iter().any(|e| &e.placement == *p))
        .collect();
    if !with_gating.is_empty() {
        let mut keys: Vec<(usize, String)> = c.gating_effects.iter().map(|e| (e.cluster, e.term.clone())).collect();
        keys.sort();
        keys.dedup();
        let mut header = vec!["cluster vs cluster 1".to_string(), "term".to_string()];
        header.extend(with_gating.iter().map(|p| p.to_string()));
        out.push(Table {
            id: TableId::GatingEffects,
            note: "Relative risk ratios exp(γ) with 95% Wald confidence intervals and Wald p-values: how the stated amount of the term multiplies the risk of belonging to the cluster rather than aligned cluster 1 (1 = no effect). For a level of a categorical covariate or a binary one: that level against the reference, as the term says. \"separation\": the term (nearly) perfectly separates the two clusters, so its ratio runs off towards 0 or infinity and no effect can be estimated.".into(),
            header,
            rows: keys
                .iter()
                .map(|(k, term)| {
                    let shown = c.gating_effects.iter().find(|e| &e.term == term).map_or_else(|| term.clone(), |e| e.words.with_per(e.per));
                    let mut row = vec![format!("cluster {k}"), shown];
                    for pl in &with_gating {
                        row.push(c.gating_effects.iter().find(|e| e.cluster == *k && &e.term == term && &e.placement == *pl).map_or_else(|| "–".into(), |e| if e.separation { SEPARATION_CELL.into() } else {
                            let cell = with_interval(ratio(e.rrr), e.interval.map(|(a, b)| (ratio(a), ratio(b))));
                            match e.p_value { Some(p) => format!("{cell}; p {}", p_value(p)), None => cell }
                        }));
                    }
                    row
                })
                .collect(),
        });
    }
}

/// Joint Wald tests of the gating covariates.
fn gating_tests_table(c: &Comparison, out: &mut Vec<Table>) {
    if !c.gating_tests.is_empty() {
        out.push(Table {
            id: TableId::GatingTests,
            note: "Joint Wald test that a covariate does not change membership: all its terms across every cluster contrast at once (the same whichever cluster is the reference).".into(),
            header: ["placement", "covariate", "Wald χ²", "df", "p-value"].iter().map(|s| s.to_string()).collect(),
            rows: c
                .gating_tests
                .iter()
                .map(|t| {
                    vec![
                        t.placement.clone(),
                        t.test.covariate.clone(),
                        format!("{:.2}", t.test.statistic),
                        t.test.df.to_string(),
                        p_value(t.test.p_value),
                    ]
                })
                .collect(),
        });
    }
}

/// Three-step estimates beside classify-analyze.
fn three_step_table(c: &Comparison, out: &mut Vec<Table>) {
    if !c.three_step.is_empty() {
        out.push(Table {
            id: TableId::ThreeStep,
            note: "Gating effects estimated after the clusters were fitted without covariates: each row assigned to its most likely cluster, then a multinomial logit corrected for the assignment errors (BCH: Bolck, Croon & Hagenaars 2004; ML: Vermunt 2010), or, two-step, the multinomial logit of the full likelihood with the clusters held at the first fit (Bakk & Kuha 2018; no assignments). Classify-analyze, the same logit without the correction, is biased toward no effect and shown only as a contrast. Relative risk ratios with 95% intervals; the corrected intervals include the uncertainty of the first step's fit (Bakk, Oberski & Vermunt 2014: its part added to the third step's own, or, with bootstrap errors, all three steps rerun in each replicate); the classify-analyze intervals do not.".into(),
            header: ["placement", "method", "misclassified", "cluster", "term", "per", "corrected", "classify-analyze (biased)"].iter().map(|s| s.to_string()).collect(),
            rows: c
                .three_step
                .iter()
                .map(|e| {
                    let show = |i: &crate::inference::effects::Interval| with_interval(ratio(i.estimate), Some((ratio(i.lower), ratio(i.upper))));
                    vec![
                        e.placement.clone(),
                        e.method.to_string(),
                        pct(e.misclassified),
                        format!("cluster {} vs {}", e.cluster, e.versus),
                        e.term.clone(),
                        units(e.per),
                        show(&e.corrected),
                        show(&e.classify_analyze),
                    ]
                })
                .collect(),
        });
    }
}

/// Distal outcomes per cluster, against cluster 1, and the joint test.
fn outcomes_table(c: &Comparison, out: &mut Vec<Table>) {
    if c.outcomes.is_empty() {
        return;
    }
    let mut rows = Vec::new();
    for o in &c.outcomes {
        let r = match (&o.comparison, &o.unavailable) {
            (Some(r), _) => r,
            (None, why) => {
                let why = why.as_deref().unwrap_or("no reason recorded");
                rows.push(vec![
                    o.placement.clone(),
                    o.outcome.clone(),
                    "–".into(),
                    "–".into(),
                    format!("not available: {why}"),
                    "–".into(),
                    "–".into(),
                    "–".into(),
                ]);
                continue;
            }
        };
        let digits = if r.kind == crate::inference::outcomes::OutcomeKind::Binary {
            3
        } else {
            2
        };
        let fmt = |x: f64| format!("{x:.digits$}");
        let joint = match (r.joint_statistic, r.joint_p_value) {
            (Some(w), Some(p)) => format!("χ² {w:.2} ({} df), p {}", r.joint_df, p_value(p)),
            _ => "–".into(),
        };
        for (i, k) in r.clusters.iter().enumerate() {
            let interval = k.lower.zip(k.upper).map(|(a, b)| (fmt(a), fmt(b)));
            let (versus, p) = match i.checked_sub(1).and_then(|j| r.contrasts.get(j)) {
                None => ("reference".to_string(), String::new()),
                Some(ct) => match ct.estimate {
                    Some(e) => {
                        let show = |x: f64| {
                            if r.kind == crate::inference::outcomes::OutcomeKind::Continuous {
                                format!("{x:.2}")
                            } else {
                                ratio(x)
                            }
                        };
                        (
                            with_interval(show(e), ct.lower.zip(ct.upper).map(|(a, b)| (show(a), show(b)))),
                            ct.p_value.map_or_else(String::new, p_value),
                        )
                    }
                    None => ("–".into(), String::new()),
                },
            };
            rows.push(vec![
                o.placement.clone(),
                o.outcome.clone(),
                format!(
                    "{} ({}, {} rows)",
                    r.estimate,
                    r.method.word().to_uppercase(),
                    r.rows_used
                ),
                format!("cluster {}", k.cluster),
                with_interval(fmt(k.estimate), interval),
                versus,
                p,
                if i == 0 { joint.clone() } else { String::new() },
            ]);
        }
    }
    out.push(Table {
        id: TableId::Outcomes,
        note: "Outcomes that are in no model, compared across each placement's compared clusters: each row assigned to its most likely cluster, and the outcome's mean, risk or mean count per cluster corrected for the assignment errors (BCH: Bolck, Croon & Hagenaars 2004, Bakk & Vermunt 2016; ML: Vermunt 2010), with 95% intervals that include the uncertainty of the fitted clusters (Bakk, Oberski & Vermunt 2014). Each cluster is set against cluster 1 (a difference for a continuous outcome, a ratio of risks or of mean counts otherwise); the joint test asks whether the outcome is the same in every cluster. An association, not an effect of membership: the clusters were not assigned at random.".into(),
        header: ["placement", "outcome", "estimate", "cluster", "estimate (95% CI)", "against cluster 1 (95% CI)", "p", "all clusters equal"].iter().map(|s| s.to_string()).collect(),
        rows,
    });
}

/// A Table 1 summary as Table 1 and the cluster cards write it: mean (SD) for numbers,
/// weighted count (%) for a level.
pub fn table_one_cell(s: &crate::compare::table_one::Summary) -> String {
    match (s.mean, s.sd, s.share) {
        (Some(m), Some(sd), _) => format!("{} ({})", val(m), val(sd)),
        (_, _, Some(share)) => format!("{:.0} ({})", s.n, pct(share)),
        _ => "–".into(),
    }
}

/// A Table 1 line's label: the variable, and its level if it has one.
pub fn table_one_label(t: &crate::compare::table_one::TableOneCell) -> String {
    match &t.level {
        Some(level) => format!("{}: {level}", t.variable),
        None => t.variable.clone(),
    }
}

/// Table 1 of each placement: variables (and levels) by aligned cluster, posterior-weighted.
fn table_one(c: &Comparison, placements: &[String], out: &mut Vec<Table>) {
    for placement in placements {
        let cells: Vec<&crate::compare::table_one::TableOneCell> =
            c.table_one.iter().filter(|t| &t.placement == placement).collect();
        if cells.is_empty() {
            continue;
        }
        let mut clusters: Vec<usize> = cells.iter().map(|t| t.cluster).collect();
        clusters.sort_unstable();
        clusters.dedup();
        let mut rows: Vec<Vec<String>> = Vec::new();
        for t in cells.iter().filter(|t| t.cluster == clusters[0]) {
            let mut row = vec![table_one_label(t)];
            for k in &clusters {
                let cell = cells
                    .iter()
                    .find(|x| x.cluster == *k && x.variable == t.variable && x.level == t.level)
                    .map(|x| &x.weighted);
                row.push(cell.map_or_else(|| "–".into(), table_one_cell));
            }
            rows.push(row);
        }
        let mut header = vec!["variable".to_string()];
        header.extend(clusters.iter().map(|k| format!("cluster {k}")));
        out.push(Table {
            id: TableId::TableOne {
                placement: placement.clone(),
            },
            note: format!("Covariates and indicators by cluster under '{placement}': mean (SD) for numbers, weighted count (%) for each level (for a binary column, its 1s). Posterior-weighted: each row counts in every cluster by its probability of belonging there (times its case weight). table1.csv also gives each summary over the rows whose most likely cluster it is."),
            header,
            rows,
        });
    }
}

/// Bootstrap tests of the cluster counts.
fn count_tests_table(c: &Comparison, out: &mut Vec<Table>) {
    if !c.cluster_count_tests.is_empty() {
        out.push(Table {
            id: TableId::ClusterCountTests,
            note: "Bootstrap likelihood-ratio test of the compared cluster count G against G − 1 (McLachlan 1987): data drawn from the fitted G − 1 model are fitted with both counts; p = (1 + replicates reaching the observed statistic) / (1 + usable replicates). A small p supports G over G − 1.".into(),
            header: ["placement", "G vs G − 1", "LR", "replicates usable", "reached", "p-value"].iter().map(|s| s.to_string()).collect(),
            rows: c
                .cluster_count_tests
                .iter()
                .map(|t| {
                    vec![
                        t.placement.clone(),
                        format!("{} vs {}", t.clusters, t.clusters - 1),
                        format!("{:.2}", t.statistic),
                        format!("{} of {}", t.usable, t.replicates),
                        t.reached.to_string(),
                        format!("{:.3}", t.p_value),
                    ]
                })
                .collect(),
        });
    }
}

/// The direct-effect screen.
fn screen_table(c: &Comparison, out: &mut Vec<Table>) {
    if !c.direct_effects.is_empty() {
        let test = |x: Option<f64>, df: usize, p: Option<f64>, note: &Option<String>| -> (String, String) {
            match (x, p) {
                (Some(x), Some(p)) => (format!("{x:.2} ({df})"), p_value(p)),
                (Some(x), None) => (format!("{x:.2} ({df})"), note.clone().unwrap_or_else(|| "–".into())),
                _ => ("–".into(), note.clone().unwrap_or_else(|| "–".into())),
            }
        };
        out.push(Table {
            id: TableId::DirectEffects,
            note: "Tests of adding each covariate as a direct effect on an indicator, to the model with the placement's gating covariates (for a three-step placement, the one-step model its estimate assumes); continuous indicators are tested together. First, one effect shared by every cluster (score test at the model without it, df (levels − 1) × terms); then, as a follow-up, an effect of its own in each cluster (likelihood-ratio test, df clusters times as many), which also finds an effect present in some clusters only. ⚑ marks a pair with either test flagged by Holm's step-down procedure over all the placement's tests of both kinds (family-wise error 0.05; Holm 1979); for a three-step placement's own covariates it means the three-step assumption fails.".into(),
            header: ["placement", "covariate", "indicator", "shared: score χ² (df)", "p-value", "per cluster: LR χ² (df)", "p-value", "flag"].iter().map(|s| s.to_string()).collect(),
            rows: c
                .direct_effects
                .iter()
                .map(|t| {
                    let (shared, shared_p) = test(t.shared.statistic, t.shared.df, t.shared.p_value, &t.shared.note);
                    let (own, own_p) = test(t.statistic, t.df, t.p_value, &t.note);
                    let which = match (t.shared.flagged, t.by_cluster_flagged) {
                        (true, true) => "both tests",
                        (true, false) => "shared",
                        (false, true) => "per cluster",
                        (false, false) => "",
                    };
                    vec![
                        t.placement.clone(),
                        t.covariate.clone(),
                        t.indicator.clone(),
                        shared,
                        shared_p,
                        own,
                        own_p,
                        match (t.flagged, t.step_three_covariate) {
                            (true, true) => format!("⚑ {which}: three-step assumption fails"),
                            (true, false) => format!("⚑ {which}"),
                            _ => String::new(),
                        },
                    ]
                })
                .collect(),
        });
    }
}

/// Component covariate effects.
fn component_table(c: &Comparison, placements: &[String], out: &mut Vec<Table>) {
    if !c.component_effects.is_empty() {
        let mut rows: Vec<&crate::compare::ComponentEffect> = c.component_effects.iter().collect();
        rows.sort_by(|a, b| {
            (a.cluster, &a.effect.indicator, &a.effect.term)
                .cmp(&(b.cluster, &b.effect.indicator, &b.effect.term))
                .then(
                    placements
                        .iter()
                        .position(|p| *p == a.placement)
                        .cmp(&placements.iter().position(|p| *p == b.placement)),
                )
        });
        out.push(Table {
            id: TableId::ComponentEffects,
            note: "Covariate effects inside each aligned cluster, with 95% Wald confidence intervals: mean differences of continuous indicators, odds ratios of an item level against the item's first level, rate ratios of counts; per the stated units of the term.".into(),
            header: ["cluster", "indicator", "term", "per", "placement", "measure", "estimate (95% CI)", "p-value"].iter().map(|s| s.to_string()).collect(),
            rows: rows
                .iter()
                .map(|e| {
                    let i = &e.effect.interval;
                    vec![
                        format!("cluster {}", e.cluster),
                        e.effect.indicator.clone().unwrap_or_default(),
                        e.effect.term.clone(),
                        units(e.effect.per),
                        e.placement.clone(),
                        e.effect.measure.to_string(),
                        with_interval(val3(i.estimate), Some((val3(i.lower), val3(i.upper)))),
                        p_value(i.p_value),
                    ]
                })
                .collect(),
        });
    }
}

/// The cross-tables of most likely clusters.
fn cross_tables(c: &Comparison, out: &mut Vec<Table>) {
    for t in &c.cross_tables {
        let mut header = vec![format!("{} \\ {}", t.rows, t.columns)];
        header.extend(t.column_clusters.iter().map(|k| format!("cluster {k}")));
        header.push("same cluster".to_string());
        out.push(Table {
            id: TableId::CrossTable {
                rows: t.rows.clone(),
                columns: t.columns.clone(),
            },
            note: format!("Rows by most likely cluster; same cluster = share of the row cluster's rows in the same aligned cluster in the column placement; adjusted Rand index {:.3} (Hubert & Arabie 1985; 1 = the same partition; rows counted by their case weights).", t.adjusted_rand_index),
            header,
            rows: t
                .row_clusters
                .iter()
                .zip(&t.counts)
                .zip(&t.agreement)
                .map(|((k, cs), agree)| {
                    let mut row = vec![format!("cluster {k}")];
                    row.extend(cs.iter().map(|n| n.to_string()));
                    row.push(agree.map_or_else(|| "–".to_string(), pct));
                    row
                })
                .collect(),
        });
    }
}
