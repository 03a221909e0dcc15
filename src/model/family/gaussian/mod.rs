//! Gaussian components: y_i | z_i, cluster g ~ N(B_g' z_i, Sigma_g), y in R^d.
//!
//! M-step for cluster g with weights v_i = c_i tau_ig: weighted least squares
//! B_g = (Z'VZ)^-1 Z'VY, then Sigma_g = sum_i v_i r_i r_i' / sum_i v_i from the residuals
//! r_i = y_i − B_g' z_i (the maximum-likelihood divisor, not n − p).

mod chart;

use super::covariance::{self, CovarianceStructure};
use super::{
    check_values, read_state, reference_row, Block, BlockChart, BlockDesigns, Degeneracy, Family, FusedPass, Guard,
    ParamBlock, Parameter, Prepared, RowSampler,
};
use crate::data::{Dataset, Design, IndicatorSet, IndicatorValues};
use crate::error::{Error, Result};
use crate::model::gating::{Gating, GatingStats};
use crate::model::rows::{self, Base, GaussianStats, PassRows};
use crate::model::{FitData, ModelOptions};
use crate::rng::Stream;
use crate::spec::{FamilyInfo, FamilyKey, Layout, Study, TypeKind};
use nalgebra::DMatrix;
use std::sync::Arc;

/// What the spec and data layers know of the family.
pub static INFO: FamilyInfo = FamilyInfo {
    word: "gaussian",
    indicator_word: "gaussian",
    wanted: "continuous",
    types: &[TypeKind::Continuous],
    default_type: TypeKind::Continuous,
    mixed: &[TypeKind::Continuous],
    layout: Layout::Rows,
    shared_design: Some("continuous"),
    keys: &[FamilyKey::Covariance],
};

/// The family of continuous indicators.
#[derive(Debug)]
pub struct Gaussian;

/// The Gaussian family, as [`super::Families`] lists it.
pub static GAUSSIAN: Gaussian = Gaussian;

/// The parameter blocks the family writes.
const MEAN: ParamBlock = ParamBlock::effects("mean", "mean difference", false);
const COVARIANCE: ParamBlock = ParamBlock::plain("covariance");

/// Largest ratio of two continuous indicators' variances that fitting can take: beyond
/// it, rounding swamps the smaller indicator and the collapse check (relative to the
/// largest variance) cannot tell a collapsed cluster from a small scale.
pub const MAX_VARIANCE_RATIO: f64 = 1e14;

impl Family for Gaussian {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    /// Continuous indicators must have a finite, non-zero variance, on scales within
    /// [`MAX_VARIANCE_RATIO`] of each other.
    fn check(&self, study: &Study, set: &IndicatorSet) -> Result<()> {
        check_scales(study, set)
    }

    fn prepare(&self, set: &IndicatorSet, _data: &Dataset, designs: &BlockDesigns) -> Arc<dyn Prepared> {
        let design = designs.design_for(&set.names[0]);
        prepared(GaussianRows::new(set.names.clone(), Arc::clone(set.numbers()), design))
    }
}

/// The prepared block of these arrays.
pub fn prepared(rows: GaussianRows) -> Arc<dyn Prepared> {
    Arc::new(rows)
}

/// The Gaussian block's arrays for one placement.
#[derive(Debug, Clone)]
pub struct GaussianRows {
    /// Indicator names, in spec order.
    pub names: Vec<String>,
    /// Indicators, row-major n×d.
    pub y: Arc<Vec<f64>>,
    /// Indicators.
    pub d: usize,
    /// The regression design of the covariates acting on them, n×q (intercept first).
    pub design: Design,
}

impl GaussianRows {
    /// The arrays: names, the indicators (row-major, one column per name) and the design.
    pub fn new(names: Vec<String>, y: Arc<Vec<f64>>, design: Design) -> GaussianRows {
        let d = names.len();
        assert_eq!(y.len(), d * design.n, "indicators and design cover the same rows");
        GaussianRows { names, y, d, design }
    }

    /// Rows.
    pub fn n(&self) -> usize {
        self.design.n
    }

    /// Design columns.
    pub fn q(&self) -> usize {
        self.design.p()
    }

    /// What the tiled pass reads, with the shared arrays of `fd`.
    pub fn pass_rows<'a>(&'a self, fd: &FitData<'a>) -> PassRows<'a> {
        PassRows {
            n: fd.n,
            weights: fd.weights,
            w: fd.w,
            p: fd.p,
            y: &self.y,
            d: self.d,
            z: &self.design.x,
            q: self.q(),
        }
    }
}

