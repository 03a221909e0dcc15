//! "Table 1" of each compared fit: every covariate and indicator summarised per aligned
//! cluster, as a paper's first table describes its groups. Two conventions, both given:
//! - **posterior-weighted**: each row counts in every cluster by its posterior probability
//!   of belonging there (times its case weight), so the summaries are the model's;
//! - **most likely**: each row counts in its most likely cluster only (times its case
//!   weight), as a reader who assigned people to clusters would tabulate them.
//!
//! Continuous and count columns: weighted mean and standard deviation (the weights' own
//! normalisation, Σ w (x − m)² / Σ w). Binary columns: the weighted count and share of 1s.
//! Categorical columns and items: the weighted count and share of each level. A row
//! missing an item value is left out of that item's summary only.

use crate::data::{Column, Dataset, IndicatorValues, MISSING_ITEM};
use crate::fit::FitResult;
use crate::numerics::most_likely;
use crate::spec::{ColumnWords, VariableType};
use serde::Serialize;
use std::collections::BTreeMap;

/// The variable name of Table 1's first line: each cluster's rows and their share.
pub const ROWS: &str = "rows";

/// One variable (or one level of it) in one aligned cluster of one placement.
#[derive(Debug, Clone, PartialEq, Serialize, schemars::JsonSchema)]
pub struct TableOneCell {
    /// Placement.
    pub placement: String,
    /// Aligned cluster number.
    pub cluster: usize,
    /// The variable in words (its label).
    pub variable: String,
    /// The level, for a categorical column or item ("1" for a binary one).
    pub level: Option<String>,
    /// Posterior-weighted summary.
    pub weighted: Summary,
    /// Summary over the rows whose most likely cluster it is.
    pub most_likely: Summary,
}

/// A weighted summary.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, schemars::JsonSchema)]
pub struct Summary {
    /// Weighted count of rows (with a value).
    pub n: f64,
    /// Continuous and count: the weighted mean.
    pub mean: Option<f64>,
    /// Continuous and count: the weighted standard deviation.
    pub sd: Option<f64>,
    /// A level: its weighted share of the rows with a value.
    pub share: Option<f64>,
}

/// Weighted sums of one variable in one cluster.
#[derive(Default, Clone, Copy)]
struct Sums {
    w: f64,
    wx: f64,
    wxx: f64,
}

impl Sums {
    fn add(&mut self, w: f64, x: f64) {
        self.w += w;
        self.wx += w * x;
        self.wxx += w * x * x;
    }

    fn numeric(&self) -> Summary {
        let mean = (self.w > 0.0).then(|| self.wx / self.w);
        let sd = mean.map(|m| (self.wxx / self.w - m * m).max(0.0).sqrt());
        Summary {
            n: self.w,
            mean,
            sd,
            share: None,
        }
    }

    /// A level's summary: `self.wx` is the level's weight, `self.w` the rows with a value.
    fn level(&self) -> Summary {
        Summary {
            n: self.wx,
            mean: None,
            sd: None,
            share: (self.w > 0.0).then(|| self.wx / self.w),
        }
    }
}

/// One variable's values, as levels (a code per row, `None` where missing) or numbers.
enum Values<'a> {
    Numbers(Box<dyn Fn(usize) -> Option<f64> + 'a>),
    Levels(Vec<String>, Box<dyn Fn(usize) -> Option<usize> + 'a>),
}

/// The variables of Table 1: the covariates of every placement (in first-listed order),
/// then the indicators.
fn variables<'a>(data: &'a Dataset, covariates: &[String]) -> Vec<(String, Values<'a>)> {
    let mut out: Vec<(String, Values<'a>)> = Vec::new();
    for name in covariates {
        match data.columns.get(name) {
            Some(Column::Numeric {
                kind: VariableType::Binary,
                values,
            }) => out.push((
                name.clone(),
                // Level 0 is "1"; a 0 is no listed level, so it counts in the denominator only.
                Values::Levels(
                    vec!["1".into()],
                    Box::new(move |i| Some(if values[i] == 1.0 { 0 } else { 1 })),
                ),
            )),
            Some(Column::Numeric { values, .. }) => {
                out.push((name.clone(), Values::Numbers(Box::new(move |i| Some(values[i])))))
            }
            Some(Column::Categorical { levels, codes, .. }) => out.push((
                name.clone(),
                Values::Levels(levels.clone(), Box::new(move |i| Some(codes[i] as usize))),
            )),
            None => {}
        }
    }
    for set in &data.indicator_sets {
        let d = set.names.len();
        for (j, name) in set.names.iter().enumerate() {
            let values: Values<'a> = match &set.values {
                IndicatorValues::Rows(y) => Values::Numbers(Box::new(move |i| Some(y[i * d + j]))),
                IndicatorValues::Columns(y) => {
                    let n = y.len() / d;
                    Values::Numbers(Box::new(move |i| Some(y[j * n + i])))
                }
                IndicatorValues::Levels { codes, levels, .. } => Values::Levels(
                    levels[j].clone(),
                    Box::new(move |i| {
                        let c = codes[i * d + j];
                        (c != MISSING_ITEM).then_some(c as usize)
                    }),
                ),
            };
            out.push((name.clone(), values));
        }
    }
    out
}

