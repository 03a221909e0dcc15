//! `summary.md` and `report.html`: the same tables and sentences, two renderings.

use super::svg::{self, cluster_colour, esc, Series};
use super::tables::{tables, Table};
use super::words;
use crate::compare::{Comparison, TableId};
use crate::pipeline::output::Results;
use std::fmt::Write as _;

/// The cautions every report carries.
pub const CAUTIONS: [&str; 4] = [
    "Clusters are model-based summaries of the data, not diagnoses.",
    "They can be driven by the modelling assumptions: the indicators chosen, the covariance structure, where covariates are placed.",
    "Small clusters need replication in other data before they are taken seriously.",
    "Nothing here is clinical advice; use and interpretation defer to local practice and ethics review.",
];

/// The caution of a study whose spec says its data are simulated (`[study] simulated`).
pub const SIMULATED: &str = "The data are simulated and describe no real people.";

/// The cautions of this run's report: every report's, and the simulated-data one where
/// the spec says so.
pub fn cautions(results: &Results) -> Vec<&'static str> {
    let mut out = CAUTIONS.to_vec();
    if results.study.simulated {
        out.push(SIMULATED);
    }
    out
}

/// The reporting checklist, filled from the run (items follow the spirit of the GRoLTS
/// checklist of van de Schoot et al. 2017, in our own words).
pub fn checklist(results: &Results, c: &Comparison) -> Vec<(String, String)> {
    let s = &results.study;
    let missing: Vec<String> = s
        .missing_by_column
        .iter()
        .filter(|m| m.missing > 0)
        .map(|m| format!("{}: {}", m.column, m.missing))
        .collect();
    let mut placements = Vec::new();
    let mut seen = Vec::new();
    for f in &results.fits {
        if !seen.contains(&f.placement) {
            seen.push(f.placement.clone());
            placements.push(format!(
                "'{}': membership (gating) {}; within clusters (components) {}",
                f.placement,
                if f.gating_covariates.is_empty() {
                    "none".to_string()
                } else {
                    f.gating_covariates.join(", ")
                },
                if f.component_covariates.is_empty() {
                    "none".to_string()
                } else {
                    f.component_covariates.join(", ")
                }
            ));
        }
    }
    let counts: Vec<usize> = {
        let mut v: Vec<usize> = results.fits.iter().map(|f| f.clusters).collect();
        v.sort_unstable();
        v.dedup();
        v
    };
    let sizes: Vec<String> = c
        .criteria
        .iter()
        .filter(|r| r.chosen)
        .map(|r| {
            format!(
                "'{}': {} clusters, smallest {}",
                r.placement,
                r.clusters,
                r.smallest_share.map_or("–".into(), super::pct)
            )
        })
        .collect();
    let entropy: Vec<String> = c
        .criteria
        .iter()
        .filter(|r| r.chosen)
        .map(|r| {
            format!(
                "'{}': {}",
                r.placement,
                r.relative_entropy.map_or("–".into(), |e| format!("{e:.3}"))
            )
        })
        .collect();
    vec![
        ("Indicators".into(), format!("{} ({} family)", s.indicators.join(", "), s.family)),
        ("Rows".into(), format!("{} read, {} used, {} excluded for a missing value", s.rows_read, s.rows_used, s.rows_excluded)),
        ("Missing data".into(), if missing.is_empty() { "none in the columns used".into() } else { format!("rows missing any used value were excluded ({})", missing.join(", ")) }),
        ("Missing item values".into(), if s.indicator_kinds.contains(&"item") { format!("{} item values missing in the rows used, each skipped in its row's likelihood (missing at random assumed)", s.item_values_missing) } else { "no items".into() }),
        ("Counts".into(), if s.indicator_kinds.contains(&"count") { format!("Poisson regressions; exposure {}", s.exposure.as_deref().map_or("none (counts per row)".to_string(), |e| format!("'{e}' (log exposure as offset; rates per unit of it)"))) } else { "no counts".into() }),
        ("Case weights".into(), weights_line(s)),
        ("Covariates and their placement".into(), placements.join("; ")),
        ("Cluster counts fitted (including 1)".into(), counts.iter().map(usize::to_string).collect::<Vec<_>>().join(", ")),
        ("Covariance structures".into(), s.covariance_structures.join("; ")),
        ("Estimation".into(), format!("EM{}, {} starts per fit (random partitions and k-means++-type seeding), up to {} iterations, relative tolerance {:e}, seed {}{}", if s.accelerate { " with squared extrapolation of its steps (Varadhan & Roland 2008)" } else { "" }, s.starts, s.max_iterations, s.tolerance, s.seed, two_stages(s))),
        ("Regularisation".into(), format!("gating ridge {}; covariance prior {}; variance floor {}; item smoothing {}", s.gating_ridge, if s.covariance_prior { "on" } else { "off" }, s.variance_floor, s.item_smoothing)),
        ("Model choice".into(), match c.fixed_clusters { Some(g) => format!("cluster count fixed at {g} by the spec; lowest BIC among structures"), None => "lowest BIC per placement; AIC, ICL and BIC weights reported".into() }),
        ("Chosen models and cluster sizes".into(), sizes.join("; ")),
        ("Classification quality (relative entropy)".into(), entropy.join("; ")),
        ("Standard errors and intervals".into(), if c.inference_notes.is_empty() { "none computed".into() } else { format!("95% Wald intervals. {}", notes(c).join(" ")) }),
        ("Software".into(), format!("cohortmix {}", results.program.version)),
    ]
}

