//! A local chart of a fitted model: every free parameter as one coordinate of a flat
//! vector θ, with θ = 0 at the fit, and the observed-data score as a function of θ.
//!
//! Coordinates, in this order:
//! - gating: logit coefficients on the fitting scale (clusters 2..G), or the log odds
//!   log(π_k/π_1) of free proportions;
//! - gaussian means: the regression coefficients on the fitting scale;
//! - covariances: the decomposition Σ_g = λ_g D_g A_g D_g' moved away from the fit by
//!   log λ_g + v, log A_g + (u_1, …, u_{d−1}, −Σu) and D_g = D̂_g (I − K)⁻¹(I + K) with K
//!   skew-symmetric (the Cayley map), each part shared or per cluster as the structure
//!   says, so every θ is a covariance of the fitted structure and the coordinates number
//!   exactly the structure's parameters;
//! - items: the baseline-category logits of each item (per level above the first, per
//!   design term);
//! - counts: the log-rate coefficients on the fitting scale.
//!
//! The score is analytic (Fisher's identity: the responsibility-weighted complete-data
//! score), row by row, so the sandwich can use it and the observed information is its
//! central difference.

use crate::data::MISSING_ITEM;
use crate::model::family::covariance::eigen_desc;
use crate::model::family::{CovarianceStructure, Degeneracy, GaussianComponents, Orientation, Shape, Volume};
use crate::model::gating::Gating;
use crate::numerics::{log_softmax_row, log_sum_exp};
use crate::model::{e_step, rows, FitData, Model};
use nalgebra::{DMatrix, DVector};

/// Largest relative difference allowed between the fit's covariances and the chart's
/// reconstruction of them at θ = 0.
const RECONSTRUCTION_TOLERANCE: f64 = 1e-7;

/// The flat parameter vector of a fitted model.
#[derive(Debug, Clone)]
pub struct Chart<'a> {
    base: &'a Model,
    n_gating: usize,
    n_mean: usize,
    cov: Option<CovarianceChart>,
    item_offsets: Vec<usize>,
    count_offsets: Vec<usize>,
    len: usize,
    scales: Vec<f64>,
}

