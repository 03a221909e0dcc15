//! Item components: binary and categorical indicators, independent given the cluster
//! (the latent class model; Goodman 1974), with optional covariate effects on items.
//!
//! Item j has L_j levels; level 0 is the baseline. Inside cluster k:
//! - without component covariates, P(y_j = l) = θ_kjl, estimated in closed form from the
//!   responsibilities: θ_kjl = (n_kjl + α/L_j) / (n_kj + α), with n_kjl = Σ_i c_i τ_ik
//!   [y_ij = l] over rows where the item is observed and α the smoothing pseudo-count;
//! - with component covariates z ("direct effects"), a baseline-category logit
//!   log(P(y_j = l)/P(y_j = 0)) = β_kjl' z, fitted by one Newton step with step-halving per
//!   EM iteration (a generalised EM step: the expected complete-data term never falls).
//!   Smoothing adds α/L_j pseudo-observations of each level at the reference covariate
//!   values (z = intercept alone on the fitting scale).
//!
//! A missing item value is skipped in that row's likelihood (missing at random).

use super::{ComponentFamily, Degeneracy, Naming, Parameter};
use crate::data::MISSING_ITEM;
use crate::model::gating::{fit_multinomial_logit, LogitRows};
use crate::numerics::log_sum_exp;
use crate::model::FitData;

/// Largest |coefficient| (log odds, fitting scale) taken as estimable. A log odds of 50
/// puts a probability within e^-50 ≈ 2e-22 of 0 or 1: beyond what any data can support,
/// so a larger value means the covariates separate the item's levels.
pub const SEPARATION_LOGIT: f64 = 50.0;

/// Parameters of G clusters' item distributions.
#[derive(Debug, Clone, PartialEq)]
pub struct ItemComponents {
    /// Clusters.
    pub g: usize,
    /// Item names.
    pub names: Vec<String>,
    /// Levels per item.
    pub levels: Vec<usize>,
    /// Design columns per item (intercept first); one column = no covariates.
    pub terms: Vec<Vec<usize>>,
    /// Per item without covariates: log probabilities, `[k * L + l]`; empty otherwise.
    pub log_prob: Vec<Vec<f64>>,
    /// Per item with covariates: logit coefficients on the fitting scale,
    /// `[(k * (L − 1) + l − 1) * q + a]`; empty otherwise.
    pub coef: Vec<Vec<f64>>,
    /// Pseudo-count per item and cluster (0 = none).
    pub smoothing: f64,
    /// At the last M-step: (cluster, item, level) cells with no weight, whose probability
    /// would be exactly 0 without smoothing (with smoothing they are held off 0).
    pub empty_cells: usize,
}

impl ItemComponents {
    /// Empty parameters for the data's items; [`ComponentFamily::m_step`] fills them.
    pub fn new(data: &FitData, g: usize, names: Vec<String>, smoothing: f64) -> ItemComponents {
        let it = data.items.expect("item components need item data");
        let levels = it.levels.to_vec();
        let terms = it.terms.to_vec();
        let log_prob = levels
            .iter()
            .zip(&terms)
            .map(|(l, t)| {
                if t.len() == 1 {
                    vec![-(*l as f64).ln(); g * l]
                } else {
                    Vec::new()
                }
            })
            .collect();
        let coef = levels
            .iter()
            .zip(&terms)
            .map(|(l, t)| {
                if t.len() == 1 {
                    Vec::new()
                } else {
                    vec![0.0; g * (l - 1) * t.len()]
                }
            })
            .collect();
        ItemComponents {
            g,
            names,
            levels,
            terms,
            log_prob,
            coef,
            smoothing,
            empty_cells: 0,
        }
    }

    /// log P(y_j = level | cluster k, z) for one row's full component design `z`.
    pub fn log_probability(&self, j: usize, k: usize, z: &[f64], level: usize, eta: &mut Vec<f64>) -> f64 {
        let l = self.levels[j];
        if self.terms[j].len() == 1 {
            return self.log_prob[j][k * l + level];
        }
        let q = self.terms[j].len();
        eta.clear();
        eta.push(0.0);
        let block = &self.coef[j][k * (l - 1) * q..(k + 1) * (l - 1) * q];
        for coefs in block.chunks_exact(q) {
            eta.push(coefs.iter().zip(&self.terms[j]).map(|(b, a)| b * z[*a]).sum());
        }
        eta[level] - log_sum_exp(eta)
    }

    /// Probabilities of every level of item j in cluster k at the reference covariate
    /// values (the intercept alone on the fitting scale).
    pub fn reference_probabilities(&self, j: usize, k: usize) -> Vec<f64> {
        let l = self.levels[j];
        if self.terms[j].len() == 1 {
            return self.log_prob[j][k * l..(k + 1) * l].iter().map(|v| v.exp()).collect();
        }
        let mut z = vec![0.0; self.terms[j].iter().copied().max().unwrap_or(0) + 1];
        z[0] = 1.0;
        let mut eta = Vec::new();
        (0..l)
            .map(|lv| self.log_probability(j, k, &z, lv, &mut eta).exp())
            .collect()
    }
}