fn md_table(out: &mut String, t: &Table) {
    let _ = writeln!(out, "*{}*\n", md_text(&t.note));
    let _ = writeln!(
        out,
        "| {} |",
        t.header.iter().map(|h| md_cell(h)).collect::<Vec<_>>().join(" | ")
    );
    let _ = writeln!(out, "|{}|", vec!["---"; t.header.len()].join("|"));
    for r in &t.rows {
        let _ = writeln!(
            out,
            "| {} |",
            r.iter().map(|c| md_cell(c)).collect::<Vec<_>>().join(" | ")
        );
    }
    out.push('\n');
}

fn md_cell(s: &str) -> String {
    md_text(s)
}

/// Text for `summary.md`: names, levels and titles come from the spec and the data, so
/// every character Markdown or HTML would read as markup (`\ ` * _ [ ] < > & | ~ #`) is
/// escaped with a backslash, and a line break becomes a space. A viewer shows the text as
/// written; no tag, link or heading can come from it.
pub fn md_text(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '\\' | '`' | '*' | '_' | '[' | ']' | '<' | '>' | '&' | '|' | '~' | '#' => {
                out.push('\\');
                out.push(c);
            }
            '\n' | '\r' => out.push(' '),
            c if c.is_control() => {}
            c => out.push(c),
        }
    }
    out
}

/// What the case weights are and what follows from them, in words.
fn weights_line(s: &crate::pipeline::output::StudySummary) -> String {
    let design = s.survey_design.as_ref().map(|d| {
        let strata = match &d.strata {
            Some(c) => format!("{} strata ('{c}')", d.strata_count),
            None => "one stratum".to_string(),
        };
        let units = match &d.psu {
            Some(c) => format!("{} primary sampling units ('{c}')", d.units),
            None => format!("{} rows as sampling units", d.units),
        };
        format!("{units} in {strata}")
    });
    let Some(column) = &s.weights else {
        return match design {
            None => "none".into(),
            Some(d) => format!(
                "none (equal selection probabilities); standard errors are design-based over {d}, by linearisation (Binder 1983), and the direct-effect screen refers its shared-effect score tests to the design-based score variance and divides its per-cluster likelihood-ratio statistics by their mean design effect (first-order Rao-Scott correction)"
            ),
        };
    };
    match s.weight_type {
        Some("frequency") => format!(
            "'{column}', frequency weights (a row stands for that many people): n = {:.0} in BIC, ICL and the counts",
            s.sample_size
        ),
        _ => format!(
            "'{column}', sampling weights, rescaled to mean 1 over the rows used (their scale changes nothing); \
             standard errors are design-based, {} (Binder 1983); the direct-effect screen refers \
             its shared-effect score tests to the design-based score variance and divides its \
             per-cluster likelihood-ratio statistics by their mean design effect (first-order \
             Rao-Scott correction); BIC, ICL and the cluster-count test treat the rescaled weights as counts, \
             so they are approximate",
            match design {
                Some(d) => format!("by linearisation over {d}"),
                None => "each row a sampling unit".to_string(),
            }
        ),
    }
}

/// `summary.md`.
pub fn markdown(results: &Results, c: &Comparison) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "# {}\n", md_text(&results.study.title));
    let _ = writeln!(
        s,
        "Placement comparison by cohortmix {}. Reference placement: '{}'.\n",
        results.program.version,
        md_text(&c.reference)
    );
    s.push_str("> **Cautions.** ");
    s.push_str(&md_text(&cautions(results).join(" ")));
    for w in &results.study.data_warnings {
        let _ = write!(s, "\n>\n> **Data.** {}", md_text(w));
    }
    let cards = cards(c);
    if !cards.is_empty() {
        let _ = write!(
            s,
            "\n\n## At a glance: the clusters of '{}'\n\nSize as in Table 1 (posterior-weighted); certainty: mean top posterior of the rows assigned to the cluster.\n",
            md_text(&c.reference)
        );
        for card in &cards {
            let mut line = format!("{} of the cohort", card.size);
            if let Some(certainty) = &card.certainty {
                line.push_str(&format!(", certainty {certainty}"));
            }
            if !card.stands_out.is_empty() {
                line.push_str(&format!("; {}", card.stands_out.join(", ")));
            }
            let _ = write!(s, "\n- **{}**: {}", md_text(&card.title), md_text(&line));
        }
    }
    s.push_str("\n\n## What changes between placements\n\n");
    for sentence in c.findings.iter().map(|f| words::sentence(f, &c.cluster_names)) {
        let _ = writeln!(s, "- {} *(see {})*", md_text(&sentence.text), md_text(&sentence.source));
    }
    s.push('\n');
    for t in tables(c) {
        let _ = writeln!(s, "## {}\n", md_text(&capitalise(&t.name())));
        md_table(&mut s, &t);
    }
    s.push_str("## Reporting checklist\n\n");
    for (k, v) in checklist(results, c) {
        let _ = writeln!(s, "- **{}**: {}", md_text(&k), md_text(&v));
    }
    s
}

