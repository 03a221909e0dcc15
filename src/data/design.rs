//! Design matrices: intercept, treatment-coded categoricals, standardised numeric columns.

use super::{Column, Dataset};
use crate::spec::VariableType;
use nalgebra::DMatrix;
use std::sync::Arc;

/// One column of a design matrix.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize, schemars::JsonSchema)]
pub struct Term {
    /// Shown name: `intercept`, `age`, `sex=male`.
    pub name: String,
    /// The covariate it comes from (`None` for the intercept).
    pub covariate: Option<String>,
    /// Centre subtracted for fitting (0 for the intercept, dummies and binaries).
    pub center: f64,
    /// Scale divided by for fitting (1 for the intercept, dummies and binaries).
    pub scale: f64,
}

/// Why a design matrix cannot be built.
#[derive(Debug, Clone, PartialEq)]
pub struct DesignError {
    /// The covariate at fault, when one is.
    pub covariate: Option<String>,
    /// What is wrong and what to do.
    pub message: String,
}

/// A design matrix, row-major, as used for fitting (numeric columns standardised).
#[derive(Debug, Clone, PartialEq)]
pub struct Design {
    /// Columns, intercept first.
    pub terms: Vec<Term>,
    /// Values, row-major: `x[i * p + j]`. Shared, so that a placement whose Gaussian
    /// design is its whole component design holds the values once.
    pub x: Arc<Vec<f64>>,
    /// Rows.
    pub n: usize,
}

impl Design {
    /// Number of columns.
    pub fn p(&self) -> usize {
        self.terms.len()
    }

    /// Intercept only.
    pub fn intercept(n: usize) -> Design {
        Design {
            terms: vec![intercept_term()],
            x: Arc::new(vec![1.0; n]),
            n,
        }
    }

    /// The design on some of these columns (`columns`, in order, intercept first): the
    /// same values; shared, not copied, when they are all of them.
    pub fn select(&self, columns: &[usize]) -> Design {
        let p = self.p();
        if columns.len() == p && columns.iter().enumerate().all(|(a, c)| a == *c) {
            return self.clone();
        }
        let x = self
            .x
            .chunks_exact(p)
            .flat_map(|row| columns.iter().map(|a| row[*a]))
            .collect();
        Design {
            terms: columns.iter().map(|a| self.terms[*a].clone()).collect(),
            x: Arc::new(x),
            n: self.n,
        }
    }

    /// Build from named covariates of a dataset; fails on constant or collinear columns.
    pub fn build(data: &Dataset, covariates: &[String]) -> Result<Design, DesignError> {
        let cols: Vec<(&str, &Column)> = covariates
            .iter()
            .map(|c| {
                data.columns
                    .get(c)
                    .map(|col| (c.as_str(), col))
                    .ok_or_else(|| DesignError {
                        covariate: Some(c.clone()),
                        message: format!("covariate '{c}' was not read"),
                    })
            })
            .collect::<Result<_, _>>()?;
        Design::from_columns(data.n(), &cols)
    }

