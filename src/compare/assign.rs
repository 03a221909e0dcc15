//! Assignment and agreement: the Hungarian method and the adjusted Rand index.

/// Maximum-weight assignment of rows to columns of a (rows × cols) weight matrix, by the
/// Hungarian method (Kuhn 1955; shortest-augmenting-path form, O(n³)). Returns for each row
/// the column it gets, or `None` when there are more rows than columns and the row is left
/// out. Ties are broken towards lower indices, so the result is deterministic. A weight
/// that is not a finite number (which a damaged input could bring) counts as less than
/// every finite one, so the method always ends.
pub fn max_weight_assignment(weights: &[Vec<f64>]) -> Vec<Option<usize>> {
    let rows = weights.len();
    let cols = weights.first().map_or(0, Vec::len);
    if rows == 0 || cols == 0 {
        return vec![None; rows];
    }
    let finite = || weights.iter().flatten().copied().filter(|w| w.is_finite());
    let top = finite().fold(0.0_f64, f64::max);
    let bottom = finite().fold(0.0_f64, f64::min);
    let weight = |r: usize, c: usize| {
        let w = weights[r].get(c).copied().unwrap_or(f64::NAN);
        if w.is_finite() {
            w
        } else {
            bottom - 1.0
        }
    };
    // Square cost matrix: minimise (max − w), padding with the max cost.
    let n = rows.max(cols);
    let cost = |r: usize, c: usize| if r < rows && c < cols { top - weight(r, c) } else { 0.0 };
    // u, v potentials; p[j] = row matched to column j (1-based, 0 = none).
    let mut u = vec![0.0; n + 1];
    let mut v = vec![0.0; n + 1];
    let mut p = vec![0usize; n + 1];
    let mut way = vec![0usize; n + 1];
    for i in 1..=n {
        p[0] = i;
        let mut j0 = 0;
        let mut minv = vec![f64::INFINITY; n + 1];
        let mut used = vec![false; n + 1];
        loop {
            used[j0] = true;
            let i0 = p[j0];
            let mut delta = f64::INFINITY;
            let mut j1 = 0;
            for j in 1..=n {
                if !used[j] {
                    let cur = cost(i0 - 1, j - 1) - u[i0] - v[j];
                    if cur < minv[j] {
                        minv[j] = cur;
                        way[j] = j0;
                    }
                    if minv[j] < delta {
                        delta = minv[j];
                        j1 = j;
                    }
                }
            }
            for j in 0..=n {
                if used[j] {
                    u[p[j]] += delta;
                    v[j] -= delta;
                } else {
                    minv[j] -= delta;
                }
            }
            j0 = j1;
            if p[j0] == 0 {
                break;
            }
        }
        loop {
            let j1 = way[j0];
            p[j0] = p[j1];
            j0 = j1;
            if j0 == 0 {
                break;
            }
        }
    }
    let mut out = vec![None; rows];
    for (j, &r) in p.iter().enumerate().skip(1) {
        if r >= 1 && r <= rows && j <= cols {
            out[r - 1] = Some(j - 1);
        }
    }
    out
}

fn choose2(x: f64) -> f64 {
    x * (x - 1.0) / 2.0
}

/// Adjusted Rand index of two labelings (Hubert & Arabie 1985), from their counts.
/// 1 for identical partitions (up to relabelling), about 0 for independent ones.
pub fn adjusted_rand_index(a: &[usize], b: &[usize]) -> f64 {
    weighted_adjusted_rand_index(a, b, &vec![1.0; a.len()])
}