fn capitalise(s: &str) -> String {
    let mut c = s.chars();
    c.next()
        .map_or_else(String::new, |f| f.to_uppercase().chain(c).collect())
}

/// Widest a table may need at its narrowest (every cell wrapped at its spaces), in px:
/// the page's text column at a window 800 px wide (768 px) less some room for error.
const TABLE_BUDGET_PX: f64 = 740.0;

/// Headers of the leading columns that say what a row is about; a table too wide for the
/// page is split into parts that each repeat them.
const KEY_HEADERS: [&str; 7] = [
    "placement",
    "clusters",
    "covariance",
    "cluster",
    "variable",
    "cluster vs cluster 1",
    "term",
];

/// The columns of each part of `t` when it is printed as several tables: one part when
/// it fits [`TABLE_BUDGET_PX`] at its narrowest, else parts that each repeat the key
/// columns (at least the first) and take the other columns in order while they fit.
fn column_parts(t: &Table, px_per_char: f64) -> Vec<Vec<usize>> {
    let columns = t.header.len();
    // A column's narrowest width: its longest unbreakable word, plus the cell padding.
    let narrowest: Vec<f64> = (0..columns)
        .map(|c| {
            let longest = std::iter::once(&t.header[c])
                .chain(t.rows.iter().filter_map(|r| r.get(c)))
                .flat_map(|text| text.split_whitespace())
                .map(|w| w.chars().count())
                .max()
                .unwrap_or(1);
            // The first column may carry a colour swatch (about 1.2 em).
            let swatch = if c == 0 { 1.2 * px_per_char / 0.55 } else { 0.0 };
            longest as f64 * px_per_char + 12.0 + swatch
        })
        .collect();
    if narrowest.iter().sum::<f64>() <= TABLE_BUDGET_PX {
        return vec![(0..columns).collect()];
    }
    let keys = t
        .header
        .iter()
        .take(3)
        .take_while(|h| KEY_HEADERS.contains(&h.as_str()))
        .count()
        .max(1)
        .min(columns);
    let key_width: f64 = narrowest[..keys].iter().sum();
    // The other columns in order, a new part when the next would not fit `limit`.
    let split = |limit: f64| {
        let mut parts: Vec<Vec<usize>> = Vec::new();
        let mut part: Vec<usize> = (0..keys).collect();
        let mut width = key_width;
        for (c, w) in narrowest.iter().enumerate().skip(keys) {
            if part.len() > keys && width + w > limit {
                parts.push(std::mem::replace(&mut part, (0..keys).collect()));
                width = key_width;
            }
            part.push(c);
            width += w;
        }
        parts.push(part);
        parts
    };
    let fewest = split(TABLE_BUDGET_PX);
    // As many parts as needed, but of even widths, so that no part is left with one column.
    let rest: f64 = narrowest[keys..].iter().sum();
    let widest = narrowest[keys..].iter().copied().fold(0.0, f64::max);
    let even = split((key_width + rest / fewest.len() as f64 + widest / 2.0).min(TABLE_BUDGET_PX));
    if even.len() == fewest.len() {
        even
    } else {
        fewest
    }
}

fn html_table(out: &mut String, t: &Table) {
    // Many columns: a smaller type, so that the table fits a laptop's screen.
    let wide = t.header.len() > 9;
    let _ = write!(out, "<p class=\"note\">{}</p>", esc(&t.note));
    let parts = column_parts(t, if wide { 7.1 } else { 8.2 });
    if parts.len() > 1 {
        // The page printed is wider than a screen's text column and its type smaller:
        // print shows the table whole, the screen in its parts.
        out.push_str("<div class=\"whole\">");
        table_part(out, t, &(0..t.header.len()).collect::<Vec<_>>(), wide);
        out.push_str("</div><div class=\"parts\">");
    }
    for (n, part) in parts.iter().enumerate() {
        if parts.len() > 1 {
            let keys = parts[0]
                .iter()
                .take_while(|c| parts.iter().all(|p| p.contains(c)))
                .count();
            let repeated: Vec<String> = t.header[..keys].iter().map(|h| format!("'{h}'")).collect();
            let _ = write!(
                out,
                "<p class=\"note\">Part {} of {}: the table is split by columns to fit the screen (printed, it is whole); {} {} in every part.</p>",
                n + 1,
                parts.len(),
                esc(&repeated.join(", ")),
                if keys == 1 { "repeats" } else { "repeat" }
            );
        }
        table_part(out, t, part, wide);
    }
    if parts.len() > 1 {
        out.push_str("</div>");
    }
}

