//! A survey design: the strata and primary sampling units a sample was drawn by, for
//! design-based standard errors (linearisation, Binder 1983).
//!
//! Units are read within strata: unit "1" of stratum A and unit "1" of stratum B are two
//! units, as survey files usually number them. Without a `psu` column every row is its own
//! unit; without `strata` there is one stratum. Variances are those of sampling units
//! drawn with replacement within strata (no finite-population correction).

use nalgebra::DMatrix;
use std::collections::HashMap;

/// The strata and sampling units of the rows a study uses.
#[derive(Debug, Clone, PartialEq)]
pub struct SurveyDesign {
    /// Stratum names, in order of first appearance (one unnamed stratum without a column).
    pub strata: Vec<String>,
    /// Stratum of each row.
    pub stratum: Vec<u32>,
    /// Sampling unit of each row, numbered over all strata; None: every row its own unit.
    pub unit: Option<Vec<u32>>,
    /// The stratum of each sampling unit (with a unit column).
    pub unit_stratum: Vec<u32>,
    /// Units with positive total weight in each stratum: the n_h of the variance.
    pub units_in: Vec<usize>,
}

/// Why a design cannot give variances, with the row where it shows.
#[derive(Debug, Clone, PartialEq)]
pub struct LonelyStratum {
    /// The stratum's name.
    pub stratum: String,
    /// Its units of positive weight (0 or 1).
    pub units: usize,
    /// A row of the stratum (0-based, among the rows used).
    pub row: usize,
}

/// Labels coded 0.. in order of first appearance: (the labels, the code of each row).
pub type Coded = (Vec<String>, Vec<u32>);

/// Codes for text labels, in order of first appearance.
pub fn codes<'a>(labels: impl Iterator<Item = &'a str>) -> Coded {
    let mut seen: HashMap<&'a str, u32> = HashMap::new();
    let mut names = Vec::new();
    let codes = labels
        .map(|l| {
            *seen.entry(l).or_insert_with(|| {
                names.push(l.to_string());
                (names.len() - 1) as u32
            })
        })
        .collect();
    (names, codes)
}

impl SurveyDesign {
    /// The design of `rows` rows from their coded stratum and unit labels (either may be
    /// absent) and case weights; a stratum with fewer than two units of positive weight
    /// has no variance estimate and is an error (merging it with a similar stratum is the
    /// usual remedy).
    pub fn new(
        rows: usize,
        strata: Option<Coded>,
        units: Option<Coded>,
        weights: &[f64],
    ) -> Result<SurveyDesign, LonelyStratum> {
        let (names, stratum) = strata.unwrap_or_else(|| (vec![String::new()], vec![0; rows]));
        let (unit, unit_stratum) = match units {
            Some((_, labels)) => {
                // A unit is a (stratum, label) pair, numbered in order of first appearance.
                let mut seen: HashMap<(u32, u32), u32> = HashMap::new();
                let mut unit_stratum = Vec::new();
                let unit: Vec<u32> = labels
                    .iter()
                    .zip(&stratum)
                    .map(|(l, h)| {
                        *seen.entry((*h, *l)).or_insert_with(|| {
                            unit_stratum.push(*h);
                            (unit_stratum.len() - 1) as u32
                        })
                    })
                    .collect();
                (Some(unit), unit_stratum)
            }
            None => (None, Vec::new()),
        };
        let mut units_in = vec![0usize; names.len()];
        match &unit {
            Some(unit) => {
                let mut weight = vec![0.0; unit_stratum.len()];
                for (u, w) in unit.iter().zip(weights) {
                    weight[*u as usize] += w;
                }
                for (u, w) in weight.iter().enumerate() {
                    if *w > 0.0 {
                        units_in[unit_stratum[u] as usize] += 1;
                    }
                }
            }
            None => {
                for (h, w) in stratum.iter().zip(weights) {
                    if *w > 0.0 {
                        units_in[*h as usize] += 1;
                    }
                }
            }
        }
        if let Some((h, n)) = units_in.iter().enumerate().find(|(_, n)| **n < 2) {
            let row = stratum.iter().position(|s| *s as usize == h).unwrap_or(0);
            return Err(LonelyStratum {
                stratum: names[h].clone(),
                units: *n,
                row,
            });
        }
        Ok(SurveyDesign {
            strata: names,
            stratum,
            unit,
            unit_stratum,
            units_in,
        })
    }

    /// Sampling units in all.
    pub fn units(&self) -> usize {
        self.units_in.iter().sum()
    }

