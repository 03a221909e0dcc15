//! Aligning each placement's chosen clusters with the reference's (the Hungarian method
//! on summed posterior agreement), and the cross-tables of most likely aligned clusters.

use super::{assign, Alignment, CrossTable};
use crate::fit::FitResult;
use crate::numerics::most_likely;

/// A placement's chosen fit with its aligned cluster numbers.
pub struct Labelled {
    /// Placement index.
    pub placement: usize,
    /// Index of its chosen fit.
    pub fit: usize,
    /// For each fitted cluster, its aligned number.
    pub aligned: Vec<usize>,
}

/// Align every placement's chosen fit (in `order`, the reference first) with the
/// reference placement's: the cross-table of summed posteriors C[a][b] = Σ_i c_i
/// τ_ref(i, a) τ(i, b) goes through the Hungarian method; clusters without a counterpart
/// get numbers after the reference's.
pub fn align(
    fits: &[FitResult],
    chosen: &[Option<usize>],
    order: &[usize],
    reference: usize,
    weights: &[f64],
) -> (Vec<Alignment>, Vec<Labelled>) {
    let reference_fit = chosen[reference];
    let mut next_new = reference_fit.map_or(1, |i| fits[i].clusters + 1);
    let mut alignments = Vec::new();
    let mut labelled = Vec::new();
    for &p in order {
        let Some(fi) = chosen[p] else { continue };
        let f = &fits[fi];
        if f.best.is_none() {
            continue;
        }
        let (aligned, overlap) = match reference_fit.filter(|r| *r != fi && fits[*r].best.is_some()) {
            Some(r) => matched(&fits[r], f, weights, &mut next_new),
            None => ((1..=f.clusters).collect(), vec![Some(1.0); f.clusters]),
        };
        alignments.push(Alignment {
            placement: f.placement.clone(),
            clusters: f.clusters,
            covariance: f.covariance(),
            aligned: aligned.clone(),
            overlap,
        });
        labelled.push(Labelled {
            placement: p,
            fit: fi,
            aligned,
        });
    }
    (alignments, labelled)
}

/// The aligned number and overlap of each of `f`'s clusters against the reference fit.
fn matched(
    reference: &FitResult,
    f: &FitResult,
    weights: &[f64],
    next_new: &mut usize,
) -> (Vec<usize>, Vec<Option<f64>>) {
    let (rb, best) = (
        reference.best.as_ref().expect("a reference with a best start"),
        f.best.as_ref().expect("a fit with a best start"),
    );
    let (gr, g) = (reference.clusters, f.clusters);
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
                aligned.push(*next_new);
                *next_new += 1;
                overlap.push(None);
            }
        }
    }
    (aligned, overlap)
}

/// Cross-tables of most-likely aligned clusters: the reference against each other
/// placement, then every other pair.
pub fn cross_tables(fits: &[FitResult], labelled: &[Labelled]) -> Vec<CrossTable> {
    let maps: Vec<(String, Vec<usize>)> = labelled
        .iter()
        .map(|l| {
            let f = &fits[l.fit];
            let g = f.clusters;
            let tau = &f.best.as_ref().expect("best").run.tau;
            (
                f.placement.clone(),
                tau.chunks_exact(g).map(|row| l.aligned[most_likely(row)]).collect(),
            )
        })
        .collect();
    let mut out = Vec::new();
    for i in 0..maps.len() {
        for j in (i + 1)..maps.len() {
            out.push(cross_table(&maps[i], &maps[j]));
        }
    }
    out
}

/// The cross-table of two placements' most likely aligned clusters.
fn cross_table(a: &(String, Vec<usize>), b: &(String, Vec<usize>)) -> CrossTable {
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
    CrossTable {
        rows: a.0.clone(),
        columns: b.0.clone(),
        row_clusters: rows,
        column_clusters: cols,
        counts,
        adjusted_rand_index: ari,
        agreement,
    }
}