/// The columns `part` of `t` as one `<table>` in a scrolling block.
fn table_part(out: &mut String, t: &Table, part: &[usize], wide: bool) {
    let _ = write!(
        out,
        "<div class=\"scroll\"><table{}><thead><tr>",
        if wide { " class=\"wide\"" } else { "" }
    );
    for &c in part {
        let _ = write!(out, "<th>{}</th>", esc(&t.header[c]));
    }
    out.push_str("</tr></thead><tbody>");
    for r in &t.rows {
        out.push_str("<tr>");
        for &i in part {
            let cell = r.get(i).map_or("", String::as_str);
            let swatch = if i == 0 {
                cell.strip_prefix("cluster ").and_then(|k| k.parse::<usize>().ok())
            } else {
                None
            };
            match swatch {
                Some(k) => {
                    let _ = write!(
                        out,
                        "<td><span class=\"sw\" style=\"background:{}\"></span>{}</td>",
                        cluster_colour(k),
                        esc(cell)
                    );
                }
                None => {
                    let _ = write!(out, "<td>{}</td>", esc(cell));
                }
            }
        }
        out.push_str("</tr>");
    }
    out.push_str("</tbody></table></div>");
}

/// The text styles of the charts (font, title and tick sizes): part of the page's
/// stylesheet, and written into each file of `figures/`.
macro_rules! chart_text_css {
    () => {
        "svg{font-family:system-ui,-apple-system,'Segoe UI',sans-serif}svg text.ct{font-size:14px;font-weight:600}svg text.tk{font-size:11px}"
    };
}

/// The chart text styles, as [`crate::render::figures`] writes them into each figure.
pub const CHART_TEXT_CSS: &str = chart_text_css!();

const CSS: &str = concat!("body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#111;line-height:1.45}\
h1{font-size:1.6em}h2{font-size:1.25em;margin-top:2em;border-bottom:1px solid #ccc}\
table{border-collapse:collapse;font-size:.85em;margin:.5em 0 1.5em}th,td{border:1px solid #bbb;padding:3px 6px;text-align:left;vertical-align:top}\
th{background:#ececec}.tile{display:inline-block;vertical-align:top;width:310px;margin:0 10px 10px 0;border:1px solid #bbb;border-top:8px solid #888;padding:.3em .8em;break-inside:avoid}.tile h3{margin:.3em 0;font-size:1.05em}.tile p{margin:.3em 0}.tile table{font-size:.8em;margin:.3em 0}.tile td{border:none;border-bottom:1px solid #ededed;padding:1px 4px}table.wide{font-size:.74em}table.wide th,table.wide td{padding:2px 4px}.scroll{overflow-x:auto}.note{font-size:.85em;color:#444}\
.whole{display:none}.caution{border:2px solid #D55E00;padding:.6em 1em;background:#fff8f2}\
.sw{display:inline-block;width:.8em;height:.8em;margin-right:.35em;border:1px solid #000;vertical-align:middle}\
svg.chart{width:100%;max-width:680px;height:auto;display:block;margin:.5em 0}\
svg.small{width:300px;height:auto;display:inline-block;margin:.3em}svg.dots{max-width:100%;height:auto;display:inline-block;margin:.3em;vertical-align:top}\
svg.split{max-width:100%;height:auto;display:block;margin:.5em 0}svg.grid{max-width:100%;height:auto;display:inline-block;margin:.3em;vertical-align:top}\
", chart_text_css!(), "\
p.cap{font-weight:600;font-size:.9em;margin:1em 0 0}.curves svg.chart{max-width:520px;display:inline-block}\
@media print{body{max-width:none}.whole{display:block}.parts{display:none}h2{page-break-after:avoid}svg{page-break-inside:avoid}\
.scroll{overflow:visible}table{font-size:6.5pt;width:100%}th,td{padding:1px 3px;overflow-wrap:break-word}}\
@page{size:A4 landscape;margin:10mm}");

/// `report.html`: one self-contained page (inline CSS and SVG, no scripts, nothing fetched).
pub fn html(results: &Results, c: &Comparison) -> String {
    let mut s = String::new();
    html_head(&mut s, results, c);
    let all = tables(c);
    let find = |id: TableId| all.iter().find(|t| t.id == id);
    html_model_choice(&mut s, c, &find);
    html_clusters(&mut s, c, &find);
    html_effects(&mut s, c, &find);
    html_agreement(&mut s, results, c, &all);
    s
}

/// A table of the comparison, if it has it.
type Find<'a> = dyn Fn(TableId) -> Option<&'a Table> + 'a;

/// The page's head, title, cautions and findings.
fn html_head(s: &mut String, results: &Results, c: &Comparison) {
    let title = esc(&results.study.title);
    let _ = write!(s, "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{title}</title><style>{CSS}</style></head><body>");
    let _ = write!(s, "<h1>{title}</h1><p>Placement comparison by cohortmix {}. Reference placement: <b>{}</b>. Data: {} ({} rows used of {}).</p>", esc(results.program.version), esc(&c.reference), esc(&results.study.data_file), results.study.rows_used, results.study.rows_read);
    s.push_str("<div class=\"caution\"><b>Cautions.</b><ul>");
    for caution in cautions(results) {
        let _ = write!(s, "<li>{}</li>", esc(caution));
    }
    for w in &results.study.data_warnings {
        let _ = write!(s, "<li><b>Data:</b> {}</li>", esc(w));
    }
    s.push_str("</ul></div>");
    s.push_str(&cluster_cards(c));
    s.push_str("<h2>What changes between placements</h2><ul>");
    for sentence in c.findings.iter().map(|f| words::sentence(f, &c.cluster_names)) {
        let _ = write!(
            s,
            "<li>{} <span class=\"note\">(see {})</span></li>",
            esc(&sentence.text),
            esc(&sentence.source)
        );
    }
    s.push_str("</ul>");
}

