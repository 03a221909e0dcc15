//! Gaussian components: y_i | z_i, cluster g ~ N(B_g' z_i, Sigma_g), y in R^d.
//!
//! M-step for cluster g with weights v_i = c_i tau_ig: weighted least squares
//! B_g = (Z'VZ)^-1 Z'VY, then Sigma_g = sum_i v_i r_i r_i' / sum_i v_i from the residuals
//! r_i = y_i − B_g' z_i (the maximum-likelihood divisor, not n − p).

use super::covariance::{self, CovarianceStructure};
use super::{ComponentFamily, Degeneracy, Naming, Parameter};
use crate::model::FitData;
use nalgebra::DMatrix;

/// ln(2π).
const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// Smallest eigenvalue of a cluster covariance, relative to the indicator's overall
/// variance, below which the cluster counts as collapsed.
pub const COLLAPSE_RATIO: f64 = 1e-8;

/// A conjugate (inverse-Wishart) prior on each cluster covariance: the M-step then gives
/// the posterior mode (Fraley & Raftery 2007), which keeps covariances away from
/// singularity. Defaults there: `dof` = d + 2 and `scale` = the data covariance / G^(2/d).
#[derive(Debug, Clone, PartialEq)]
pub struct CovariancePrior {
    /// Scale matrix Λ_p.
    pub scale: DMatrix<f64>,
    /// Degrees of freedom ν_p.
    pub dof: f64,
}

/// Parameters of G Gaussian regression components.
#[derive(Debug, Clone, PartialEq)]
pub struct GaussianComponents {
    /// Clusters.
    pub g: usize,
    /// Indicators.
    pub d: usize,
    /// Component design columns (intercept included).
    pub q: usize,
    /// Structure.
    pub structure: CovarianceStructure,
    /// Coefficients on the fitting scale, `coef[(k * q + a) * d + j]`.
    pub coef: Vec<f64>,
    /// Covariance per cluster.
    pub cov: Vec<DMatrix<f64>>,
    /// Lower Cholesky factor per cluster, row-major d×d (kept in step with `cov`).
    chol: Vec<Vec<f64>>,
    /// Log-determinant per cluster.
    log_det: Vec<f64>,
    /// Overall variance of each indicator, the yardstick for collapse.
    y_var: Vec<f64>,
    /// Overall weighted mean of each indicator: the first M-step takes its sums around it.
    y_mean: Vec<f64>,
    /// Common orientation kept between M-steps (structures with one).
    orientation: Option<DMatrix<f64>>,
    /// Optional covariance prior.
    pub prior: Option<CovariancePrior>,
    /// Variance floor relative to the smallest indicator variance (0 = off).
    pub variance_floor: f64,
    /// How many times the floor raised an eigenvalue, over all M-steps.
    pub floor_hits: usize,
}

impl GaussianComponents {
    /// Empty components sized for the data; call [`ComponentFamily::m_step`] to fill them.
    pub fn new(data: &FitData, g: usize, structure: CovarianceStructure) -> GaussianComponents {
        let (d, q) = (data.d, data.q);
        let total: f64 = data.weights.iter().sum();
        let y_mean: Vec<f64> = (0..d)
            .map(|j| {
                data.y
                    .chunks_exact(d)
                    .zip(data.weights)
                    .map(|(y, c)| c * y[j])
                    .sum::<f64>()
                    / total
            })
            .collect();
        let y_var = (0..d)
            .map(|j| {
                data.y
                    .chunks_exact(d)
                    .zip(data.weights)
                    .map(|(y, c)| c * (y[j] - y_mean[j]).powi(2))
                    .sum::<f64>()
                    / total
            })
            .collect();
        GaussianComponents {
            g,
            d,
            q,
            structure,
            coef: vec![0.0; g * q * d],
            cov: vec![DMatrix::identity(d, d); g],
            chol: vec![DMatrix::<f64>::identity(d, d).transpose().as_slice().to_vec(); g],
            log_det: vec![0.0; g],
            y_var,
            y_mean,
            orientation: None,
            prior: None,
            variance_floor: 0.0,
            floor_hits: 0,
        }
    }