impl<'a> Chart<'a> {
    /// The chart of `model`. Fails when a parameter sits on the boundary (an item level
    /// with probability 0) or the covariances cannot be decomposed in their structure.
    pub fn new(model: &'a Model) -> Result<Chart<'a>, String> {
        let n_gating = match &model.gating {
            Gating::Logit { gamma, .. } => gamma.len(),
            Gating::Free { log_pi } => log_pi.len() - 1,
            Gating::Equal { .. } | Gating::Fixed { .. } => 0,
        };
        let mut scales = vec![1.0; n_gating];
        let (mut n_mean, mut cov) = (0, None);
        if let Some(gc) = &model.components.gaussian {
            n_mean = gc.coef.len();
            for k in 0..gc.g {
                for _a in 0..gc.q {
                    scales.extend((0..gc.d).map(|j| gc.cov[k][(j, j)].sqrt()));
                }
            }
            let chart = CovarianceChart::new(gc)?;
            scales.extend(std::iter::repeat_n(1.0, chart.len));
            cov = Some(chart);
        }
        let mut offset = scales.len();
        let mut item_offsets = Vec::new();
        if let Some(it) = &model.components.items {
            for (j, l) in it.levels.iter().enumerate() {
                if it.terms[j].len() == 1 && it.log_prob[j].iter().any(|v| !v.is_finite()) {
                    return Err(format!(
                        "a level of item '{}' has probability 0 in some cluster, a boundary \
                         where standard errors do not exist; set [indicators] smoothing",
                        it.names[j]
                    ));
                }
                item_offsets.push(offset);
                offset += it.g * (l - 1) * it.terms[j].len();
            }
        }
        let mut count_offsets = Vec::new();
        if let Some(ct) = &model.components.counts {
            for c in 0..ct.terms.len() {
                count_offsets.push(offset);
                offset += ct.coef[c].len();
            }
        }
        scales.resize(offset, 1.0);
        Ok(Chart {
            base: model,
            n_gating,
            n_mean,
            cov,
            item_offsets,
            count_offsets,
            len: offset,
            scales,
        })
    }

    /// Number of coordinates (the model's free parameters).
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether the model has no free parameter.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// A natural step size for coordinate j (a cluster's standard deviation for a mean
    /// coefficient, 1 for coordinates on a log or logit scale).
    pub fn scale(&self, j: usize) -> f64 {
        self.scales[j]
    }

    /// The model at θ.
    pub fn model(&self, theta: &[f64]) -> Result<Model, Degeneracy> {
        debug_assert_eq!(theta.len(), self.len);
        let mut m = self.base.clone();
        let (gating_part, rest) = theta.split_at(self.n_gating);
        match &mut m.gating {
            Gating::Logit { gamma, .. } => add(gamma, gating_part),
            Gating::Free { log_pi } => {
                let base = log_pi[0];
                let mut eta: Vec<f64> = log_pi.iter().map(|l| l - base).collect();
                add(&mut eta[1..], gating_part);
                let lse = log_sum_exp(&eta);
                *log_pi = eta.iter().map(|e| e - lse).collect();
            }
            Gating::Equal { .. } | Gating::Fixed { .. } => {}
        }
        let (mean_part, rest) = rest.split_at(self.n_mean);
        if let (Some(gc), Some(chart)) = (&mut m.components.gaussian, &self.cov) {
            let cov_part = &rest[..chart.len];
            let mut coef = gc.coef.clone();
            add(&mut coef, mean_part);
            let covs = (0..gc.g).map(|k| chart.sigma(k, cov_part, false).0).collect();
            *gc = gc.clone().with_parameters(coef, covs)?;
        }
        if let Some(it) = &mut m.components.items {
            for (j, &off) in self.item_offsets.iter().enumerate() {
                let l = it.levels[j];
                let q = it.terms[j].len();
                let part = &theta[off..off + it.g * (l - 1) * q];
                if q > 1 {
                    add(&mut it.coef[j], part);
                    continue;
                }
                for k in 0..it.g {
                    let lp = &mut it.log_prob[j][k * l..(k + 1) * l];
                    let mut eta: Vec<f64> = lp.iter().map(|v| v - lp[0]).collect();
                    add(&mut eta[1..], &part[k * (l - 1)..(k + 1) * (l - 1)]);
                    let lse = log_sum_exp(&eta);
                    for (o, e) in lp.iter_mut().zip(&eta) {
                        *o = e - lse;
                    }
                }
            }
        }
        if let Some(ct) = &mut m.components.counts {
            for (c, &off) in self.count_offsets.iter().enumerate() {
                let len = ct.coef[c].len();
                add(&mut ct.coef[c], &theta[off..off + len]);
            }
        }
        Ok(m)
    }

    /// One pass over the rows at θ: `visit(i, s_i)` gets each row's score (weighted by the
    /// row's case weight, so the scores sum to the score of the weighted
    /// log-likelihood). Returns that log-likelihood.
    pub fn scores(&self, theta: &[f64], data: &FitData, visit: impl FnMut(usize, &[f64])) -> Result<f64, Degeneracy> {
        self.row_scores(&self.model(theta)?, theta, data, visit)
    }

    /// [`Chart::scores`] of `model`, the model at θ.
    fn row_scores(
        &self,
        model: &Model,
        theta: &[f64],
        data: &FitData,
        mut visit: impl FnMut(usize, &[f64]),
    ) -> Result<f64, Degeneracy> {
        let g = model.clusters();
        let mut tau = vec![0.0; data.n * g];
        let loglik = e_step(model, data, &mut tau, None);
        if !loglik.is_finite() {
            return Err(not_finite());
        }
        let gauss = self.gaussian_terms(model, theta);
        let mut s = vec![0.0; self.len];
        let mut log_pi = vec![0.0; g];
        let fixed_pi: Option<Vec<f64>> = match &model.gating {
            Gating::Free { log_pi } => Some(log_pi.iter().map(|l| l.exp()).collect()),
            _ => None,
        };
        let (mut r, mut u) = (vec![0.0; data.d], vec![0.0; data.d]);
        let mut eta = Vec::new();
        for i in 0..data.n {
            s.fill(0.0);
            let c = data.weights[i];
            let t = &tau[i * g..(i + 1) * g];
            match &model.gating {
                Gating::Logit { gamma, p, .. } => {
                    let w = &data.w[i * p..(i + 1) * p];
                    log_softmax_row(gamma, *p, w, &mut log_pi);
                    for k in 1..g {
                        let resid = c * (t[k] - log_pi[k].exp());
                        for (a, wa) in w.iter().enumerate() {
                            s[(k - 1) * p + a] += resid * wa;
                        }
                    }
                }
                Gating::Free { .. } => {
                    let pi = fixed_pi.as_deref().unwrap_or(&[]);
                    for k in 1..g {
                        s[k - 1] += c * (t[k] - pi[k]);
                    }
                }
                Gating::Equal { .. } | Gating::Fixed { .. } => {}
            }
            if let (Some(gc), Some(terms)) = (&model.components.gaussian, &gauss) {
                let (d, q) = (gc.d, gc.q);
                let y = &data.y[i * d..(i + 1) * d];
                let z = &data.z[i * q..(i + 1) * q];
                for k in 0..g {
                    let v = c * t[k];
                    if v == 0.0 {
                        continue;
                    }
                    gc.mean(k, z, &mut r);
                    for (rj, yj) in r.iter_mut().zip(y) {
                        *rj = yj - *rj;
                    }
                    let inv = &terms.inverse[k];
                    for (a, ua) in u.iter_mut().enumerate() {
                        *ua = (0..d).map(|b| inv[(a, b)] * r[b]).sum();
                    }
                    let base = self.n_gating + k * q * d;
                    for (a, za) in z.iter().enumerate() {
                        for (j, uj) in u.iter().enumerate() {
                            s[base + a * d + j] += v * za * uj;
                        }
                    }
                    for (index, m, trace) in &terms.derivatives[k] {
                        let mut quad = 0.0;
                        for a in 0..d {
                            let row: f64 = (0..d).map(|b| m[(a, b)] * u[b]).sum();
                            quad += u[a] * row;
                        }
                        s[*index] += v * 0.5 * (quad - trace);
                    }
                }
            }
            if let (Some(it), Some(idata)) = (&model.components.items, &data.items) {
                let nj = it.levels.len();
                let z = &idata.z[i * idata.qz..(i + 1) * idata.qz];
                for (j, &code) in idata.codes[i * nj..(i + 1) * nj].iter().enumerate() {
                    if code == MISSING_ITEM {
                        continue;
                    }
                    let (l, q) = (it.levels[j], it.terms[j].len());
                    for k in 0..g {
                        let v = c * t[k];
                        if v == 0.0 {
                            continue;
                        }
                        for level in 1..l {
                            let p = it.log_probability(j, k, z, level, &mut eta).exp();
                            let resid = v * (f64::from(u8::from(usize::from(code) == level)) - p);
                            let at = self.item_offsets[j] + (k * (l - 1) + level - 1) * q;
                            for (a, col) in it.terms[j].iter().enumerate() {
                                s[at + a] += resid * z[*col];
                            }
                        }
                    }
                }
            }
            if let (Some(ct), Some(cdata)) = (&model.components.counts, &data.counts) {
                let z = &cdata.z[i * cdata.qz..(i + 1) * cdata.qz];
                let offset = cdata.log_exposure.map_or(0.0, |o| o[i]);
                for (cc, terms) in ct.terms.iter().enumerate() {
                    let y = cdata.y[cc * data.n + i];
                    let q = terms.len();
                    for k in 0..g {
                        let v = c * t[k];
                        if v == 0.0 {
                            continue;
                        }
                        let resid = v * (y - (ct.eta(cc, k, z) + offset).exp());
                        let at = self.count_offsets[cc] + k * q;
                        for (a, col) in terms.iter().enumerate() {
                            s[at + a] += resid * z[*col];
                        }
                    }
                }
            }
            visit(i, &s);
        }
        Ok(loglik)
    }

    /// The total score at θ. For Gaussian components alone it is made from sums over
    /// rows (see [`Chart::total_score_from_sums`]); otherwise row scores are added.
    pub fn total_score(&self, theta: &[f64], data: &FitData) -> Result<Vec<f64>, Degeneracy> {
        let model = self.model(theta)?;
        let c = &model.components;
        if let (Some(gc), None, None) = (&c.gaussian, &c.items, &c.counts) {
            return self.total_score_from_sums(&model, gc, theta, data);
        }
        let mut total = vec![0.0; self.len];
        self.row_scores(&model, theta, data, |_, s| add(&mut total, s))?;
        Ok(total)
    }

    /// The total score of a model with Gaussian components alone, from one pass of sums
    /// (no per-row score): with v = cτ, r the residual and u = Σ⁻¹r,
    /// - gating: Σ c(τ_k − π_k) w, or Σ cτ_k − π_k Σ c for free shares;
    /// - means: Σ v z u′ = (Σ v z r′) Σ⁻¹;
    /// - covariances: ½ Σ v (u′Mu − tr Σ⁻¹M) = ½ (tr(M Σ⁻¹(Σ v r r′)Σ⁻¹) − tr(Σ⁻¹M) Σ v)
    ///   for each coordinate's M = ∂Σ/∂θ.
    ///
    /// The same sums as [`Chart::scores`] adds row by row, in another order.
    fn total_score_from_sums(
        &self,
        model: &Model,
        gc: &GaussianComponents,
        theta: &[f64],
        data: &FitData,
    ) -> Result<Vec<f64>, Degeneracy> {
        let (loglik, gating, sums) = rows::score_sums(*data, gc, &model.gating);
        if !loglik.is_finite() {
            return Err(not_finite());
        }
        let terms = self
            .gaussian_terms(model, theta)
            .expect("a Gaussian block has its covariance coordinates");
        let mut total = vec![0.0; self.len];
        match &model.gating {
            Gating::Logit { .. } => total[..self.n_gating].copy_from_slice(&gating.score),
            Gating::Free { log_pi } => {
                let weight: f64 = data.weights.iter().sum();
                for k in 1..gc.g {
                    total[k - 1] = gating.cluster_weight[k] - log_pi[k].exp() * weight;
                }
            }
            Gating::Equal { .. } | Gating::Fixed { .. } => {}
        }
        let (d, q) = (gc.d, gc.q);
        for k in 0..gc.g {
            let inv = &terms.inverse[k];
            let zr = DMatrix::from_row_slice(q, d, &sums.zr[k * q * d..(k + 1) * q * d]);
            let mean_score = zr * inv;
            let base = self.n_gating + k * q * d;
            for a in 0..q {
                for j in 0..d {
                    total[base + a * d + j] += mean_score[(a, j)];
                }
            }
            let rr_k = &sums.rr[k * d * d..(k + 1) * d * d];
            let rr = DMatrix::from_fn(d, d, |a, b| rr_k[a.max(b) * d + a.min(b)]);
            let spread = inv * rr * inv;
            for (index, m, trace) in &terms.derivatives[k] {
                let quad = (m * &spread).trace();
                total[*index] += 0.5 * (quad - trace * sums.weight[k]);
            }
        }
        Ok(total)
    }

    fn gaussian_terms(&self, model: &Model, theta: &[f64]) -> Option<GaussianTerms> {
        let gc = model.components.gaussian.as_ref()?;
        let chart = self.cov.as_ref()?;
        let start = self.n_gating + self.n_mean;
        let cov_part = &theta[start..start + chart.len];
        let mut inverse = Vec::with_capacity(gc.g);
        let mut derivatives = Vec::with_capacity(gc.g);
        for k in 0..gc.g {
            let inv = gc.cov[k]
                .clone()
                .try_inverse()
                .unwrap_or_else(|| DMatrix::identity(gc.d, gc.d));
            let (_, ds) = chart.sigma(k, cov_part, true);
            derivatives.push(
                ds.into_iter()
                    .map(|(index, m)| {
                        let trace = (&inv * &m).trace();
                        (start + index, m, trace)
                    })
                    .collect(),
            );
            inverse.push(inv);
        }
        Some(GaussianTerms { inverse, derivatives })
    }
}

/// Per cluster at one θ: Σ⁻¹, and each covariance coordinate's (index, ∂Σ/∂θ, tr(Σ⁻¹ ∂Σ/∂θ)).
struct GaussianTerms {
    inverse: Vec<DMatrix<f64>>,
    derivatives: Vec<Vec<(usize, DMatrix<f64>, f64)>>,
}

fn not_finite() -> Degeneracy {
    Degeneracy {
        cluster: 1,
        reason: "the log-likelihood is not finite near the fit".to_string(),
    }
}

fn add(x: &mut [f64], delta: &[f64]) {
    for (a, b) in x.iter_mut().zip(delta) {
        *a += b;
    }
}

/// How many copies of a covariance part the structure has: 0 (fixed), 1 (shared) or G.
fn copies(equal: bool, varying: bool, g: usize) -> usize {
    if varying {
        g
    } else {
        usize::from(equal)
    }
}

/// The covariance coordinates: volume, shape and orientation moved away from the fit.
#[derive(Debug, Clone)]
pub struct CovarianceChart {
    d: usize,
    log_volume: Vec<f64>,
    log_shape: Vec<DVector<f64>>,
    orientation: Vec<DMatrix<f64>>,
    volumes: usize,
    shapes: usize,
    orientations: usize,
    len: usize,
}

impl CovarianceChart {
    /// Decompose the fitted covariances within their structure.
    pub fn new(gc: &GaussianComponents) -> Result<CovarianceChart, String> {
        let (d, g) = (gc.d, gc.g);
        let s: CovarianceStructure = gc.structure;
        let volumes = copies(s.volume == Volume::Equal, s.volume == Volume::Varying, g);
        let shapes = if d > 1 {
            copies(s.shape == Shape::Equal, s.shape == Shape::Varying, g)
        } else {
            0
        };
        let orientations = if d > 1 {
            copies(
                s.orientation == Orientation::Equal,
                s.orientation == Orientation::Varying,
                g,
            )
        } else {
            0
        };
        let log_det = |m: &DMatrix<f64>| {
            m.clone()
                .cholesky()
                .map(|c| 2.0 * c.l().diagonal().iter().map(|x| x.ln()).sum::<f64>())
        };
        let mut log_volume = Vec::with_capacity(g);
        for k in 0..g {
            let ld = log_det(&gc.cov[k]).ok_or("a cluster covariance is not positive definite")?;
            log_volume.push(ld / d as f64);
        }
        if volumes == 1 {
            let mean = log_volume.iter().sum::<f64>() / g as f64;
            log_volume.fill(mean);
        }
        let orientation: Vec<DMatrix<f64>> = match s.orientation {
            _ if orientations == 0 => vec![DMatrix::identity(d, d); g],
            Orientation::Equal => {
                let common = gc
                    .common_orientation()
                    .cloned()
                    .unwrap_or_else(|| eigen_desc(&gc.cov[0]).1);
                vec![common; g]
            }
            _ => gc.cov.iter().map(|c| eigen_desc(c).1).collect(),
        };
        let mut log_shape: Vec<DVector<f64>> = (0..g)
            .map(|k| {
                if s.shape == Shape::Spherical {
                    return DVector::zeros(d);
                }
                let rot = orientation[k].transpose() * &gc.cov[k] * &orientation[k];
                let mut la = DVector::from_fn(d, |j, _| rot[(j, j)].max(f64::MIN_POSITIVE).ln());
                let mean = la.mean();
                la.add_scalar_mut(-mean);
                la
            })
            .collect();
        if shapes == 1 {
            let mean = log_shape.iter().fold(DVector::zeros(d), |acc, v| acc + v) / g as f64;
            log_shape.fill(mean);
        }
        let len = volumes + shapes * d.saturating_sub(1) + orientations * d * d.saturating_sub(1) / 2;
        let chart = CovarianceChart {
            d,
            log_volume,
            log_shape,
            orientation,
            volumes,
            shapes,
            orientations,
            len,
        };
        let zero = vec![0.0; len];
        for k in 0..g {
            let back = chart.sigma(k, &zero, false).0;
            let size = gc.cov[k].abs().max();
            if (&back - &gc.cov[k]).abs().max() > RECONSTRUCTION_TOLERANCE * size {
                return Err(format!(
                    "cluster {}'s covariance does not decompose within its structure ({})",
                    k + 1,
                    s.describe()
                ));
            }
        }
        Ok(chart)
    }