/// One card of the reference placement's compared fit: a cluster in a few lines, its
/// numbers those of Table 1 and the criteria table.
#[derive(Debug, Clone, PartialEq)]
pub struct ClusterCard {
    /// Aligned cluster number.
    pub cluster: usize,
    /// "cluster k (name)".
    pub title: String,
    /// The Table 1 "rows" cell: weighted count (share).
    pub size: String,
    /// Mean top posterior of its members (criteria table), two decimals.
    pub certainty: Option<String>,
    /// What sets it apart: the indicators on which it is the highest or lowest cluster.
    pub stands_out: Vec<String>,
    /// Every other Table 1 line: (label, cell), indicators first.
    pub lines: Vec<(String, String)>,
}

/// The cards of the reference placement's compared fit, from `c.table_one`.
pub fn cards(c: &Comparison) -> Vec<ClusterCard> {
    use crate::compare::table_one::ROWS;
    use crate::render::tables::{table_one_cell, table_one_label};
    let cells: Vec<_> = c.table_one.iter().filter(|t| t.placement == c.reference).collect();
    let mut clusters: Vec<usize> = cells.iter().map(|t| t.cluster).collect();
    clusters.sort_unstable();
    clusters.dedup();
    let chosen = c.criteria.iter().find(|r| r.placement == c.reference && r.chosen);
    // Table 1's line of a profile column: a continuous indicator's own line (a count's
    // profile column adds " (rate)"; Table 1 gives its mean count), an item level's
    // "item: level" line.
    let shows = |t: &crate::compare::table_one::TableOneCell, ind: &str| match &t.level {
        None => t.variable == ind || format!("{} (rate)", t.variable) == ind,
        Some(level) => format!("{}: {level}", t.variable) == ind,
    };
    // The cluster's value on that line (a mean, or the share of an item level) and how the
    // card words it.
    let value_of = |k: usize, ind: &str| {
        cells
            .iter()
            .find(|t| t.cluster == k && shows(t, ind))
            .and_then(|t| match &t.level {
                None => t.weighted.mean.map(|v| (v, t.variable.clone())),
                Some(_) => t
                    .weighted
                    .share
                    .map(|v| (v, format!("share with {}", table_one_label(t)))),
            })
    };
    clusters
        .iter()
        .map(|&k| {
            let own: Vec<_> = cells.iter().filter(|t| t.cluster == k).collect();
            let size = own
                .iter()
                .find(|t| t.variable == ROWS)
                .map_or_else(|| "–".to_string(), |t| table_one_cell(&t.weighted));
            let mut stands_out = Vec::new();
            if clusters.len() > 1 {
                for ind in &c.indicators {
                    let values: Vec<(usize, f64)> = clusters
                        .iter()
                        .filter_map(|&j| value_of(j, ind).map(|(v, _)| (j, v)))
                        .collect();
                    let Some((mine, words)) = value_of(k, ind) else {
                        continue;
                    };
                    if values.iter().all(|(j, v)| *j == k || *v < mine) {
                        stands_out.push(format!("highest {words}"));
                    } else if values.iter().all(|(j, v)| *j == k || *v > mine) {
                        stands_out.push(format!("lowest {words}"));
                    }
                }
            }
            let is_indicator = |t: &crate::compare::table_one::TableOneCell| {
                c.indicators.iter().any(|ind| shows(t, ind))
                    || (t.level.is_some()
                        && c.indicators
                            .iter()
                            .any(|ind| ind.starts_with(&format!("{}: ", t.variable))))
            };
            let lines = own
                .iter()
                .filter(|t| is_indicator(t))
                .chain(own.iter().filter(|t| t.variable != ROWS && !is_indicator(t)))
                .map(|t| (table_one_label(t), table_one_cell(&t.weighted)))
                .collect();
            ClusterCard {
                cluster: k,
                title: crate::render::name_clusters(&format!("cluster {k}"), &c.cluster_names),
                size,
                certainty: chosen
                    .and_then(|r| r.average_posterior.iter().find(|v| v.cluster == k))
                    .map(|v| format!("{:.2}", v.value)),
                stands_out,
                lines,
            }
        })
        .collect()
}