    /// Use the default conjugate prior of Fraley & Raftery (2007) for these data:
    /// ν_p = d + 2, Λ_p = (weighted data covariance) / G^(2/d).
    pub fn with_default_prior(mut self, data: &FitData) -> GaussianComponents {
        let d = self.d;
        let total: f64 = data.weights.iter().sum();
        let mut mean = vec![0.0; d];
        for (y, c) in data.y.chunks_exact(d).zip(data.weights) {
            for (m, v) in mean.iter_mut().zip(y) {
                *m += c * v / total;
            }
        }
        let mut cov = DMatrix::<f64>::zeros(d, d);
        for (y, c) in data.y.chunks_exact(d).zip(data.weights) {
            for a in 0..d {
                for b in 0..d {
                    cov[(a, b)] += c * (y[a] - mean[a]) * (y[b] - mean[b]) / total;
                }
            }
        }
        let scale = cov / (self.g as f64).powf(2.0 / d as f64);
        self.prior = Some(CovariancePrior {
            scale,
            dof: d as f64 + 2.0,
        });
        self
    }

    /// Set parameters directly (simulation truth, tests); fails if a covariance is not
    /// positive definite.
    pub fn with_parameters(mut self, coef: Vec<f64>, cov: Vec<DMatrix<f64>>) -> Result<Self, Degeneracy> {
        assert_eq!(coef.len(), self.g * self.q * self.d);
        self.coef = coef;
        for (k, s) in cov.into_iter().enumerate() {
            self.set_covariance(k, s)?;
        }
        Ok(self)
    }

    fn set_covariance(&mut self, k: usize, s: DMatrix<f64>) -> Result<(), Degeneracy> {
        let collapsed = || Degeneracy {
            cluster: k + 1,
            reason: "its covariance is singular (the cluster collapsed onto a point or a line)".to_string(),
        };
        let eig = s.clone().symmetric_eigenvalues();
        let scale = self.y_var.iter().copied().fold(0.0, f64::max).max(f64::MIN_POSITIVE);
        if eig.iter().any(|e| !e.is_finite() || *e <= COLLAPSE_RATIO * scale) {
            return Err(collapsed());
        }
        let chol = s.clone().cholesky().ok_or_else(collapsed)?;
        let l = chol.l();
        self.log_det[k] = 2.0 * (0..self.d).map(|i| l[(i, i)].ln()).sum::<f64>();
        self.chol[k] = l.transpose().as_slice().to_vec(); // column-major of L' = row-major of L
        self.cov[k] = s;
        Ok(())
    }

    /// The orientation shared by all clusters, when the structure has one and the M-step
    /// kept it.
    pub fn common_orientation(&self) -> Option<&DMatrix<f64>> {
        self.orientation.as_ref()
    }

    /// Set the shared orientation the M-step keeps between iterations (restoring a saved
    /// fit; it starts the next iterative M-step, and the inference chart reads it).
    pub fn set_common_orientation(&mut self, orientation: Option<DMatrix<f64>>) {
        self.orientation = orientation;
    }

    /// The inverse of each cluster's lower Cholesky factor, d×d row-major per cluster:
    /// the E-step's Mahalanobis distance is |L⁻¹(y − μ)|².
    pub fn inverse_cholesky(&self) -> Vec<f64> {
        let d = self.d;
        let mut out = vec![0.0; self.g * d * d];
        for (l, inv) in self.chol.iter().zip(out.chunks_exact_mut(d * d)) {
            // Forward substitution for each column of L X = I.
            for col in 0..d {
                for r in col..d {
                    let mut s = if r == col { 1.0 } else { 0.0 };
                    for c in col..r {
                        s -= l[r * d + c] * inv[c * d + col];
                    }
                    inv[r * d + col] = s / l[r * d + r];
                }
            }
        }
        out
    }

    /// −½(d ln 2π + ln det Σ_k) per cluster: the log-density at the cluster mean.
    pub fn log_density_constants(&self) -> Vec<f64> {
        let constant = -0.5 * self.d as f64 * LN_2PI;
        self.log_det.iter().map(|ld| constant - 0.5 * ld).collect()
    }