impl Prepared for GaussianRows {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn block(self: Arc<Self>, fd: &FitData, g: usize, options: &ModelOptions) -> Box<dyn Block> {
        let mut block = GaussianComponents::new(self, fd.weights, g, options.structure);
        if options.covariance_prior {
            block = block.with_default_prior(fd.weights);
        }
        block.variance_floor = options.variance_floor;
        Box::new(block)
    }

    fn restore(
        self: Arc<Self>,
        fd: &FitData,
        g: usize,
        options: &ModelOptions,
        state: &serde_json::Value,
    ) -> std::result::Result<Box<dyn Block>, String> {
        let saved: SavedGaussian = read_state(INFO.word, state)?;
        let (d, q) = (self.d, self.q());
        check_values("coefficients", &saved.coefficients, g * q * d)?;
        check_values("variances", &saved.variances, d)?;
        if saved.variances.iter().any(|v| *v <= 0.0) {
            return Err("its indicator variances are not all positive".into());
        }
        if saved.covariances.len() != g {
            return Err(format!(
                "it has {} covariance matrices for {g} clusters",
                saved.covariances.len()
            ));
        }
        for (k, c) in saved.covariances.iter().enumerate() {
            check_values(&format!("covariance of cluster {}", k + 1), c, d * d)?;
            let s = DMatrix::from_row_slice(d, d, c);
            let scale = s.amax().max(f64::MIN_POSITIVE);
            if (&s - s.transpose()).amax() > 1e-9 * scale {
                return Err(format!("the covariance of cluster {} is not symmetric", k + 1));
            }
        }
        if let Some(o) = &saved.orientation {
            check_values("orientation", o, d * d)?;
        }
        let mut block = GaussianComponents::new(self, fd.weights, g, saved.structure);
        // The scale that judges a covariance singular is the fitted data's, saved with
        // the model: new rows (one row, an outlier) must not change it.
        block.y_var = saved.variances;
        if options.covariance_prior {
            block = block.with_default_prior(fd.weights);
        }
        block.variance_floor = options.variance_floor;
        let covs = saved
            .covariances
            .iter()
            .map(|c| DMatrix::from_row_slice(d, d, c))
            .collect();
        let mut block = block
            .with_parameters(saved.coefficients, covs)
            .map_err(|e| format!("cluster {}: {}", e.cluster, e.reason))?;
        block.set_common_orientation(saved.orientation.map(|o| DMatrix::from_row_slice(d, d, &o)));
        block.floor_hits = saved.floor_hits;
        Ok(Box::new(block))
    }

    fn seeding_columns(&self) -> Vec<Vec<f64>> {
        let (n, d) = (self.n(), self.d);
        (0..d).map(|j| (0..n).map(|i| self.y[i * d + j]).collect()).collect()
    }

    fn seeding_rows(&self) -> Option<(&[f64], usize)> {
        Some((&self.y, self.d))
    }

    fn profile_columns(&self) -> Vec<String> {
        self.names.clone()
    }
}

/// The saved state of a Gaussian block.
#[derive(Debug, serde::Serialize, serde::Deserialize)]
struct SavedGaussian {
    structure: CovarianceStructure,
    /// Coefficients on the fitting scale, `[(k q + a) d + j]`.
    coefficients: Vec<f64>,
    /// Covariance per cluster, row-major.
    covariances: Vec<Vec<f64>>,
    /// The orientation the clusters share (structures with one), row-major.
    orientation: Option<Vec<f64>>,
    /// Times the variance floor acted.
    floor_hits: usize,
    /// The (weighted) variance of each indicator in the fitted data: the scale against
    /// which a covariance counts as singular.
    variances: Vec<f64>,
}

/// ln(2π).
const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// Smallest eigenvalue of a cluster covariance, relative to the indicator's overall
/// variance, below which the cluster counts as collapsed.
pub const COLLAPSE_RATIO: f64 = 1e-8;

/// The smallest eigenvalue of the pooled within-cluster covariance Σ_k n_k Σ_k / Σ_k n_k
/// (cluster sizes `sizes`), or None when it is not a positive number.
fn pooled_smallest_eigenvalue(cov: &[DMatrix<f64>], sizes: &[f64]) -> Option<f64> {
    let total: f64 = sizes.iter().sum();
    let d = cov.first()?.nrows();
    let mut pooled = DMatrix::<f64>::zeros(d, d);
    for (c, n) in cov.iter().zip(sizes) {
        pooled += c * (n / total);
    }
    let smallest = pooled.symmetric_eigenvalues().min();
    (smallest.is_finite() && smallest > 0.0).then_some(smallest)
}