/// [`adjusted_rand_index`] with each row counted by its case weight: under frequency
/// weights, the index of the rows written out once per person; under sampling weights
/// (rescaled to mean 1) the same formula on the weighted table, a plug-in whose pair counts
/// x(x − 1)/2 differ from a design-unbiased count by O(1/n).
pub fn weighted_adjusted_rand_index(a: &[usize], b: &[usize], weights: &[f64]) -> f64 {
    assert_eq!(a.len(), b.len());
    assert_eq!(a.len(), weights.len());
    let ka = a.iter().max().map_or(0, |m| m + 1);
    let kb = b.iter().max().map_or(0, |m| m + 1);
    let mut table = vec![vec![0.0; kb]; ka];
    for ((x, y), w) in a.iter().zip(b).zip(weights) {
        table[*x][*y] += w;
    }
    let n: f64 = weights.iter().sum();
    let sum_cells: f64 = table.iter().flatten().map(|c| choose2(*c)).sum();
    let sum_rows: f64 = table.iter().map(|r| choose2(r.iter().sum())).sum();
    let sum_cols: f64 = (0..kb).map(|j| choose2(table.iter().map(|r| r[j]).sum())).sum();
    let expected = sum_rows * sum_cols / choose2(n);
    let max = 0.5 * (sum_rows + sum_cols);
    if (max - expected).abs() < f64::EPSILON * max.max(1.0) {
        return 1.0; // both partitions trivial (one cluster each, or all singletons)
    }
    (sum_cells - expected) / (max - expected)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn weighted_index_equals_the_rows_written_out() {
        let a = [0, 0, 1, 1, 2, 1, 0];
        let b = [0, 1, 1, 1, 2, 2, 0];
        let w = [2.0, 1.0, 3.0, 1.0, 2.0, 1.0, 4.0];
        let (mut ra, mut rb) = (Vec::new(), Vec::new());
        for i in 0..a.len() {
            for _ in 0..w[i] as usize {
                ra.push(a[i]);
                rb.push(b[i]);
            }
        }
        let written_out = adjusted_rand_index(&ra, &rb);
        let weighted = weighted_adjusted_rand_index(&a, &b, &w);
        assert!(
            (weighted - written_out).abs() < 1e-12,
            "{weighted} against {written_out}"
        );
        assert!((adjusted_rand_index(&a, &b) - written_out).abs() > 1e-3);
    }

    fn brute_force(w: &[Vec<f64>]) -> f64 {
        // All injective maps of rows into columns (rows ≤ cols here).
        fn go(w: &[Vec<f64>], r: usize, used: &mut Vec<bool>) -> f64 {
            if r == w.len() {
                return 0.0;
            }
            let mut best = f64::NEG_INFINITY;
            for c in 0..w[0].len() {
                if !used[c] {
                    used[c] = true;
                    best = best.max(w[r][c] + go(w, r + 1, used));
                    used[c] = false;
                }
            }
            best
        }
        go(w, 0, &mut vec![false; w[0].len()])
    }

    #[test]
    fn weights_that_are_not_numbers_end_and_count_least() {
        let nan = f64::NAN;
        let w = vec![vec![nan, 0.9], vec![0.8, f64::INFINITY], vec![nan, nan]];
        assert_eq!(max_weight_assignment(&w), vec![Some(1), Some(0), None]);
        let all = vec![vec![nan; 3]; 3];
        let got = max_weight_assignment(&all);
        let mut cols: Vec<usize> = got.iter().map(|c| c.unwrap()).collect();
        cols.sort_unstable();
        assert_eq!(cols, vec![0, 1, 2]);
    }

    #[test]
    fn hungarian_finds_the_best_assignment() {
        let mut s = crate::rng::Stream::new(4, "hungarian");
        for trial in 0..200 {
            let rows = 1 + trial % 5;
            let cols = rows + (trial / 5) % 3;
            let w: Vec<Vec<f64>> = (0..rows).map(|_| (0..cols).map(|_| s.uniform()).collect()).collect();
            let a = max_weight_assignment(&w);
            let total: f64 = a.iter().enumerate().map(|(r, c)| w[r][c.unwrap()]).sum();
            assert!((total - brute_force(&w)).abs() < 1e-12);
        }
    }

    #[test]
    fn ari_of_relabelled_partition_is_one() {
        let a = [0, 0, 1, 1, 2, 2];
        let b = [2, 2, 0, 0, 1, 1];
        assert!((adjusted_rand_index(&a, &b) - 1.0).abs() < 1e-12);
    }
}