/// The page's first view: the reference placement's clusters as cards.
fn cluster_cards(c: &Comparison) -> String {
    let cards = cards(c);
    if cards.is_empty() {
        return String::new();
    }
    let mut s = String::new();
    let _ = write!(
        s,
        "<h2>At a glance: the clusters of '{}'</h2><p class=\"note\">The reference placement's compared fit, one card per cluster. Size and every line below it are Table 1's (posterior-weighted: mean (SD), or count (%)); certainty is the mean top posterior of the rows assigned to the cluster (1 = every member clearly belongs). A summary of a model, not a diagnosis.</p><div class=\"tiles\">",
        esc(&c.reference)
    );
    for card in &cards {
        let _ = write!(
            s,
            "<div class=\"tile\" style=\"border-top-color:{}\"><h3>{}</h3><p><b>{}</b> of the cohort",
            cluster_colour(card.cluster),
            esc(&card.title),
            esc(&card.size)
        );
        if let Some(certainty) = &card.certainty {
            let _ = write!(s, " · certainty {}", esc(certainty));
        }
        s.push_str("</p>");
        if !card.stands_out.is_empty() {
            let _ = write!(s, "<p>{}</p>", esc(&capitalise(&card.stands_out.join(", "))));
        }
        s.push_str("<table><tbody>");
        for (label, cell) in &card.lines {
            let _ = write!(s, "<tr><td>{}</td><td>{}</td></tr>", esc(label), esc(cell));
        }
        s.push_str("</tbody></table></div>");
    }
    s.push_str("</div>");
    s
}

/// Model choice: the cluster-count chart, the split diagram, the criteria and the bootstrap count test.
fn html_model_choice(s: &mut String, c: &Comparison, find: &Find) {
    s.push_str("<h2>Model choice</h2>");
    s.push_str(&count_chart(c));
    s.push_str(&split_chart(c));
    if let Some(t) = find(TableId::Criteria) {
        html_table(s, t);
    }

    if let Some(t) = find(TableId::ClusterCountTests) {
        s.push_str("<h3>Bootstrap test of the cluster count</h3>");
        html_table(s, t);
    }
}

/// The clusters: alignment, sizes and profiles.
fn html_clusters(s: &mut String, c: &Comparison, find: &Find) {
    s.push_str("<h2>Clusters aligned across placements</h2>");
    if let Some(t) = find(TableId::Alignment) {
        html_table(s, t);
    }
    s.push_str("<h2>Cluster sizes</h2>");
    let rows: Vec<(String, Vec<(usize, f64)>)> = c
        .alignments
        .iter()
        .map(|a| {
            (
                a.placement.clone(),
                c.profiles
                    .iter()
                    .filter(|p| p.placement == a.placement)
                    .map(|p| (p.cluster, p.share))
                    .collect(),
            )
        })
        .collect();
    s.push_str(&svg::stacked_shares(
        "Cluster shares per placement (segment label: aligned cluster · share)",
        &rows,
    ));
    if let Some(t) = find(TableId::ClusterSizes) {
        html_table(s, t);
    }

    s.push_str("<h2>Profiles</h2>");
    s.push_str(&profile_grid(c));
    if let Some(t) = find(TableId::Profiles) {
        html_table(s, t);
    }
    let ones: Vec<&Table> = c
        .alignments
        .iter()
        .filter_map(|a| {
            find(TableId::TableOne {
                placement: a.placement.clone(),
            })
        })
        .collect();
    if !ones.is_empty() {
        s.push_str("<h2>Table 1: who is in each cluster</h2>");
        for t in ones {
            let _ = write!(s, "<p class=\"cap\">{}</p>", esc(&capitalise(&t.name())));
            html_table(s, t);
        }
    }
}

/// Effects: gating effects with their curves and tests, three-step estimates, the screen,
/// component effects and how standard errors were obtained.
fn html_effects(s: &mut String, c: &Comparison, find: &Find) {
    if let Some(t) = find(TableId::GatingEffects) {
        s.push_str("<h2>Gating effects</h2>");
        html_table(s, t);
        s.push_str("<div class=\"curves\">");
        for curve in &c.effect_curves {
            let series: Vec<Series> = curve
                .clusters
                .iter()
                .zip(&curve.probabilities)
                .enumerate()
                .map(|(i, (k, pr))| Series {
                    name: crate::render::name_clusters(&format!("cluster {k}"), &c.cluster_names),
                    points: curve.x.iter().copied().zip(pr.iter().copied()).collect(),
                    colour: cluster_colour(*k).to_string(),
                    style: i,
                })
                .collect();
            let level = curve
                .level
                .as_ref()
                .map_or_else(String::new, |(v, l)| format!(", {v} = {l}"));
            let title = format!(
                "'{}': membership probability by {}{level} (other covariates at reference)",
                curve.placement, curve.covariate
            );
            s.push_str(&svg::line_chart(
                &title,
                &curve.covariate,
                "probability",
                &series,
                false,
            ));
        }
    }

    if let Some(t) = find(TableId::GatingTests) {
        s.push_str("<h3>Joint tests of gating covariates</h3>");
        html_table(s, t);
    }
    if let Some(t) = find(TableId::ThreeStep) {
        s.push_str("<h3>Three-step estimates</h3>");
        html_table(s, t);
    }
    if let Some(t) = find(TableId::Outcomes) {
        s.push_str("<h2>Distal outcomes by cluster</h2>");
        html_table(s, t);
    }
    if let Some(t) = find(TableId::DirectEffects) {
        s.push_str("<h2>Direct effects left out</h2>");
        html_table(s, t);
    }
    if let Some(t) = find(TableId::ComponentEffects) {
        s.push_str("<h2>Covariate effects inside clusters</h2>");
        html_table(s, t);
    }
    if !c.inference_notes.is_empty() {
        let _ = write!(s, "<p class=\"note\">Standard errors: {}</p>", esc(&notes(c).join(" ")));
    }
}