/// A Gaussian cluster is spurious when the smallest eigenvalue of its covariance is below
/// this share of the smallest eigenvalue of the pooled within-cluster covariance (the
/// clusters' covariances averaged by their sizes), or when it holds less weight than d + 1
/// rows, the fewest that give a full-rank covariance. The likelihood of a Gaussian mixture
/// is unbounded, and such clusters are its spikes (Hathaway 1985 and Ingrassia 2004 bound
/// the ratio of the clusters' eigenvalues for the same reason; the bound's value here is
/// our choice: a cluster more than about 30 times narrower, in standard deviation, than
/// the typical cluster in its narrowest direction). Within-cluster, not the data's overall
/// covariance, so that clusters far apart are not taken for spikes.
pub const SPURIOUS_EIGENVALUE_RATIO: f64 = 1e-3;

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
#[derive(Debug, Clone)]
pub struct GaussianComponents {
    /// The arrays the components are fitted to.
    pub rows: Arc<GaussianRows>,
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
    /// Empty components over `rows` with case weights `weights`; [`Block::m_step`] fills
    /// them.
    pub fn new(
        rows: Arc<GaussianRows>,
        weights: &[f64],
        g: usize,
        structure: CovarianceStructure,
    ) -> GaussianComponents {
        let (d, q) = (rows.d, rows.q());
        let total: f64 = weights.iter().sum();
        let y_mean: Vec<f64> = (0..d)
            .map(|j| rows.y.chunks_exact(d).zip(weights).map(|(y, c)| c * y[j]).sum::<f64>() / total)
            .collect();
        let y_var = (0..d)
            .map(|j| {
                rows.y
                    .chunks_exact(d)
                    .zip(weights)
                    .map(|(y, c)| c * (y[j] - y_mean[j]).powi(2))
                    .sum::<f64>()
                    / total
            })
            .collect();
        GaussianComponents {
            rows,
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
    pub fn with_default_prior(mut self, weights: &[f64]) -> GaussianComponents {
        let d = self.d;
        let y = Arc::clone(&self.rows.y);
        let total: f64 = weights.iter().sum();
        let mut mean = vec![0.0; d];
        for (y, c) in y.chunks_exact(d).zip(weights) {
            for (m, v) in mean.iter_mut().zip(y) {
                *m += c * v / total;
            }
        }
        let mut cov = DMatrix::<f64>::zeros(d, d);
        for (y, c) in y.chunks_exact(d).zip(weights) {
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
    pub fn with_parameters(mut self, coef: Vec<f64>, cov: Vec<DMatrix<f64>>) -> std::result::Result<Self, Degeneracy> {
        assert_eq!(coef.len(), self.g * self.q * self.d);
        self.coef = coef;
        for (k, s) in cov.into_iter().enumerate() {
            self.set_covariance(k, s)?;
        }
        Ok(self)
    }

    fn set_covariance(&mut self, k: usize, s: DMatrix<f64>) -> std::result::Result<(), Degeneracy> {
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
    pub fn m_step_from_stats(&mut self, st: &crate::model::GaussianStats) -> std::result::Result<(), Degeneracy> {
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
    fn finish_covariances(
        &mut self,
        mut scatter: Vec<DMatrix<f64>>,
        mut n_eff: Vec<f64>,
    ) -> std::result::Result<(), Degeneracy> {
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

impl Block for GaussianComponents {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn spurious(&self, _fd: &FitData, sizes: &[f64]) -> Option<String> {
        let d = self.d;
        if let Some(k) = sizes.iter().position(|s| *s < (d + 1) as f64) {
            return Some(format!(
                "cluster {} holds the weight of {:.1} rows, fewer than the {} a full covariance of {d} indicators needs",
                k + 1,
                sizes[k],
                d + 1
            ));
        }
        let pooled = pooled_smallest_eigenvalue(&self.cov, sizes)?;
        let (k, smallest) = self
            .cov
            .iter()
            .map(|c| c.clone().symmetric_eigenvalues().min())
            .enumerate()
            .min_by(|a, b| a.1.total_cmp(&b.1))?;
        (smallest < SPURIOUS_EIGENVALUE_RATIO * pooled).then(|| {
            format!(
                "cluster {} is {:.1e} times as narrow (smallest covariance eigenvalue) as the clusters' pooled covariance in its narrowest direction",
                k + 1,
                smallest / pooled
            )
        })
    }

    fn add_log_density(&self, out: &mut [f64]) {
        let (d, g, q) = (self.d, self.g, self.q);
        let (y_all, z_all) = (&self.rows.y, &self.rows.design.x);
        let mut mu = vec![0.0; d];
        let mut u = vec![0.0; d];
        let constant = -0.5 * d as f64 * LN_2PI;
        for k in 0..g {
            let l = &self.chol[k];
            let base = constant - 0.5 * self.log_det[k];
            let coef = &self.coef[k * q * d..(k + 1) * q * d];
            for i in 0..self.rows.n() {
                let y = &y_all[i * d..(i + 1) * d];
                let z = &z_all[i * q..(i + 1) * q];
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

    fn fused(&self) -> Option<&dyn FusedPass> {
        Some(self)
    }

    fn m_step(
        &mut self,
        fd: &FitData,
        tau: &[f64],
        sums: Option<&GaussianStats>,
    ) -> std::result::Result<(), Degeneracy> {
        if let Some(st) = sums {
            return self.m_step_from_stats(st);
        }
        // Sums around the overall means, so that large means do not cost precision.
        let (d, q) = (self.d, self.q);
        let mut at = vec![0.0; self.g * q * d];
        for block in at.chunks_exact_mut(q * d) {
            block[..d].copy_from_slice(&self.y_mean);
        }
        let rows = Arc::clone(&self.rows);
        let st = rows::gaussian_stats(&rows.pass_rows(fd), self.g, &at, tau);
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

    fn set_coordinates(&mut self, c: &[f64]) -> std::result::Result<usize, Degeneracy> {
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

    fn chart(&self) -> std::result::Result<Box<dyn BlockChart + '_>, String> {
        Ok(Box::new(chart::GaussianChart::new(self)?))
    }

    fn embed(&mut self, smaller: &dyn Block) -> std::result::Result<(), String> {
        let small = smaller
            .as_any()
            .downcast_ref::<GaussianComponents>()
            .ok_or("the smaller block is not Gaussian")?;
        if (small.g, small.d, small.structure) != (self.g, self.d, self.structure) {
            return Err("the smaller Gaussian block has other clusters, indicators or structure".into());
        }
        let names = |c: &GaussianComponents| c.rows.design.terms.iter().map(|t| t.name.clone()).collect::<Vec<_>>();
        let (large_names, small_names) = (names(self), names(small));
        let positions = super::term_positions(
            &large_names.iter().map(String::as_str).collect::<Vec<_>>(),
            &small_names.iter().map(String::as_str).collect::<Vec<_>>(),
        );
        let (d, q, qs) = (self.d, self.q, small.q);
        for k in 0..self.g {
            for (a, from) in positions.iter().enumerate() {
                for j in 0..d {
                    self.coef[(k * q + a) * d + j] = from.map_or(0.0, |b| small.coef[(k * qs + b) * d + j]);
                }
            }
            self.set_covariance(k, small.cov[k].clone()).map_err(|e| e.reason)?;
        }
        self.orientation = small.orientation.clone();
        Ok(())
    }

    fn parameters(&self) -> Vec<Parameter> {
        let (d, q) = (self.d, self.q);
        let (names, design) = (&self.rows.names, &self.rows.design);
        let mut out = Vec::new();
        for k in 0..self.g {
            for (j, name) in names.iter().enumerate() {
                let beta: Vec<f64> = (0..q).map(|a| self.coef[(k * q + a) * d + j]).collect();
                for (term, value) in design.terms.iter().zip(design.to_original_scale(&beta)) {
                    out.push(Parameter {
                        block: MEAN,
                        cluster: k + 1,
                        indicator: Some(name.clone()),
                        term: Some(term.name.clone()),
                        value,
                    });
                }
            }
            for a in 0..d {
                for b in 0..=a {
                    let pair = if a == b {
                        names[a].clone()
                    } else {
                        format!("{}~{}", names[b], names[a])
                    };
                    out.push(Parameter {
                        block: COVARIANCE,
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

    fn profile(&self, k: usize, row: Option<usize>, out: &mut Vec<f64>) {
        let q = self.q;
        let reference;
        let z = match row {
            Some(i) => &self.rows.design.x[i * q..(i + 1) * q],
            None => {
                reference = reference_row(q);
                &reference[..]
            }
        };
        let start = out.len();
        out.resize(start + self.d, 0.0);
        self.mean(k, z, &mut out[start..]);
    }

    fn guards(&self) -> Vec<Guard> {
        vec![Guard {
            name: super::VARIANCE_FLOOR_HITS,
            count: self.floor_hits,
        }]
    }

    fn sampler(&self) -> Box<dyn RowSampler + '_> {
        Box::new(GaussianSampler {
            block: self,
            chol: self
                .cov
                .iter()
                .map(|c| c.clone().cholesky().expect("a fitted covariance").l())
                .collect(),
            y: self.rows.y.to_vec(),
            mu: vec![0.0; self.d],
            e: vec![0.0; self.d],
        })
    }

    fn state(&self) -> serde_json::Value {
        let saved = SavedGaussian {
            structure: self.structure,
            coefficients: self.coef.clone(),
            covariances: self.cov.iter().map(|s| s.transpose().as_slice().to_vec()).collect(),
            orientation: self.orientation.as_ref().map(|o| o.transpose().as_slice().to_vec()),
            floor_hits: self.floor_hits,
            variances: self.y_var.clone(),
        };
        serde_json::to_value(saved).expect("numbers and words encode")
    }
}

impl FusedPass for GaussianComponents {
    fn pass(
        &self,
        fd: &FitData,
        gating: &Gating,
        base: Base,
        tau: Option<&mut [f64]>,
        gating_stats: Option<&mut GatingStats>,
        sums: Option<&mut GaussianStats>,
    ) -> f64 {
        rows::e_step(
            self.rows.pass_rows(fd),
            Some(self),
            gating,
            base,
            tau,
            gating_stats,
            sums,
        )
    }

    fn steps_from_sums(&self) -> bool {
        true
    }
}

/// Draws continuous indicators: the cluster mean at the row's covariates plus
/// L·e, with L the covariance's Cholesky factor and e standard normals.
struct GaussianSampler<'a> {
    block: &'a GaussianComponents,
    chol: Vec<DMatrix<f64>>,
    y: Vec<f64>,
    mu: Vec<f64>,
    e: Vec<f64>,
}

impl RowSampler for GaussianSampler<'_> {
    fn draw(&mut self, i: usize, k: usize, rng: &mut Stream) {
        let (d, q) = (self.block.d, self.block.q);
        self.block
            .mean(k, &self.block.rows.design.x[i * q..(i + 1) * q], &mut self.mu);
        for v in self.e.iter_mut() {
            *v = rng.normal();
        }
        for a in 0..d {
            let shift: f64 = (0..=a).map(|b| self.chol[k][(a, b)] * self.e[b]).sum();
            self.y[i * d + a] = self.mu[a] + shift;
        }
    }

    fn finish(self: Box<Self>) -> IndicatorValues {
        IndicatorValues::Rows(Arc::new(self.y))
    }
}

/// Continuous indicators must have a finite, non-zero variance, on scales within
/// [`MAX_VARIANCE_RATIO`] of each other.
fn check_scales(study: &Study, set: &IndicatorSet) -> Result<()> {
    let y = set.numbers();
    let d = set.names.len();
    if d == 0 || y.is_empty() {
        return Ok(());
    }
    let n = y.len() / d;
    let column = |name: &str| {
        study
            .indicators
            .iter()
            .find(|c| c.name == name)
            .expect("the set's indicators are the spec's")
    };
    let mut variances = Vec::with_capacity(d);
    for j in 0..d {
        let mean = (0..n).map(|i| y[i * d + j]).sum::<f64>() / n as f64;
        let var = (0..n).map(|i| (y[i * d + j] - mean).powi(2)).sum::<f64>() / n as f64;
        let c = column(&set.names[j]);
        if !var.is_finite() {
            return Err(Error::input(
                study
                    .error_at(c.span.clone(), format!("indicator '{}' has values so large that their squares overflow", c.name))
                    .help("rescale it (for example to thousands or millions of its unit) so its values stay below about 1e150"),
            ));
        }
        if !(var > 0.0) {
            return Err(Error::input(
                study
                    .error_at(
                        c.span.clone(),
                        format!("indicator '{}' has the same value in every row used", c.name),
                    )
                    .help("a constant indicator cannot separate clusters; leave it out"),
            ));
        }
        variances.push(var);
    }
    let (lo, hi) = variances.iter().enumerate().fold((0, 0), |(lo, hi), (j, v)| {
        (
            if *v < variances[lo] { j } else { lo },
            if *v > variances[hi] { j } else { hi },
        )
    });
    if variances[hi] / variances[lo] > MAX_VARIANCE_RATIO {
        let (a, b) = (column(&set.names[lo]), column(&set.names[hi]));
        return Err(Error::input(
            study
                .error_at(
                    a.span.clone(),
                    format!(
                        "indicators '{}' and '{}' are on scales too far apart to fit together (their variances differ by a factor of {:.1e})",
                        a.name, b.name,
                        variances[hi] / variances[lo]
                    ),
                )
                .help(format!("rescale one of them so their spreads are within a factor of {:.0e} of each other", MAX_VARIANCE_RATIO.sqrt())),
        ));
    }
    Ok(())
}