    /// The design-based variance of a total Σ_i s_i of row scores (the middle of the
    /// linearised sandwich): Σ_h n_h/(n_h − 1) Σ_{j in h} (z_hj − z̄_h)(z_hj − z̄_h)′, where
    /// z_hj adds the scores of unit j's rows and z̄_h is their mean over the n_h units of
    /// positive weight in stratum h. `rows` calls its argument with each row's index and
    /// score s_i (already multiplied by the row's weight).
    pub fn score_variance<E>(
        &self,
        p: usize,
        weights: &[f64],
        rows: impl FnOnce(&mut dyn FnMut(usize, &[f64])) -> Result<(), E>,
    ) -> Result<DMatrix<f64>, E> {
        let strata = self.strata.len();
        // Per stratum: Σ z z′ (lower triangle) and Σ z.
        let mut squares = vec![DMatrix::<f64>::zeros(p, p); strata];
        let mut totals = vec![vec![0.0; p]; strata];
        let mut add = |h: usize, z: &[f64]| {
            for a in 0..p {
                totals[h][a] += z[a];
                if z[a] == 0.0 {
                    continue;
                }
                for b in 0..=a {
                    squares[h][(a, b)] += z[a] * z[b];
                }
            }
        };
        match &self.unit {
            Some(unit) => {
                let mut z = vec![0.0; self.unit_stratum.len() * p];
                let mut positive = vec![false; self.unit_stratum.len()];
                rows(&mut |i, s| {
                    let u = unit[i] as usize;
                    positive[u] |= weights[i] > 0.0;
                    for (zz, v) in z[u * p..(u + 1) * p].iter_mut().zip(s) {
                        *zz += v;
                    }
                })?;
                for (u, h) in self.unit_stratum.iter().enumerate() {
                    if positive[u] {
                        add(*h as usize, &z[u * p..(u + 1) * p]);
                    }
                }
            }
            None => rows(&mut |i, s| {
                if weights[i] > 0.0 {
                    add(self.stratum[i] as usize, s);
                }
            })?,
        }
        let mut meat = DMatrix::zeros(p, p);
        for h in 0..strata {
            let n = self.units_in[h] as f64;
            let factor = n / (n - 1.0);
            for a in 0..p {
                for b in 0..=a {
                    let centred = squares[h][(a, b)] - totals[h][a] * totals[h][b] / n;
                    meat[(a, b)] += factor * centred;
                }
            }
        }
        for a in 0..p {
            for b in 0..a {
                meat[(b, a)] = meat[(a, b)];
            }
        }
        Ok(meat)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two strata, two units each, one score: the textbook formula by hand.
    #[test]
    fn the_variance_of_a_total_adds_centred_unit_totals_within_strata() {
        let strata = codes(["a", "a", "a", "b", "b", "b"].into_iter());
        let units = codes(["1", "1", "2", "1", "2", "2"].into_iter());
        let w = vec![1.0; 6];
        let d = SurveyDesign::new(6, Some(strata), Some(units), &w).unwrap();
        assert_eq!(d.units(), 4);
        let scores = [1.0, 2.0, -4.0, 0.5, 1.5, -1.0];
        let v = d
            .score_variance::<()>(1, &w, |f| {
                for (i, s) in scores.iter().enumerate() {
                    f(i, &[*s]);
                }
                Ok(())
            })
            .unwrap();
        // Stratum a: unit totals 3 and -4, mean -0.5: 2/1 * (3.5² + 3.5²) = 49.
        // Stratum b: unit totals 0.5 and 0.5: 0.
        assert!((v[(0, 0)] - 49.0).abs() < 1e-12, "{}", v[(0, 0)]);
    }

    #[test]
    fn a_stratum_with_one_unit_is_named() {
        let w = vec![1.0; 4];
        let c = |v: [&'static str; 4]| Some(codes(v.into_iter()));
        let e = SurveyDesign::new(4, c(["a", "a", "b", "b"]), c(["1", "2", "7", "7"]), &w).unwrap_err();
        assert_eq!((e.stratum.as_str(), e.units, e.row), ("b", 1, 2));
        // Units are read within strata: "1" in a and "1" in b are two units.
        let d = SurveyDesign::new(4, c(["a", "a", "b", "b"]), c(["1", "2", "1", "2"]), &w).unwrap();
        assert_eq!(d.units_in, vec![2, 2]);
        // A unit whose rows all weigh 0 does not count.
        let e = SurveyDesign::new(4, None, c(["1", "2", "3", "3"]), &[1.0, 0.0, 0.0, 0.0]).unwrap_err();
        assert_eq!(e.units, 1);
    }
}