    /// The M-step from sums taken around coefficients `st.at` (see
    /// [`crate::model::GaussianStats`]): weighted least squares for the coefficients, then
    /// the structure's covariance estimate from the scatter about the new means.
    pub fn m_step_from_stats(&mut self, st: &crate::model::GaussianStats) -> Result<(), Degeneracy> {
        let (d, q, g) = (self.d, self.q, self.g);
        let needed = (d + q) as f64;
        let mut scatter = Vec::with_capacity(g);
        for k in 0..g {
            if st.rows[k] < needed {
                return Err(Degeneracy {
                    cluster: k + 1,
                    reason: format!(
                        "it holds {:.1} effective rows, fewer than the {needed} its mean and covariance need",
                        st.rows[k]
                    ),
                });
            }
            let zz = &st.zz[k * q * q..(k + 1) * q * q];
            let zr = &st.zr[k * q * d..(k + 1) * q * d];
            let a_mat = DMatrix::from_fn(q, q, |a, b| if b <= a { zz[a * q + b] } else { zz[b * q + a] });
            let rhs = DMatrix::from_fn(q, d, |a, j| zr[a * d + j]);
            let delta = a_mat.cholesky().map(|c| c.solve(&rhs)).ok_or_else(|| Degeneracy {
                cluster: k + 1,
                reason: "its component covariates are collinear among the rows it holds".to_string(),
            })?;
            for a in 0..q {
                for j in 0..d {
                    let i = (k * q + a) * d + j;
                    self.coef[i] = st.at[i] + delta[(a, j)];
                }
            }
            // Scatter about the new means: Σ v r r′ − (Σ v z r′)′ Δ.
            let rr = &st.rr[k * d * d..(k + 1) * d * d];
            let mut w = DMatrix::zeros(d, d);
            for a in 0..d {
                for b in 0..=a {
                    let correction: f64 = (0..q).map(|c| zr[c * d + a] * delta[(c, b)]).sum();
                    w[(a, b)] = rr[a * d + b] - correction;
                    w[(b, a)] = w[(a, b)];
                }
            }
            scatter.push(w);
        }
        self.finish_covariances(scatter, st.weight.clone())
    }

    /// Prior, structure and variance floor applied to the scatter matrices.
    fn finish_covariances(&mut self, mut scatter: Vec<DMatrix<f64>>, mut n_eff: Vec<f64>) -> Result<(), Degeneracy> {
        let d = self.d;
        if let Some(prior) = &self.prior {
            // Posterior mode: the structure's M-step on the augmented scatter.
            for (w, n) in scatter.iter_mut().zip(n_eff.iter_mut()) {
                *w += &prior.scale;
                *n += prior.dof + d as f64 + 1.0;
            }
        }
        let estimates = covariance::estimate(self.structure, &scatter, &n_eff, &self.cov, &mut self.orientation);
        let floor = self.variance_floor * self.y_var.iter().copied().fold(f64::INFINITY, f64::min);
        for (k, mut cov) in estimates.into_iter().enumerate() {
            if floor > 0.0 {
                // Raise eigenvalues below the floor; counted, because the estimate then
                // leaves the exact maximiser (and, for shared parts, the structure).
                let e = nalgebra::SymmetricEigen::new(cov.clone());
                if e.eigenvalues.iter().any(|v| *v < floor) {
                    self.floor_hits += 1;
                    let raised = e.eigenvalues.map(|v| v.max(floor));
                    cov = &e.eigenvectors * DMatrix::from_diagonal(&raised) * e.eigenvectors.transpose();
                }
            }
            self.set_covariance(k, cov)?;
        }
        Ok(())
    }

    /// Overall standard deviation of each indicator (kept off 0): the scale of its
    /// extrapolation coordinates.
    fn indicator_sds(&self) -> Vec<f64> {
        self.y_var.iter().map(|v| v.sqrt().max(f64::MIN_POSITIVE)).collect()
    }

    /// Mean of cluster k for one row of the component design, into `out`.
    pub fn mean(&self, k: usize, z: &[f64], out: &mut [f64]) {
        out.fill(0.0);
        let base = k * self.q * self.d;
        for (a, za) in z.iter().enumerate() {
            let row = &self.coef[base + a * self.d..base + (a + 1) * self.d];
            for (o, b) in out.iter_mut().zip(row) {
                *o += za * b;
            }
        }
    }
}

impl ComponentFamily for GaussianComponents {
    fn add_log_density(&self, data: &FitData, out: &mut [f64]) {
        let (d, g, q) = (self.d, self.g, self.q);
        let mut mu = vec![0.0; d];
        let mut u = vec![0.0; d];
        let constant = -0.5 * d as f64 * LN_2PI;
        for k in 0..g {
            let l = &self.chol[k];
            let base = constant - 0.5 * self.log_det[k];
            let coef = &self.coef[k * q * d..(k + 1) * q * d];
            for i in 0..data.n {
                let y = &data.y[i * d..(i + 1) * d];
                let z = &data.z[i * q..(i + 1) * q];
                mu.copy_from_slice(&coef[..d]);
                for a in 1..q {
                    for (m, b) in mu.iter_mut().zip(&coef[a * d..(a + 1) * d]) {
                        *m += z[a] * b;
                    }
                }
                // Forward substitution L u = y − mu.
                let mut quad = 0.0;
                for r in 0..d {
                    let row = &l[r * d..r * d + r + 1];
                    let mut s = y[r] - mu[r];
                    for c in 0..r {
                        s -= row[c] * u[c];
                    }
                    u[r] = s / row[r];
                    quad += u[r] * u[r];
                }
                out[i * g + k] += base - 0.5 * quad;
            }
        }
    }

