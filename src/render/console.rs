//! What the terminal shows: a line per finished fit, the criteria table and the
//! findings.

use super::words;
use crate::fit::FitResult;
use crate::pipeline::output::Results;
use std::fmt::Write as _;

fn plural(n: usize) -> &'static str {
    if n == 1 {
        ""
    } else {
        "s"
    }
}

/// A finished fit in one line.
pub fn progress_line(r: &FitResult) -> String {
    let t = r.termination();
    let finished = r.finished_starts();
    let spurious = r.starts.iter().filter(|s| s.termination.word() == "spurious").count();
    let set_apart = if spurious > 0 {
        format!(" ({spurious} spurious, set apart)")
    } else {
        String::new()
    };
    match r.loglik() {
        Some(l) => format!(
            "'{}', {} cluster{}: loglik {:.3}, {} of {} {}starts reached the best{set_apart}, {}",
            r.placement,
            r.clusters,
            plural(r.clusters),
            l,
            r.best.as_ref().map_or(0, |b| b.reaching),
            finished,
            if finished < r.starts.len() { "finished " } else { "" },
            t.word()
        ),
        None => format!(
            "'{}', {} clusters: no usable start ({})",
            r.placement,
            r.clusters,
            t.reason().unwrap_or("")
        ),
    }
}

/// The criteria of every fit as a fixed-width table, the chosen fit of each placement
/// marked; then the comparison's findings, when there is one.
pub fn summary(results: &Results) -> String {
    let mut out = String::new();
    let several = results.study.covariance_structures.len() > 1;
    let structure_header = if several {
        format!(" {:<52}", "covariance")
    } else {
        String::new()
    };
    out.push_str("BIC = -2 loglik + parameters x ln(rows); smaller is better\n");
    let _ = writeln!(
        out,
        "{:<36} {:>3}{structure_header} {:>14} {:>6} {:>14} {:>9}  status",
        "placement", "G", "loglik", "params", "BIC", "best/all"
    );
    for f in &results.fits {
        let chosen = results
            .chosen
            .iter()
            .any(|c| c.placement == f.placement && c.clusters == f.clusters && c.covariance == f.covariance);
        let structure = if several {
            format!(" {:<52}", f.covariance)
        } else {
            String::new()
        };
        let _ = writeln!(
            out,
            "{:<36} {:>3}{structure} {:>14} {:>6} {:>14} {:>9}  {}{}",
            super::svg::truncate(&f.placement, 36),
            f.clusters,
            f.loglik.map_or("-".into(), |v| format!("{v:.3}")),
            f.parameters,
            f.bic.map_or("-".into(), |v| format!("{v:.3}")),
            format!("{}/{}", f.starts.reaching_best, f.starts.total),
            f.status,
            if chosen { "  <- lowest BIC" } else { "" }
        );
    }
    if let Some(c) = &results.comparison {
        out.push_str("What changes between placements:\n");
        for sentence in c.findings.iter().map(|f| words::sentence(f, &c.cluster_names)) {
            let _ = writeln!(out, "  - {}", sentence.text);
        }
    }
    out
}
