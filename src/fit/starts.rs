//! Starting partitions for EM.
//!
//! Two kinds alternate across the starts of a fit: k-means++-type seeding on the
//! standardised indicators (Arthur & Vassilvitskii 2007: each new centre drawn with
//! probability proportional to weight × squared distance to the nearest centre so far,
//! then every row assigned to its nearest centre), and random partitions (every row
//! assigned to a cluster uniformly at random). Both give hard 0/1 responsibilities.

use crate::rng::Stream;
use serde::Serialize;

/// Kind of starting partition.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, serde::Deserialize, schemars::JsonSchema)]
#[serde(rename_all = "snake_case")]
pub enum StartKind {
    /// k-means++-type seeding on the indicators.
    SeededCentres,
    /// Uniformly random labels.
    RandomPartition,
    /// The only start a one-cluster fit needs.
    Single,
}

impl StartKind {
    /// The kind used for start `index` (0-based) of a fit with `g` clusters.
    pub fn for_start(index: usize, g: usize) -> StartKind {
        if g == 1 {
            StartKind::Single
        } else if index.is_multiple_of(2) {
            StartKind::SeededCentres
        } else {
            StartKind::RandomPartition
        }
    }
}

/// Hard responsibilities (n×g) for one start.
pub fn partition(kind: StartKind, y: &[f64], d: usize, weights: &[f64], g: usize, rng: &mut Stream) -> Vec<f64> {
    let n = weights.len();
    let labels: Vec<usize> = match kind {
        StartKind::Single => vec![0; n],
        StartKind::RandomPartition => (0..n).map(|_| rng.index(g)).collect(),
        StartKind::SeededCentres => seeded_labels(y, d, weights, g, rng),
    };
    let mut tau = vec![0.0; n * g];
    for (i, l) in labels.iter().enumerate() {
        tau[i * g + l] = 1.0;
    }
    tau
}

fn seeded_labels(y: &[f64], d: usize, weights: &[f64], g: usize, rng: &mut Stream) -> Vec<usize> {
    let n = weights.len();
    // Standardise each indicator so that no unit dominates the distances.
    let mut scale = vec![1.0; d];
    for (j, s) in scale.iter_mut().enumerate() {
        let mean = y.chunks_exact(d).map(|r| r[j]).sum::<f64>() / n as f64;
        let var = y.chunks_exact(d).map(|r| (r[j] - mean).powi(2)).sum::<f64>() / n as f64;
        if var > 0.0 {
            *s = 1.0 / var.sqrt();
        }
    }
    let dist = |a: &[f64], b: &[f64]| -> f64 {
        a.iter()
            .zip(b)
            .zip(&scale)
            .map(|((x, y), s)| ((x - y) * s).powi(2))
            .sum()
    };
    let row = |i: usize| &y[i * d..(i + 1) * d];
    let mut centres = vec![rng.weighted_index(weights)];
    let mut nearest: Vec<f64> = (0..n).map(|i| dist(row(i), row(centres[0]))).collect();
    while centres.len() < g {
        let score: Vec<f64> = nearest.iter().zip(weights).map(|(d2, w)| d2 * w).collect();
        let next = if score.iter().any(|s| *s > 0.0) {
            rng.weighted_index(&score)
        } else {
            rng.index(n)
        };
        centres.push(next);
        for (i, m) in nearest.iter_mut().enumerate() {
            *m = m.min(dist(row(i), row(next)));
        }
    }
    (0..n)
        .map(|i| {
            let mut best = (0, f64::INFINITY);
            for (k, &c) in centres.iter().enumerate() {
                let dk = dist(row(i), row(c));
                if dk < best.1 {
                    best = (k, dk);
                }
            }
            best.0
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn seeded_centres_split_separated_groups() {
        // Two tight groups far apart: seeding must put them in different clusters.
        let mut y = Vec::new();
        for i in 0..40 {
            y.push(if i < 20 { 0.0 } else { 100.0 } + (i % 5) as f64 * 0.01);
        }
        let w = vec![1.0; 40];
        let mut rng = Stream::new(5, "t");
        let tau = partition(StartKind::SeededCentres, &y, 1, &w, 2, &mut rng);
        let first = tau[0..2].iter().position(|t| *t == 1.0).unwrap();
        for i in 0..40 {
            let l = tau[i * 2..i * 2 + 2].iter().position(|t| *t == 1.0).unwrap();
            assert_eq!(l == first, i < 20);
        }
    }
}
