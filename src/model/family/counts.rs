//! Count components: Poisson log-linear regressions, independent given the cluster.
//!
//! Count c in cluster k: y_c | z ~ Poisson(μ), log μ = β_kc' z + log(exposure), so that
//! exp(β) are rate ratios and exp(intercept) the rate per unit of exposure at the
//! reference covariate values. log f = y log μ − μ − log y!; at y = 0 it is −μ exactly
//! (no 0·log 0 is formed, so a cluster whose rate is 0 is handled).
//!
//! M-step, with weights v_i = c_i τ_ik: without covariates the closed form
//! exp(β) = Σ v y / Σ v exposure; with covariates one Newton step with step-halving per EM
//! iteration ([`crate::model::glm`]), a generalised EM step.

use super::items::subset_to_original;
use super::{ComponentFamily, Degeneracy, Naming, Parameter};
use crate::model::glm::{fit_poisson, PoissonRows};
use crate::model::FitData;

/// Largest |coefficient| (fitting scale) taken as estimable: a log rate ratio of 50 is a
/// factor of 5e21, so a larger value means a cluster's events are separated by covariates.
pub const SEPARATION_LOG_RATE: f64 = 50.0;

/// Parameters of G clusters' count regressions.
#[derive(Debug, Clone, PartialEq)]
pub struct CountComponents {
    /// Clusters.
    pub g: usize,
    /// Count names.
    pub names: Vec<String>,
    /// Design columns per count (intercept first).
    pub terms: Vec<Vec<usize>>,
    /// Per count: coefficients on the fitting scale, `[k * q + a]`.
    pub coef: Vec<Vec<f64>>,
    /// Whether an M-step has run (the first one starts each regression from scratch).
    pub started: bool,
}

impl CountComponents {
    /// Empty parameters for the data's counts; [`ComponentFamily::m_step`] fills them.
    pub fn new(data: &FitData, g: usize, names: Vec<String>) -> CountComponents {
        let ct = data.counts.expect("count components need count data");
        let terms = ct.terms.to_vec();
        let coef = terms.iter().map(|t| vec![0.0; g * t.len()]).collect();
        CountComponents {
            g,
            names,
            terms,
            coef,
            started: false,
        }
    }

    /// Linear predictor of count c in cluster k for one row's full design `z` (without the
    /// offset).
    pub fn eta(&self, c: usize, k: usize, z: &[f64]) -> f64 {
        let q = self.terms[c].len();
        self.coef[c][k * q..(k + 1) * q]
            .iter()
            .zip(&self.terms[c])
            .map(|(b, a)| b * z[*a])
            .sum()
    }
}

impl ComponentFamily for CountComponents {
    fn add_log_density(&self, data: &FitData, out: &mut [f64]) {
        let ct = data.counts.expect("count data");
        let (g, nc, qz, n) = (self.g, self.terms.len(), ct.qz, data.n);
        for i in 0..n {
            let z = &ct.z[i * qz..(i + 1) * qz];
            let offset = ct.log_exposure.map_or(0.0, |o| o[i]);
            let row = &mut out[i * g..(i + 1) * g];
            for c in 0..nc {
                let y = ct.y[c * n + i];
                let lf = ct.ln_factorial[c * n + i];
                for (k, o) in row.iter_mut().enumerate() {
                    let eta = self.eta(c, k, z) + offset;
                    *o += if y == 0.0 { -eta.exp() } else { y * eta - eta.exp() - lf };
                }
            }
        }
    }

    fn m_step(&mut self, data: &FitData, tau: &[f64]) -> Result<(), Degeneracy> {
        let ct = data.counts.expect("count data");
        let (g, nc, n) = (self.g, self.terms.len(), data.n);
        let ones;
        let exposure = match ct.exposure {
            Some(e) => e,
            None => {
                ones = vec![1.0; n];
                &ones
            }
        };
        for c in 0..nc {
            let q = self.terms[c].len();
            let y = &ct.y[c * n..(c + 1) * n];
            let x = &ct.x[c];
            for k in 0..g {
                let v: Vec<f64> = (0..n).map(|i| data.weights[i] * tau[i * g + k]).collect();
                let sy: f64 = v.iter().zip(y).map(|(a, b)| a * b).sum();
                let se: f64 = v.iter().zip(exposure).map(|(a, b)| a * b).sum();
                if !(se > 0.0) {
                    return Err(Degeneracy {
                        cluster: k + 1,
                        reason: "it holds no rows (no exposure) for its count rates".to_string(),
                    });
                }
                let block = k * q..(k + 1) * q;
                if q == 1 {
                    // Closed form; a rate of 0 (log −∞) is the maximum when Σ v y = 0.
                    self.coef[c][k] = (sy / se).ln();
                    continue;
                }
                if !(sy > 1e-12 * se) {
                    return Err(Degeneracy {
                        cluster: k + 1,
                        reason: format!(
                            "it has no events of '{}', so a rate regression on covariates cannot be estimated; drop the covariates from this count (acts_on) or fit fewer clusters",
                            self.names[c]
                        ),
                    });
                }
                let mut start = self.coef[c][block.clone()].to_vec();
                if !self.started {
                    start.fill(0.0);
                    start[0] = (sy / se).ln();
                }
                let rows = PoissonRows {
                    x,
                    q,
                    y,
                    offset: ct.log_exposure,
                    weights: &v,
                };
                let fit = fit_poisson(&rows, &start, 1);
                if fit.beta.iter().any(|b| !(b.abs() <= SEPARATION_LOG_RATE)) {
                    return Err(Degeneracy {
                        cluster: k + 1,
                        reason: format!(
                            "the rate of '{}' inside it grows without bound along a covariate (separation); restrict the covariates with acts_on or fit fewer clusters",
                            self.names[c]
                        ),
                    });
                }
                self.coef[c][block].copy_from_slice(&fit.beta);
            }
        }
        self.started = true;
        Ok(())
    }

    fn n_params(&self) -> usize {
        self.g * self.terms.iter().map(Vec::len).sum::<usize>()
    }

    fn permute(&mut self, order: &[usize]) {
        for (v, t) in self.coef.iter_mut().zip(&self.terms) {
            let q = t.len();
            *v = order.iter().flat_map(|&k| v[k * q..(k + 1) * q].to_vec()).collect();
        }
    }

    /// The log-rate coefficients as they are.
    fn push_coordinates(&self, out: &mut Vec<f64>) {
        for v in &self.coef {
            out.extend_from_slice(v);
        }
    }

    fn set_coordinates(&mut self, c: &[f64]) -> Result<usize, Degeneracy> {
        let mut read = 0;
        for v in &mut self.coef {
            let len = v.len();
            v.copy_from_slice(&c[read..read + len]);
            read += len;
        }
        Ok(read)
    }

    fn parameters(&self, naming: Naming) -> Vec<Parameter> {
        let mut out = Vec::new();
        for k in 0..self.g {
            for c in 0..self.terms.len() {
                let q = self.terms[c].len();
                let beta = &self.coef[c][k * q..(k + 1) * q];
                out.push(Parameter {
                    block: "count_rate",
                    cluster: k + 1,
                    indicator: Some(self.names[c].clone()),
                    term: None,
                    value: beta[0].exp(),
                });
                for (term, value) in subset_to_original(naming.components, &self.terms[c], beta) {
                    out.push(Parameter {
                        block: "count_log_rate",
                        cluster: k + 1,
                        indicator: Some(self.names[c].clone()),
                        term: Some(term),
                        value,
                    });
                }
            }
        }
        out
    }
}