    fn m_step(&mut self, data: &FitData, tau: &[f64]) -> Result<(), Degeneracy> {
        // Sums around the overall means, so that large means do not cost precision.
        let (d, q) = (self.d, self.q);
        let mut at = vec![0.0; self.g * q * d];
        for block in at.chunks_exact_mut(q * d) {
            block[..d].copy_from_slice(&self.y_mean);
        }
        let st = crate::model::rows::gaussian_stats(data, self.g, &at, tau);
        self.m_step_from_stats(&st)
    }

    fn n_params(&self) -> usize {
        self.g * self.q * self.d + self.structure.n_params(self.d, self.g)
    }

    fn log_prior(&self) -> f64 {
        let Some(prior) = &self.prior else { return 0.0 };
        let d = self.d as f64;
        (0..self.g)
            .map(|k| {
                // Σ⁻¹ from the Cholesky factor: tr(Λ Σ⁻¹) = Σ_j |L⁻¹ λ_j|² over Λ's columns.
                let l = DMatrix::from_row_slice(self.d, self.d, &self.chol[k]);
                let inv = l.try_inverse().unwrap_or_else(|| DMatrix::identity(self.d, self.d));
                let tr = (&inv * &prior.scale * inv.transpose()).trace();
                -0.5 * (prior.dof + d + 1.0) * self.log_det[k] - 0.5 * tr
            })
            .sum()
    }

    fn permute(&mut self, order: &[usize]) {
        let block = self.q * self.d;
        let coef = order
            .iter()
            .flat_map(|&k| self.coef[k * block..(k + 1) * block].to_vec())
            .collect();
        self.coef = coef;
        self.cov = order.iter().map(|&k| self.cov[k].clone()).collect();
        self.chol = order.iter().map(|&k| self.chol[k].clone()).collect();
        self.log_det = order.iter().map(|&k| self.log_det[k]).collect();
        // Clusters sharing one orientation keep it under relabelling.
    }

    /// Each coefficient, then each cluster's lower Cholesky factor (row by row, diagonal
    /// included), divided by its indicator's overall standard deviation. Any factor gives
    /// a covariance LL′ that is at least semi-definite.
    fn push_coordinates(&self, out: &mut Vec<f64>) {
        let d = self.d;
        let sd = self.indicator_sds();
        for (i, b) in self.coef.iter().enumerate() {
            out.push(b / sd[i % d]);
        }
        for l in &self.chol {
            for r in 0..d {
                out.extend(l[r * d..r * d + r + 1].iter().map(|v| v / sd[r]));
            }
        }
    }

    fn set_coordinates(&mut self, c: &[f64]) -> Result<usize, Degeneracy> {
        let d = self.d;
        let sd = self.indicator_sds();
        let n_coef = self.coef.len();
        for (i, (b, v)) in self.coef.iter_mut().zip(&c[..n_coef]).enumerate() {
            *b = v * sd[i % d];
        }
        let mut read = n_coef;
        for k in 0..self.g {
            let mut l = DMatrix::zeros(d, d);
            for r in 0..d {
                for col in 0..=r {
                    l[(r, col)] = c[read] * sd[r];
                    read += 1;
                }
            }
            let cov = &l * l.transpose();
            self.set_covariance(k, cov)?;
        }
        Ok(read)
    }

    fn parameters(&self, naming: Naming) -> Vec<Parameter> {
        let (d, q) = (self.d, self.q);
        let mut out = Vec::new();
        for k in 0..self.g {
            for j in 0..d {
                let beta: Vec<f64> = (0..q).map(|a| self.coef[(k * q + a) * d + j]).collect();
                for (term, value) in naming.design.terms.iter().zip(naming.design.to_original_scale(&beta)) {
                    out.push(Parameter {
                        block: "mean",
                        cluster: k + 1,
                        indicator: Some(naming.indicators[j].clone()),
                        term: Some(term.name.clone()),
                        value,
                    });
                }
            }
            for a in 0..d {
                for b in 0..=a {
                    let pair = if a == b {
                        naming.indicators[a].clone()
                    } else {
                        format!("{}~{}", naming.indicators[b], naming.indicators[a])
                    };
                    out.push(Parameter {
                        block: "covariance",
                        cluster: k + 1,
                        indicator: Some(pair),
                        term: None,
                        value: self.cov[k][(a, b)],
                    });
                }
            }
        }
        out
    }
}