impl ComponentFamily for ItemComponents {
    fn add_log_density(&self, data: &FitData, out: &mut [f64]) {
        let it = data.items.expect("item data");
        let (g, nj, qz) = (self.g, self.levels.len(), it.qz);
        let mut eta = Vec::with_capacity(self.levels.iter().copied().max().unwrap_or(2));
        for i in 0..data.n {
            let codes = &it.codes[i * nj..(i + 1) * nj];
            let z = &it.z[i * qz..(i + 1) * qz];
            let row = &mut out[i * g..(i + 1) * g];
            for (j, &c) in codes.iter().enumerate() {
                if c == MISSING_ITEM {
                    continue;
                }
                for (k, o) in row.iter_mut().enumerate() {
                    *o += self.log_probability(j, k, z, usize::from(c), &mut eta);
                }
            }
        }
    }

    fn m_step(&mut self, data: &FitData, tau: &[f64]) -> Result<(), Degeneracy> {
        let it = data.items.expect("item data");
        let (g, nj) = (self.g, self.levels.len());
        let alpha = self.smoothing;
        self.empty_cells = 0;
        for (j, fixed) in it.rows.iter().enumerate() {
            let l = self.levels[j];
            let observed = &fixed.observed;
            if self.terms[j].len() == 1 {
                let mut counts = vec![0.0; g * l];
                for &i in observed {
                    let c = usize::from(it.codes[i * nj + j]);
                    for k in 0..g {
                        counts[k * l + c] += data.weights[i] * tau[i * g + k];
                    }
                }
                for k in 0..g {
                    let cell = &counts[k * l..(k + 1) * l];
                    let total: f64 = cell.iter().sum();
                    if !(total + alpha > 0.0) {
                        return Err(self.empty(k, j));
                    }
                    for (lv, nkl) in cell.iter().enumerate() {
                        if *nkl <= 1e-12 * total {
                            self.empty_cells += 1;
                        }
                        self.log_prob[j][k * l + lv] = ((nkl + alpha / l as f64) / (total + alpha)).ln();
                    }
                }
                continue;
            }
            // Direct effects: a baseline-category logit per cluster on the item's terms,
            // with the smoothing's pseudo-observations as extra rows when it is on.
            let q = self.terms[j].len();
            let rows = observed.len() + if alpha > 0.0 { l } else { 0 };
            let (x, onehot) = (&fixed.x[..rows * q], &fixed.onehot[..rows * l]);
            let mut v = vec![alpha / l as f64; rows];
            for k in 0..g {
                let mut cell = vec![0.0; l];
                for (r, &i) in observed.iter().enumerate() {
                    v[r] = data.weights[i] * tau[i * g + k];
                    cell[usize::from(it.codes[i * nj + j])] += v[r];
                }
                let total: f64 = cell.iter().sum();
                if !(total + alpha > 0.0) {
                    return Err(self.empty(k, j));
                }
                self.empty_cells += cell.iter().filter(|c| **c <= 1e-12 * total).count();
                let block = (k * (l - 1) * q)..((k + 1) * (l - 1) * q);
                let start = self.coef[j][block.clone()].to_vec();
                let rows = LogitRows {
                    w: x,
                    p: q,
                    tau: onehot,
                    g: l,
                    weights: &v,
                    ridge: 0.0,
                };
                let fit = fit_multinomial_logit(&rows, &start, 1);
                if fit.gamma.iter().any(|b| !(b.abs() <= SEPARATION_LOGIT)) {
                    return Err(Degeneracy {
                        cluster: k + 1,
                        reason: format!(
                            "item '{}' is perfectly predicted by its covariates inside it (separation): its log odds grow without bound; set [indicators] smoothing (e.g. 1), or restrict the covariates with acts_on",
                            self.names[j]
                        ),
                    });
                }
                self.coef[j][block].copy_from_slice(&fit.gamma);
            }
        }
        Ok(())
    }

    /// Smoothing acts as a prior: α/L pseudo-observations of each level at the reference
    /// covariate values, i.e. log prior = Σ_k Σ_j Σ_l (α/L_j) log P_kj(l | z_ref). EM then
    /// maximises log-likelihood + log prior (a posterior mode), which is what it traces.
    fn log_prior(&self) -> f64 {
        if self.smoothing == 0.0 {
            return 0.0;
        }
        let mut total = 0.0;
        for k in 0..self.g {
            for (j, l) in self.levels.iter().enumerate() {
                let a = self.smoothing / *l as f64;
                total += self
                    .reference_probabilities(j, k)
                    .iter()
                    .map(|p| a * p.ln())
                    .sum::<f64>();
            }
        }
        total
    }

    fn n_params(&self) -> usize {
        self.g
            * self
                .levels
                .iter()
                .zip(&self.terms)
                .map(|(l, t)| (l - 1) * t.len())
                .sum::<usize>()
    }

    fn permute(&mut self, order: &[usize]) {
        let g = self.g;
        for v in self.log_prob.iter_mut().chain(self.coef.iter_mut()) {
            if v.is_empty() {
                continue;
            }
            let block = v.len() / g;
            *v = order
                .iter()
                .flat_map(|&k| v[k * block..(k + 1) * block].to_vec())
                .collect();
        }
    }