/// Table 1 of a compared fit `f` whose fitted cluster k is aligned cluster `aligned[k]`.
pub fn table_one(
    data: &Dataset,
    f: &FitResult,
    aligned: &[usize],
    covariates: &[String],
    words: &BTreeMap<String, ColumnWords>,
) -> Vec<TableOneCell> {
    let Some(best) = &f.best else { return Vec::new() };
    let g = f.clusters;
    let tau = &best.run.tau;
    let weights = &data.weights;
    let assigned: Vec<usize> = tau.chunks_exact(g).map(most_likely).collect();
    let mut order: Vec<usize> = (0..g).collect();
    order.sort_by_key(|k| aligned[*k]);
    let mut out = Vec::new();
    // First the rows themselves: each cluster's count and share of all rows.
    // The shares as the cluster sizes give them (the same sums), so both print alike.
    let total: f64 = weights.iter().sum();
    let shares = crate::fit::cluster_shares(tau, weights, g);
    for &k in &order {
        let weighted = shares[k] * total;
        let own: f64 = (0..weights.len())
            .filter(|i| assigned[*i] == k)
            .map(|i| weights[i])
            .sum();
        let rows = |n: f64, of: f64| Summary {
            n,
            mean: None,
            sd: None,
            share: (of > 0.0).then(|| n / of),
        };
        out.push(TableOneCell {
            placement: f.placement.clone(),
            cluster: aligned[k],
            variable: ROWS.to_string(),
            level: None,
            weighted: Summary {
                share: Some(shares[k]),
                ..rows(weighted, total)
            },
            most_likely: rows(own, total),
        });
    }
    for (name, values) in variables(data, covariates) {
        let levels = match &values {
            Values::Numbers(_) => None,
            Values::Levels(levels, _) => Some(levels.clone()),
        };
        let label = super::terms::label(&name, words);
        let variable = match (&levels, words.get(&name).and_then(|w| w.unit.as_deref())) {
            (None, Some(unit)) => format!("{label} ({unit})"),
            _ => label,
        };
        // Per cluster and level (one "level" for a number): weighted and most-likely sums.
        let width = levels.as_ref().map_or(1, Vec::len);
        let mut weighted = vec![vec![Sums::default(); width]; g];
        let mut likely = vec![vec![Sums::default(); width]; g];
        for i in 0..weights.len() {
            let w = weights[i];
            let (x, level) = match &values {
                Values::Numbers(get) => match get(i) {
                    Some(x) => (x, None),
                    None => continue,
                },
                Values::Levels(_, get) => match get(i) {
                    Some(l) => (0.0, Some(l)),
                    None => continue,
                },
            };
            for k in 0..g {
                let pw = w * tau[i * g + k];
                let own = if assigned[i] == k { w } else { 0.0 };
                for (l, (a, b)) in weighted[k].iter_mut().zip(likely[k].iter_mut()).enumerate() {
                    match level {
                        None => {
                            a.add(pw, x);
                            b.add(own, x);
                        }
                        Some(at) => {
                            let hit = if at == l { 1.0 } else { 0.0 };
                            a.add(pw, hit);
                            b.add(own, hit);
                        }
                    }
                }
            }
        }
        for &k in &order {
            match &levels {
                None => out.push(TableOneCell {
                    placement: f.placement.clone(),
                    cluster: aligned[k],
                    variable: variable.clone(),
                    level: None,
                    weighted: weighted[k][0].numeric(),
                    most_likely: likely[k][0].numeric(),
                }),
                Some(levels) => {
                    for (l, level) in levels.iter().enumerate() {
                        out.push(TableOneCell {
                            placement: f.placement.clone(),
                            cluster: aligned[k],
                            variable: variable.clone(),
                            level: Some(level.clone()),
                            weighted: weighted[k][l].level(),
                            most_likely: likely[k][l].level(),
                        });
                    }
                }
            }
        }
    }
    out
}
