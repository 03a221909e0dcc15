//! CSV outputs: `models.csv` (one row per fit) and the memberships layout that
//! `memberships.csv` and `predict` write. Written with the `csv` crate, which quotes a
//! field that holds a comma, a quote or a line break.

use crate::data::RowIds;
use crate::fit::FitResult;
use crate::pipeline::output::Results;
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

/// A text cell from the spec or the data, made safe to open in a spreadsheet: a cell that
/// starts with `=`, `+`, `-`, `@`, a tab or a carriage return would be read as a formula,
/// so it gets a leading `'` (the common spreadsheet-safety advice for CSV exports). A cell
/// that reads as a number (`-1.5`, `+3`) is left alone, so numeric ids stay numbers.
pub fn safe_text(s: &str) -> std::borrow::Cow<'_, str> {
    let risky = s.starts_with(['=', '+', '-', '@', '\t', '\r']);
    if risky && s.trim().parse::<f64>().is_err() {
        std::borrow::Cow::Owned(format!("'{s}"))
    } else {
        std::borrow::Cow::Borrowed(s)
    }
}

/// `table1.csv`: every Table 1 summary, both conventions, one row per placement, cluster,
/// variable and level (numbers in full precision; empty where a summary does not apply).
pub fn table_one_csv(c: &crate::compare::Comparison) -> String {
    let mut w = writer(Vec::new());
    let header = [
        "placement",
        "cluster",
        "cluster_name",
        "variable",
        "level",
        "weighted_n",
        "weighted_mean",
        "weighted_sd",
        "weighted_share",
        "most_likely_n",
        "most_likely_mean",
        "most_likely_sd",
        "most_likely_share",
    ];
    w.write_record(header).expect("writing to memory");
    for t in &c.table_one {
        let mut row = vec![
            t.placement.clone(),
            t.cluster.to_string(),
            c.cluster_names.get(&t.cluster).cloned().unwrap_or_default(),
            t.variable.clone(),
            t.level.clone().unwrap_or_default(),
        ];
        for s in [&t.weighted, &t.most_likely] {
            row.extend([num(Some(s.n)), num(s.mean), num(s.sd), num(s.share)]);
        }
        w.write_record(&row).expect("writing to memory");
    }
    String::from_utf8(w.into_inner().expect("writing to memory")).expect("UTF-8 in, UTF-8 out")
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
        "sabic",
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
            .map(|v| v.iter().map(|s| s.share).fold(f64::INFINITY, f64::min));
        let row = [
            safe_text(&f.placement).into_owned(),
            f.clusters.to_string(),
            f.covariance.clone(),
            f.status.clone(),
            num(f.loglik),
            f.parameters.to_string(),
            f.rows.to_string(),
            num(f.bic),
            num(f.aic),
            num(f.sabic),
            f.iterations.map_or_else(String::new, |i| i.to_string()),
            f.starts.total.to_string(),
            f.starts.usable.to_string(),
            f.starts.reaching_best.to_string(),
            num(smallest),
            safe_text(f.reason.as_deref().unwrap_or_default()).into_owned(),
        ];
        w.write_record(&row).expect("writing to memory does not fail");
    }
    String::from_utf8(w.into_inner().expect("a flushed buffer")).expect("the table is text")
}

/// One placement's memberships: its name, the number of each fitted cluster in the run's
/// files, and the posteriors (n×G, in fitted order).
#[derive(Debug, Clone, Copy)]
pub struct MembershipSet<'a> {
    /// Placement.
    pub placement: &'a str,
    /// The number of fitted cluster k (1-based) at `numbers[k - 1]`.
    pub numbers: &'a [usize],
    /// Posteriors, n×G row-major, in fitted order.
    pub tau: &'a [f64],
}

/// The memberships of the fits `reported` (indices into `fits`), numbered by `numbers`.
pub fn reported_memberships<'a>(
    fits: &'a [FitResult],
    reported: &[usize],
    numbers: &'a [Vec<usize>],
) -> Vec<MembershipSet<'a>> {
    reported
        .iter()
        .filter_map(|&i| {
            let f = &fits[i];
            let best = f.best.as_ref()?;
            Some(MembershipSet {
                placement: f.placement.as_str(),
                numbers: &numbers[i],
                tau: best.run.tau.as_slice(),
            })
        })
        .collect()
}

/// Memberships as CSV, written to `out` row by row (at ten million rows the text would
/// take more memory than the fit): per set and row, the row id, its most likely cluster by
/// number (`most_likely`) and as fitted (`most_likely_as_fitted`), and the posterior of
/// every cluster number any set uses (`posterior_<number>`, 6 decimals; empty where the
/// set has no cluster of that number), one block of rows per placement.
pub fn write_memberships(out: &mut dyn Write, ids: &RowIds, sets: &[MembershipSet]) -> std::io::Result<()> {
    let mut columns: Vec<usize> = sets.iter().flat_map(|s| s.numbers.iter().copied()).collect();
    columns.sort_unstable();
    columns.dedup();
    let mut w = writer(std::io::BufWriter::with_capacity(1 << 16, out));
    let mut header: Vec<String> = ["placement", "clusters", "id", "most_likely", "most_likely_as_fitted"]
        .map(String::from)
        .to_vec();
    header.extend(columns.iter().map(|k| format!("posterior_{k}")));
    w.write_record(&header).map_err(io)?;
    let mut field = String::new();
    let mut cells = vec![String::new(); columns.len()];
    for set in sets {
        let g = set.numbers.len();
        let g_text = g.to_string();
        // Column of each fitted cluster.
        let at: Vec<usize> = set
            .numbers
            .iter()
            .map(|n| columns.binary_search(n).expect("every number has a column"))
            .collect();
        for (id, row) in ids.iter().zip(set.tau.chunks_exact(g)) {
            let most = crate::numerics::most_likely(row);
            w.write_field(safe_text(set.placement).as_ref()).map_err(io)?;
            w.write_field(&g_text).map_err(io)?;
            w.write_field(safe_text(id).as_ref()).map_err(io)?;
            w.write_field(set.numbers[most].to_string()).map_err(io)?;
            w.write_field((most + 1).to_string()).map_err(io)?;
            cells.iter_mut().for_each(String::clear);
            for (t, c) in row.iter().zip(&at) {
                field.clear();
                let _ = write!(field, "{t:.6}");
                cells[*c].push_str(&field);
            }
            for c in &cells {
                w.write_field(c).map_err(io)?;
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