/// Agreement between placements, certainty, the checklist and the page's end.
fn html_agreement(s: &mut String, results: &Results, c: &Comparison, all: &[Table]) {
    s.push_str("<h2>Agreement between placements</h2>");
    if c.alignments.len() > crate::compare::ALL_PAIRS_UP_TO {
        let _ = write!(
            s,
            "<p class=\"note\">With more than {} placements, each is cross-tabulated against the reference only.</p>",
            crate::compare::ALL_PAIRS_UP_TO
        );
    }
    for t in &c.cross_tables {
        s.push_str(&svg::shaded_grid(
            &format!("'{}' × '{}'", t.rows, t.columns),
            &t.rows,
            &t.columns,
            &t.row_clusters,
            &t.column_clusters,
            &t.counts,
        ));
    }
    for t in all.iter().filter(|t| matches!(t.id, TableId::CrossTable { .. })) {
        let _ = write!(s, "<h3>{}</h3>", esc(&t.name()));
        html_table(s, t);
    }

    s.push_str("<h2>Posterior certainty</h2><p class=\"note\">Weighted count of rows by their largest posterior probability; mass near 1 means crisp membership.</p>");
    for (placement, bins) in &c.certainty {
        s.push_str(&svg::histogram(placement, bins));
    }

    s.push_str("<h2>Reporting checklist</h2><table><tbody>");
    for (k, v) in checklist(results, c) {
        let _ = write!(s, "<tr><th>{}</th><td>{}</td></tr>", esc(&k), esc(&v));
    }
    s.push_str("</tbody></table>");
    let _ = writeln!(
        s,
        "<p class=\"note\">Spec: {}. BIC = −2 loglik + parameters × ln(rows); smaller is better.</p></body></html>",
        esc(&results.study.spec_file)
    );
}

/// The split diagram of the reference placement, when it was fitted at two or more
/// consecutive counts.
fn split_chart(c: &Comparison) -> String {
    if c.splits.is_empty() {
        return String::new();
    }
    let mut columns: Vec<svg::SplitColumn> = Vec::new();
    let mut flows = Vec::new();
    for (i, step) in c.splits.iter().enumerate() {
        if i > 0 && c.splits[i - 1].to != step.from {
            break; // a gap in the counts: draw the run that starts at the smallest
        }
        if i == 0 {
            columns.push((
                step.from,
                step.from_clusters
                    .iter()
                    .zip(&step.counts)
                    .map(|(k, row)| (*k, row.iter().sum()))
                    .collect(),
            ));
        }
        columns.push((
            step.to,
            step.to_clusters
                .iter()
                .enumerate()
                .map(|(b, k)| (*k, step.counts.iter().map(|row| row[b]).sum()))
                .collect(),
        ));
        flows.push(step.counts.clone());
    }
    let chosen = c
        .criteria
        .iter()
        .find(|r| r.placement == c.reference && r.chosen)
        .map_or(0, |r| r.clusters);
    let mut s = svg::split_diagram(
        &format!("How the clusters of '{}' split as the count grows", c.reference),
        &columns,
        &flows,
        chosen,
    );
    s.push_str("<p class=\"note\">Each column is the best fit with that many clusters (the compared fit's covariance structure); bars are clusters, labelled by number and share of the rows by most likely cluster, and bands carry the rows from one count to the next (bands under 2% of the rows left out). Read the compared count beside its neighbours: a cluster that splits cleanly in two is a finer view of the same group; one built from pieces of several is a different grouping.</p>");
    s
}

/// The approximate probability of each cluster count, per placement
/// ([`Comparison::count_probabilities`]).
fn count_chart(c: &Comparison) -> String {
    let mut counts: Vec<usize> = c.count_probabilities.iter().map(|r| r.clusters).collect();
    counts.sort_unstable();
    counts.dedup();
    let rows: Vec<svg::CountRow> = c
        .alignments
        .iter()
        .map(|a| {
            let mine = || c.count_probabilities.iter().filter(|r| r.placement == a.placement);
            let probabilities = counts
                .iter()
                .map(|g| mine().find(|r| r.clusters == *g).map(|r| r.probability))
                .collect();
            let chosen = mine().find(|r| r.chosen).map_or(0, |r| r.clusters);
            (a.placement.clone(), probabilities, chosen)
        })
        .collect();
    if counts.len() < 2 {
        return String::new();
    }
    let mut s = svg::count_probabilities(
        "How sure BIC is of the number of clusters, per placement (approximate probability)",
        &counts,
        &rows,
    );
    s.push_str("<p class=\"note\">Each bar is exp(−ΔBIC/2) normalised over the placement's fits, summed over the covariance structures fitted at that count: the BIC weights of the criteria table. It is a large-sample approximation that takes one of the fitted models to be true; with thousands of rows it piles onto one count even when the neighbouring counts describe the data nearly as well, so read it beside the split diagram and the findings on the criteria. BIC values themselves are in the criteria table.</p>");
    s
}