    /// Per item without covariates, the log probabilities (renormalised when set back);
    /// per item with covariates, the logit coefficients.
    fn push_coordinates(&self, out: &mut Vec<f64>) {
        for (lp, coef) in self.log_prob.iter().zip(&self.coef) {
            out.extend_from_slice(lp);
            out.extend_from_slice(coef);
        }
    }

    fn set_coordinates(&mut self, c: &[f64]) -> Result<usize, Degeneracy> {
        let mut read = 0;
        for j in 0..self.levels.len() {
            let l = self.levels[j];
            let lp = &mut self.log_prob[j];
            let len = lp.len();
            lp.copy_from_slice(&c[read..read + len]);
            read += len;
            for block in lp.chunks_exact_mut(l) {
                let lse = log_sum_exp(block);
                block.iter_mut().for_each(|v| *v -= lse);
            }
            let coef = &mut self.coef[j];
            let len = coef.len();
            coef.copy_from_slice(&c[read..read + len]);
            read += len;
        }
        Ok(read)
    }

    fn parameters(&self, naming: Naming) -> Vec<Parameter> {
        let mut out = Vec::new();
        let design = naming.components;
        for k in 0..self.g {
            for j in 0..self.levels.len() {
                let l = self.levels[j];
                let level_names = &naming.item_levels[j];
                for (lv, p) in self.reference_probabilities(j, k).into_iter().enumerate() {
                    out.push(Parameter {
                        block: "item_probability",
                        cluster: k + 1,
                        indicator: Some(format!("{}={}", self.names[j], level_names[lv])),
                        term: None,
                        value: p,
                    });
                }
                if self.terms[j].len() == 1 {
                    continue;
                }
                let q = self.terms[j].len();
                for lv in 1..l {
                    let start = (k * (l - 1) + lv - 1) * q;
                    let beta = &self.coef[j][start..start + q];
                    for (term, value) in subset_to_original(design, &self.terms[j], beta) {
                        out.push(Parameter {
                            block: "item_logit",
                            cluster: k + 1,
                            indicator: Some(format!("{}={}", self.names[j], level_names[lv])),
                            term: Some(term),
                            value,
                        });
                    }
                }
            }
        }
        out
    }
}

impl ItemComponents {
    fn empty(&self, k: usize, j: usize) -> Degeneracy {
        Degeneracy {
            cluster: k + 1,
            reason: format!("no row in it has a value of item '{}'", self.names[j]),
        }
    }
}

/// The arrays of one item's M-step that stay fixed during EM, built once per placement
/// by [`ItemRows::build`].
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ItemRows {
    /// Rows where the item is observed.
    pub observed: Vec<usize>,
    /// Items with covariates: the observed rows' design on the item's terms, then one
    /// pseudo-row per level at the reference values (intercept alone) for smoothing;
    /// (observed + L)×q, row-major. Empty for items without covariates.
    pub x: Vec<f64>,
    /// The matching one-hot responses, (observed + L)×L. Empty without covariates.
    pub onehot: Vec<f64>,
}

impl ItemRows {
    /// One entry per item, from the level codes (n×J), levels per item, the component
    /// design (n×qz) and each item's design columns.
    pub fn build(codes: &[u16], levels: &[usize], z: &[f64], qz: usize, terms: &[Vec<usize>]) -> Vec<ItemRows> {
        let nj = levels.len();
        let n = if nj == 0 { 0 } else { codes.len() / nj };
        (0..nj)
            .map(|j| {
                let (l, cols) = (levels[j], &terms[j]);
                let observed: Vec<usize> = (0..n).filter(|i| codes[i * nj + j] != MISSING_ITEM).collect();
                if cols.len() == 1 {
                    return ItemRows {
                        observed,
                        ..ItemRows::default()
                    };
                }
                let rows = observed.len() + l;
                let mut x = Vec::with_capacity(rows * cols.len());
                let mut onehot = vec![0.0; rows * l];
                for (r, &i) in observed.iter().enumerate() {
                    x.extend(cols.iter().map(|a| z[i * qz + a]));
                    onehot[r * l + usize::from(codes[i * nj + j])] = 1.0;
                }
                for lv in 0..l {
                    x.push(1.0);
                    x.extend(std::iter::repeat_n(0.0, cols.len() - 1));
                    onehot[(observed.len() + lv) * l + lv] = 1.0;
                }
                ItemRows { observed, x, onehot }
            })
            .collect()
    }
}

/// Coefficients on a subset of a design's columns, mapped to the original scale:
/// (term name, value) for each column of the subset.
pub fn subset_to_original(design: &crate::data::Design, columns: &[usize], beta: &[f64]) -> Vec<(String, f64)> {
    let mut full = vec![0.0; design.p()];
    for (a, col) in columns.iter().enumerate() {
        full[*col] = beta[a];
    }
    let orig = design.to_original_scale(&full);
    columns
        .iter()
        .map(|col| (design.terms[*col].name.clone(), orig[*col]))
        .collect()
}