    /// The design of `data` on terms fixed elsewhere (a fitted model's), with their
    /// centres and scales: the same arithmetic as when the terms were made, so the rows
    /// the model was fitted to give the same bits. A categorical covariate's level must
    /// be one the terms were made from (`known_levels`).
    pub fn from_terms(
        data: &Dataset,
        terms: &[Term],
        known_levels: &std::collections::BTreeMap<String, Vec<String>>,
    ) -> Result<Design, DesignError> {
        let (n, p) = (data.n(), terms.len());
        let mut x = vec![0.0; n * p];
        for (j, t) in terms.iter().enumerate() {
            let Some(c) = &t.covariate else {
                for i in 0..n {
                    x[i * p + j] = 1.0;
                }
                continue;
            };
            let missing = || DesignError {
                covariate: Some(c.clone()),
                message: format!("covariate '{c}' was not read"),
            };
            match data.columns.get(c).ok_or_else(missing)? {
                Column::Numeric { values, .. } => {
                    for (i, v) in values.iter().enumerate() {
                        x[i * p + j] = (v - t.center) / t.scale;
                    }
                }
                Column::Categorical { levels, codes, .. } => {
                    if let Some(known) = known_levels.get(c) {
                        if let Some(i) = codes.iter().position(|k| !known.contains(&levels[*k as usize])) {
                            return Err(DesignError {
                                covariate: Some(c.clone()),
                                message: format!(
                                    "covariate '{c}' has the level '{}' in row '{}', which the fitted model never saw (its levels: {})",
                                    crate::spec::limits::quoted(&levels[codes[i] as usize]),
                                    crate::spec::limits::quoted(&data.ids[i]),
                                    known.join(", ")
                                ),
                            });
                        }
                    }
                    let level = t.name.strip_prefix(&format!("{c}=")).unwrap_or(&t.name);
                    for (i, k) in codes.iter().enumerate() {
                        x[i * p + j] = f64::from(u8::from(levels[*k as usize] == level));
                    }
                }
            }
        }
        Ok(Design {
            terms: terms.to_vec(),
            x: Arc::new(x),
            n,
        })
    }

    /// Build from columns directly (used by [`Design::build`] and by reference tests).
    pub fn from_columns(n: usize, cols: &[(&str, &Column)]) -> Result<Design, DesignError> {
        let mut terms = vec![intercept_term()];
        let mut columns: Vec<Vec<f64>> = Vec::new();
        for (name, col) in cols {
            match col {
                Column::Numeric { kind, values } => {
                    let standardise = !matches!(kind, VariableType::Binary);
                    let (center, scale) = if standardise { mean_sd(values) } else { (0.0, 1.0) };
                    if !(scale > 0.0) || (!standardise && values.iter().all(|v| *v == values[0])) {
                        return Err(DesignError {
                            covariate: Some(name.to_string()),
                            message: format!("covariate '{name}' has the same value in every row used, so its effect cannot be estimated; leave it out"),
                        });
                    }
                    columns.push(values.iter().map(|v| (v - center) / scale).collect());
                    terms.push(Term {
                        name: name.to_string(),
                        covariate: Some(name.to_string()),
                        center,
                        scale,
                    });
                }
                Column::Categorical {
                    levels,
                    reference,
                    codes,
                } => {
                    for (k, level) in levels.iter().enumerate() {
                        if k == *reference {
                            continue;
                        }
                        let dummy: Vec<f64> = codes.iter().map(|c| f64::from(u8::from(*c as usize == k))).collect();
                        if dummy.iter().all(|v| *v == 0.0) {
                            continue; // a declared level that does not occur in the rows used
                        }
                        columns.push(dummy);
                        terms.push(Term {
                            name: format!("{name}={level}"),
                            covariate: Some(name.to_string()),
                            center: 0.0,
                            scale: 1.0,
                        });
                    }
                }
            }
        }
        let p = terms.len();
        let mut x = vec![0.0; n * p];
        for i in 0..n {
            x[i * p] = 1.0;
            for (j, c) in columns.iter().enumerate() {
                x[i * p + j + 1] = c[i];
            }
        }
        let design = Design {
            terms,
            x: Arc::new(x),
            n,
        };
        design.check_rank()?;
        Ok(design)
    }

