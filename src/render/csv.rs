//! CSV outputs: `models.csv` (one row per fit) and the memberships layout that
//! `memberships.csv` and `predict` write. Written with the `csv` crate, which quotes a
//! field that holds a comma, a quote or a line break.

use crate::data::RowIds;
use crate::fit::FitResult;
use crate::pipeline::output::{Chosen, Results};
use std::fmt::Write as _;
use std::io::Write;

/// A float for tables: the shortest text that reads back to the same value.
fn num(x: Option<f64>) -> String {
    x.map_or_else(String::new, |v| format!("{v}"))
}

fn writer<W: Write>(out: W) -> ::csv::Writer<W> {
    ::csv::WriterBuilder::new().flexible(true).from_writer(out)
}

fn io(e: ::csv::Error) -> std::io::Error {
    match e.into_kind() {
        ::csv::ErrorKind::Io(e) => e,
        other => std::io::Error::other(format!("{other:?}")),
    }
}

/// `models.csv`: one row per fit.
pub fn models_csv(results: &Results) -> String {
    let mut w = writer(Vec::new());
    let header = [
        "placement",
        "clusters",
        "covariance",
        "status",
        "loglik",
        "parameters",
        "rows",
        "bic",
        "aic",
        "iterations",
        "starts",
        "usable_starts",
        "starts_reaching_best",
        "smallest_share",
        "reason",
    ];
    w.write_record(header).expect("writing to memory does not fail");
    for f in &results.fits {
        let smallest = f
            .shares
            .as_ref()
            .map(|v| v.iter().copied().fold(f64::INFINITY, f64::min));
        let row = [
            f.placement.clone(),
            f.clusters.to_string(),
            f.covariance.clone(),
            f.status.clone(),
            num(f.loglik),
            f.parameters.to_string(),
            f.rows.to_string(),
            num(f.bic),
            num(f.aic),
            f.iterations.map_or_else(String::new, |i| i.to_string()),
            f.starts.total.to_string(),
            f.starts.usable.to_string(),
            f.starts.reaching_best.to_string(),
            num(smallest),
            f.reason.clone().unwrap_or_default(),
        ];
        w.write_record(&row).expect("writing to memory does not fail");
    }
    String::from_utf8(w.into_inner().expect("a flushed buffer")).expect("the table is text")
}

/// One placement's memberships: its name, cluster count and posteriors (n×G).
pub type MembershipSet<'a> = (&'a str, usize, &'a [f64]);

/// The memberships of each placement's chosen fit (the fits `chosen` lists).
pub fn chosen_memberships<'a>(fits: &'a [FitResult], chosen: &[Chosen]) -> Vec<MembershipSet<'a>> {
    chosen
        .iter()
        .filter_map(|c| {
            let f = fits
                .iter()
                .find(|f| f.placement == c.placement && f.clusters == c.clusters && f.covariance() == c.covariance)?;
            let best = f.best.as_ref()?;
            Some((f.placement.as_str(), f.clusters, best.run.tau.as_slice()))
        })
        .collect()
}

/// Memberships as CSV, written to `out` row by row (at ten million rows the text would
/// take more memory than the fit): per set and row, the row id, its most likely cluster
/// and every posterior (6 decimals), one block of rows per placement.
pub fn write_memberships(out: &mut dyn Write, ids: &RowIds, sets: &[MembershipSet]) -> std::io::Result<()> {
    let kmax = sets.iter().map(|s| s.1).max().unwrap_or(1);
    let mut w = writer(std::io::BufWriter::with_capacity(1 << 16, out));
    let mut header: Vec<String> = ["placement", "clusters", "id", "most_likely"]
        .map(String::from)
        .to_vec();
    header.extend((1..=kmax).map(|k| format!("posterior_{k}")));
    w.write_record(&header).map_err(io)?;
    let mut field = String::new();
    for (placement, g, tau) in sets {
        let g_text = g.to_string();
        for (id, row) in ids.iter().zip(tau.chunks_exact(*g)) {
            let most = crate::numerics::most_likely(row);
            w.write_field(placement).map_err(io)?;
            w.write_field(&g_text).map_err(io)?;
            w.write_field(id).map_err(io)?;
            w.write_field((most + 1).to_string()).map_err(io)?;
            for t in row {
                field.clear();
                let _ = write!(field, "{t:.6}");
                w.write_field(&field).map_err(io)?;
            }
            for _ in *g..kmax {
                w.write_field("").map_err(io)?;
            }
            w.write_record(None::<&[u8]>).map_err(io)?;
        }
    }
    w.flush()
}

/// [`write_memberships`] into a string.
pub fn memberships_table(ids: &RowIds, sets: &[MembershipSet]) -> String {
    let mut out = Vec::new();
    write_memberships(&mut out, ids, sets).expect("writing to memory does not fail");
    String::from_utf8(out).expect("the table is text")
}
