//! Aligning each placement's chosen clusters with the reference's (the Hungarian method
//! on summed posterior agreement), the cluster numbers every file of a run uses, and the
//! cross-tables of most likely aligned clusters.

use super::{assign, Alignment, CrossTable};
use crate::fit::FitResult;
use crate::numerics::most_likely;

/// A placement's chosen fit with its aligned cluster numbers.
#[derive(Debug, Clone)]
pub struct Labelled {
    /// Placement index.
    pub placement: usize,
    /// Index of its chosen fit.
    pub fit: usize,
    /// For each fitted cluster, its aligned number.
    pub aligned: Vec<usize>,
}

/// The number each fitted cluster carries in every file of a run (the report, summary,
/// results, memberships, saved models and `predict`'s output).
///
/// In a comparison, a cluster's number is that of the reference placement's chosen
/// cluster it agrees with most ([`align`]); clusters without a counterpart get numbers
/// after the reference's. Every other fit of the grid is numbered against the reference's
/// chosen fit in the same way, its unmatched clusters numbered after every number the
/// compared fits use. Without a comparison (`fit`) clusters keep their fitted numbers,
/// largest first.
#[derive(Debug, Clone, Default)]
pub struct Numbering {
    /// Per fit, in grid order: the number of each fitted cluster (fitted cluster k, 1-based,
    /// is `numbers[fit][k - 1]`).
    pub numbers: Vec<Vec<usize>>,
    /// The compared fits' alignments, the reference first.
    pub alignments: Vec<Alignment>,
    /// The compared fits with their numbers, the reference first.
    pub labelled: Vec<Labelled>,
}

impl Numbering {
    /// Every cluster keeps its fitted number.
    pub fn as_fitted(fits: &[FitResult]) -> Numbering {
        Numbering {
            numbers: fits.iter().map(|f| (1..=f.clusters).collect()).collect(),
            ..Numbering::default()
        }
    }

    /// Number every fit's clusters against the reference placement's chosen fit
    /// (`chosen` per placement, `order` the reference first).
    pub fn aligned(
        fits: &[FitResult],
        chosen: &[Option<usize>],
        order: &[usize],
        reference: usize,
        weights: &[f64],
    ) -> Numbering {
        let (alignments, labelled) = align(fits, chosen, order, reference, weights);
        let mut numbers: Vec<Vec<usize>> = fits.iter().map(|f| (1..=f.clusters).collect()).collect();
        for l in &labelled {
            numbers[l.fit] = l.aligned.clone();
        }
        let reference_fit = chosen[reference].filter(|r| fits[*r].best.is_some());
        if let Some(r) = reference_fit {
            let first_free = labelled
                .iter()
                .flat_map(|l| l.aligned.iter().copied())
                .max()
                .unwrap_or(0)
                + 1;
            for (i, f) in fits.iter().enumerate() {
                if f.best.is_none() || i == r || labelled.iter().any(|l| l.fit == i) {
                    continue;
                }
                let mut next = first_free;
                numbers[i] = matched(&fits[r], f, weights, &mut next).0;
            }
        }
        Numbering {
            numbers,
            alignments,
            labelled,
        }
    }

    /// The numbers of fit `fit`'s clusters, in fitted order.
    pub fn of(&self, fit: usize) -> &[usize] {
        &self.numbers[fit]
    }
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

/// Placements up to which every pair is cross-tabulated; with more, only the pairs with
/// the reference are (their number then grows with the placements, not their square).
pub const ALL_PAIRS_UP_TO: usize = 4;

/// Cross-tables of most-likely aligned clusters: the reference against each other
/// placement, then every other pair when there are at most [`ALL_PAIRS_UP_TO`] placements.
/// The tables count rows; the adjusted Rand index weighs each row by its case weight.
pub fn cross_tables(fits: &[FitResult], labelled: &[Labelled], weights: &[f64]) -> Vec<CrossTable> {
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
    let firsts = if maps.len() <= ALL_PAIRS_UP_TO { maps.len() } else { 1 };
    for i in 0..firsts {
        for j in (i + 1)..maps.len() {
            out.push(cross_table(&maps[i], &maps[j], weights));
        }
    }
    out
}

/// The cross-table of two placements' most likely aligned clusters.
fn cross_table(a: &(String, Vec<usize>), b: &(String, Vec<usize>), weights: &[f64]) -> CrossTable {
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
    let ari = assign::weighted_adjusted_rand_index(&a.1, &b.1, weights);
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