    /// Fails when the columns are (nearly) linearly dependent.
    fn check_rank(&self) -> Result<(), DesignError> {
        let p = self.p();
        let mut xtx = DMatrix::<f64>::zeros(p, p);
        for row in self.x.chunks_exact(p) {
            for a in 0..p {
                for b in 0..=a {
                    xtx[(a, b)] += row[a] * row[b];
                }
            }
        }
        for a in 0..p {
            for b in 0..a {
                xtx[(b, a)] = xtx[(a, b)];
            }
        }
        // Scale to a correlation-like matrix so the threshold is unit-free.
        let d: Vec<f64> = (0..p).map(|a| xtx[(a, a)].sqrt().max(f64::MIN_POSITIVE)).collect();
        let scaled = DMatrix::from_fn(p, p, |a, b| xtx[(a, b)] / (d[a] * d[b]));
        let eig = scaled.symmetric_eigenvalues();
        let min = eig.iter().copied().fold(f64::INFINITY, f64::min);
        if min < 1e-10 {
            let names: Vec<&str> = self.terms.iter().skip(1).map(|t| t.name.as_str()).collect();
            return Err(DesignError {
                covariate: None,
                message: format!(
                    "the covariates {} are collinear (one is a combination of the others), so their effects cannot be separated; leave one out",
                    names.join(", ")
                ),
            });
        }
        Ok(())
    }

    /// Map coefficients fitted on the standardised columns back to the original scale.
    ///
    /// With x* = (x − c)/s, the linear predictor b0 + Σ b_j x*_j equals
    /// (b0 − Σ b_j c_j / s_j) + Σ (b_j / s_j) x_j.
    pub fn to_original_scale(&self, beta: &[f64]) -> Vec<f64> {
        let mut out = beta.to_vec();
        for (j, t) in self.terms.iter().enumerate().skip(1) {
            out[j] = beta[j] / t.scale;
            out[0] -= beta[j] * t.center / t.scale;
        }
        out
    }

    /// Map original-scale coefficients to the standardised columns (inverse of
    /// [`Design::to_original_scale`]).
    pub fn to_fitting_scale(&self, beta: &[f64]) -> Vec<f64> {
        let mut out = beta.to_vec();
        for (j, t) in self.terms.iter().enumerate().skip(1) {
            out[j] = beta[j] * t.scale;
            out[0] += beta[j] * t.center;
        }
        out
    }
}

fn intercept_term() -> Term {
    Term {
        name: "intercept".to_string(),
        covariate: None,
        center: 0.0,
        scale: 1.0,
    }
}

fn mean_sd(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n;
    (mean, var.sqrt())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn numeric(values: Vec<f64>) -> Column {
        Column::Numeric {
            kind: VariableType::Continuous,
            values,
        }
    }

    #[test]
    fn scaling_round_trips() {
        let age = numeric(vec![20.0, 35.0, 50.0, 65.0]);
        let sex = Column::Categorical {
            levels: vec!["f".into(), "m".into()],
            reference: 0,
            codes: vec![0, 1, 1, 0],
        };
        let d = Design::from_columns(4, &[("age", &age), ("sex", &sex)]).unwrap();
        assert_eq!(
            d.terms.iter().map(|t| t.name.as_str()).collect::<Vec<_>>(),
            ["intercept", "age", "sex=m"]
        );
        let beta = [1.0, 0.5, -2.0];
        let back = d.to_fitting_scale(&d.to_original_scale(&beta));
        for (a, b) in beta.iter().zip(&back) {
            assert!((a - b).abs() < 1e-12);
        }
        // The linear predictor is the same on both scales.
        let orig = d.to_original_scale(&beta);
        let lp_fit: f64 = (0..3).map(|j| d.x[3 + j] * beta[j]).sum();
        let lp_orig = orig[0] + orig[1] * 35.0 + orig[2] * 1.0;
        assert!((lp_fit - lp_orig).abs() < 1e-12);
    }

    #[test]
    fn constant_and_collinear_columns_are_refused() {
        let c = numeric(vec![3.0; 5]);
        assert!(Design::from_columns(5, &[("c", &c)])
            .unwrap_err()
            .message
            .contains("same value"));
        let a = numeric(vec![1.0, 2.0, 3.0, 4.0, 6.0]);
        let b = numeric(vec![2.0, 4.0, 6.0, 8.0, 12.0]);
        assert!(Design::from_columns(5, &[("a", &a), ("b", &b)])
            .unwrap_err()
            .message
            .contains("collinear"));
    }
}