    /// Number of covariance coordinates (the structure's parameter count).
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether the chart has no coordinate.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    fn copy(count: usize, k: usize) -> usize {
        if count == 1 {
            0
        } else {
            k
        }
    }

    /// Σ_k at the coordinates `theta` (this chart's part of θ) and, if asked, its
    /// derivative along each coordinate that moves it: (coordinate, ∂Σ_k/∂θ).
    pub fn sigma(&self, k: usize, theta: &[f64], derivatives: bool) -> (DMatrix<f64>, Vec<(usize, DMatrix<f64>)>) {
        let d = self.d;
        let mut out = Vec::new();
        let vol_index = (self.volumes > 0).then(|| Self::copy(self.volumes, k));
        let lambda = (self.log_volume[k] + vol_index.map_or(0.0, |v| theta[v])).exp();
        let shape_start = self.volumes + Self::copy(self.shapes, k) * (d - 1);
        let mut la = self.log_shape[k].clone();
        if self.shapes > 0 {
            for j in 0..d - 1 {
                la[j] += theta[shape_start + j];
                la[d - 1] -= theta[shape_start + j];
            }
        }
        let a = la.map(f64::exp);
        let amat = DMatrix::from_diagonal(&a);
        let orient_start = self.volumes + self.shapes * (d - 1) + Self::copy(self.orientations, k) * d * (d - 1) / 2;
        let (rot, cayley_c) = if self.orientations > 0 {
            let mut kmat = DMatrix::<f64>::zeros(d, d);
            let mut m = 0;
            for r in 0..d {
                for c in r + 1..d {
                    kmat[(r, c)] = theta[orient_start + m];
                    kmat[(c, r)] = -theta[orient_start + m];
                    m += 1;
                }
            }
            let eye = DMatrix::<f64>::identity(d, d);
            let c = (&eye - &kmat).try_inverse().unwrap_or_else(|| eye.clone());
            let q = &c * (&eye + &kmat);
            (&self.orientation[k] * q, Some(c))
        } else {
            (self.orientation[k].clone(), None)
        };
        let sigma = lambda * &rot * &amat * rot.transpose();
        if !derivatives {
            return (sigma, out);
        }
        if let Some(v) = vol_index {
            out.push((v, sigma.clone()));
        }
        if self.shapes > 0 {
            for j in 0..d - 1 {
                let mut da = DVector::zeros(d);
                da[j] = a[j];
                da[d - 1] = -a[d - 1];
                out.push((
                    shape_start + j,
                    lambda * &rot * DMatrix::from_diagonal(&da) * rot.transpose(),
                ));
            }
        }
        if let Some(c) = cayley_c {
            let mut m = 0;
            for r in 0..d {
                for col in r + 1..d {
                    let mut e = DMatrix::<f64>::zeros(d, d);
                    e[(r, col)] = 1.0;
                    e[(col, r)] = -1.0;
                    let d_rot = &self.orientation[k] * (2.0 * &c * e * &c);
                    let part = &d_rot * &amat * rot.transpose();
                    out.push((orient_start + m, lambda * (&part + part.transpose())));
                    m += 1;
                }
            }
        }
        (sigma, out)
    }
}