fn profile_grid(c: &Comparison) -> String {
    let intervals = c
        .profiles
        .iter()
        .any(|p| p.at_reference_interval.iter().any(Option::is_some));
    let mut s = format!(
        "<p class=\"note\">Each cluster's profile at the reference covariate values ({}){}; marker shape = placement: ",
        esc(c
            .reference_values
            .trim_start_matches("profiles at the reference covariate values: ")),
        if intervals {
            ", with its 95% interval as a line (delta method; on the logit scale for probabilities and the log scale for rates)"
        } else {
            ""
        }
    );
    for (i, a) in c.alignments.iter().enumerate() {
        let _ = write!(
            s,
            "<svg width=\"14\" height=\"14\" viewBox=\"0 0 14 14\">{}</svg> {} ",
            svg::marker(i, 7.0, 7.0, "#777"),
            esc(&a.placement)
        );
    }
    s.truncate(s.trim_end().len());
    s.push_str(". Where a placement adjusts the profiles for covariates, the values at the reference differ from the averaged ones in the table below.</p>");
    let mut clusters: Vec<usize> = c.profiles.iter().map(|p| p.cluster).collect();
    clusters.sort_unstable();
    clusters.dedup();
    for (j, ind) in c.indicators.iter().enumerate() {
        let interval =
            |p: &crate::compare::Profile| p.at_reference_interval.get(j).copied().flatten().map(|[a, b]| (a, b));
        let mut lo = f64::INFINITY;
        let mut hi = f64::NEG_INFINITY;
        for p in &c.profiles {
            let (a, b) = interval(p).unwrap_or((p.at_reference[j], p.at_reference[j]));
            lo = lo.min(a.min(p.at_reference[j]));
            hi = hi.max(b.max(p.at_reference[j]));
        }
        let pad = 0.05 * (hi - lo).max(1e-9);
        let rows: Vec<svg::DotRow> = clusters
            .iter()
            .map(|k| {
                let marks = c
                    .alignments
                    .iter()
                    .enumerate()
                    .filter_map(|(i, a)| {
                        c.profiles
                            .iter()
                            .find(|p| p.cluster == *k && p.placement == a.placement)
                            .map(|p| (i, p.at_reference[j], interval(p)))
                    })
                    .collect();
                (
                    crate::render::name_clusters(&format!("cluster {k}"), &c.cluster_names),
                    cluster_colour(*k),
                    marks,
                )
            })
            .collect();
        s.push_str(&svg::dot_rows(ind, &rows, lo - pad, hi + pad));
    }
    s
}

/// The two-stage search in words, when it is on (empty otherwise).
fn two_stages(s: &crate::pipeline::output::StudySummary) -> String {
    if crate::spec::two_stages(s.starts, s.finish_best, s.warmup_iterations, s.max_iterations) {
        format!(
            "; two-stage search: after {} iterations only the {} best starts still running went on and the others were set aside, so \"starts at best\" counts the starts that finished",
            s.warmup_iterations, s.finish_best
        )
    } else {
        String::new()
    }
}

/// The notes on standard errors, in words.
fn notes(c: &Comparison) -> Vec<String> {
    c.inference_notes.iter().map(words::inference_note).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table(header: &[&str], cell: &str) -> Table {
        Table {
            id: TableId::Criteria,
            note: String::new(),
            header: header.iter().map(|h| h.to_string()).collect(),
            rows: vec![header.iter().map(|_| cell.to_string()).collect(); 3],
        }
    }

    #[test]
    fn a_narrow_table_stays_whole() {
        let t = table(&["placement", "clusters", "BIC"], "12345.678");
        assert_eq!(column_parts(&t, 8.2), vec![vec![0, 1, 2]]);
    }

    #[test]
    fn a_wide_table_splits_into_even_parts_that_repeat_its_key_columns() {
        let header: Vec<String> = ["placement", "clusters", "covariance"]
            .iter()
            .map(|h| h.to_string())
            .chain((0..12).map(|i| format!("criterion{i}")))
            .collect();
        let names: Vec<&str> = header.iter().map(String::as_str).collect();
        let t = table(&names, "-58862.220");
        let parts = column_parts(&t, 7.1);
        assert!(parts.len() >= 2, "{parts:?}");
        let mut seen: Vec<usize> = Vec::new();
        for part in &parts {
            assert_eq!(&part[..3], &[0, 1, 2], "{parts:?}");
            assert!(part.len() >= 5, "a part with too few columns: {parts:?}");
            seen.extend(&part[3..]);
        }
        assert_eq!(seen, (3..15).collect::<Vec<usize>>());
        // The widest part fits the budget at its narrowest.
        for part in &parts {
            let width: f64 = part
                .iter()
                .map(|c| {
                    let swatch = if *c == 0 { 1.2 * 7.1 / 0.55 } else { 0.0 };
                    header[*c].len().max(10) as f64 * 7.1 + 12.0 + swatch
                })
                .sum();
            assert!(width <= TABLE_BUDGET_PX + 1e-9, "{width}");
        }
    }
}
