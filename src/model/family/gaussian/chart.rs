//! The Gaussian block's local chart for inference: the regression coefficients as they
//! are, and the covariances moved through volume, shape and orientation within their
//! structure (Σ_g = λ_g D_g A_g D_g′ moved away from the fit by log λ_g + v,
//! log A_g + (u_1, …, u_{d−1}, −Σu) and D_g = D̂_g (I − K)⁻¹(I + K) with K skew-symmetric,
//! the Cayley map), each part shared or per cluster as the structure says, so every θ is
//! a covariance of the fitted structure and the coordinates number exactly the
//! structure's parameters. The score is analytic (Fisher's identity: the
//! responsibility-weighted complete-data score).

use super::GaussianComponents;
use crate::model::family::covariance::eigen_desc;
use crate::model::family::{Block, BlockChart, Degeneracy, RowScorer};
use crate::model::gating::{Gating, GatingStats};
use crate::model::{rows, FitData};
use crate::spec::{CovarianceStructure, Orientation, Shape, Volume};
use nalgebra::{DMatrix, DVector};

/// Largest relative difference allowed between the fit's covariances and the chart's
/// reconstruction of them at θ = 0.
const RECONSTRUCTION_TOLERANCE: f64 = 1e-7;

/// The Gaussian block's chart: its coefficients, then its covariance coordinates.
pub struct GaussianChart<'a> {
    base: &'a GaussianComponents,
    n_mean: usize,
    cov: CovarianceChart,
}

impl<'a> GaussianChart<'a> {
    /// The chart of a fitted block; fails when its covariances do not decompose within
    /// their structure.
    pub fn new(base: &'a GaussianComponents) -> Result<GaussianChart<'a>, String> {
        Ok(GaussianChart {
            base,
            n_mean: base.coef.len(),
            cov: CovarianceChart::new(base)?,
        })
    }

    /// Σ⁻¹ and each covariance coordinate's (index in this block's part of θ, ∂Σ/∂θ,
    /// tr(Σ⁻¹ ∂Σ/∂θ)) per cluster of `gc`, the block at `theta`.
    fn terms(&self, gc: &GaussianComponents, theta: &[f64]) -> GaussianTerms {
        let cov_part = &theta[self.n_mean..self.n_mean + self.cov.len];
        let mut inverse = Vec::with_capacity(gc.g);
        let mut derivatives = Vec::with_capacity(gc.g);
        for k in 0..gc.g {
            let inv = gc.cov[k]
                .clone()
                .try_inverse()
                .unwrap_or_else(|| DMatrix::identity(gc.d, gc.d));
            let (_, ds) = self.cov.sigma(k, cov_part, true);
            derivatives.push(
                ds.into_iter()
                    .map(|(index, m)| {
                        let trace = (&inv * &m).trace();
                        (self.n_mean + index, m, trace)
                    })
                    .collect(),
            );
            inverse.push(inv);
        }
        GaussianTerms { inverse, derivatives }
    }
}

/// The block at θ as the Gaussian components it is.
fn gaussian(block: &dyn Block) -> &GaussianComponents {
    block
        .as_any()
        .downcast_ref::<GaussianComponents>()
        .expect("a Gaussian chart scores Gaussian blocks")
}

impl BlockChart for GaussianChart<'_> {
    fn len(&self) -> usize {
        self.n_mean + self.cov.len
    }

    fn scales(&self) -> Vec<f64> {
        let gc = self.base;
        let mut scales = Vec::with_capacity(self.len());
        for k in 0..gc.g {
            for _a in 0..gc.q {
                scales.extend((0..gc.d).map(|j| gc.cov[k][(j, j)].sqrt()));
            }
        }
        scales.extend(std::iter::repeat_n(1.0, self.cov.len));
        scales
    }

    fn at(&self, theta: &[f64]) -> Result<Box<dyn Block>, Degeneracy> {
        let gc = self.base;
        let (mean_part, cov_part) = theta.split_at(self.n_mean);
        let mut coef = gc.coef.clone();
        for (a, b) in coef.iter_mut().zip(mean_part) {
            *a += b;
        }
        let covs = (0..gc.g)
            .map(|k| self.cov.sigma(k, &cov_part[..self.cov.len], false).0)
            .collect();
        Ok(Box::new(gc.clone().with_parameters(coef, covs)?))
    }

    fn scorer<'b>(&'b self, block: &'b dyn Block, theta: &'b [f64]) -> Box<dyn RowScorer + 'b> {
        let gc = gaussian(block);
        Box::new(GaussianScorer {
            gc,
            terms: self.terms(gc, theta),
            r: vec![0.0; gc.d],
            u: vec![0.0; gc.d],
        })
    }

    /// The total score from one pass of sums (no per-row score): with v = cτ, r the
    /// residual and u = Σ⁻¹r,
    /// - means: Σ v z u′ = (Σ v z r′) Σ⁻¹;
    /// - covariances: ½ Σ v (u′Mu − tr Σ⁻¹M) = ½ (tr(M Σ⁻¹(Σ v r r′)Σ⁻¹) − tr(Σ⁻¹M) Σ v)
    ///   for each coordinate's M = ∂Σ/∂θ.
    ///
    /// The same sums as the row scorer adds row by row, in another order.
    fn total_score(
        &self,
        block: &dyn Block,
        theta: &[f64],
        fd: &FitData,
        gating: &Gating,
    ) -> Option<(f64, GatingStats, Vec<f64>)> {
        let gc = gaussian(block);
        let (loglik, gating_sums, sums) = rows::score_sums(gc.rows.pass_rows(fd), gc, gating);
        if !loglik.is_finite() {
            return Some((loglik, gating_sums, Vec::new()));
        }
        let terms = self.terms(gc, theta);
        let mut total = vec![0.0; self.len()];
        let (d, q) = (gc.d, gc.q);
        for k in 0..gc.g {
            let inv = &terms.inverse[k];
            let zr = DMatrix::from_row_slice(q, d, &sums.zr[k * q * d..(k + 1) * q * d]);
            let mean_score = zr * inv;
            let base = k * q * d;
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
        Some((loglik, gating_sums, total))
    }
}

/// Per cluster at one θ: Σ⁻¹, and each covariance coordinate's (index, ∂Σ/∂θ, tr(Σ⁻¹ ∂Σ/∂θ)).
struct GaussianTerms {
    inverse: Vec<DMatrix<f64>>,
    derivatives: Vec<Vec<(usize, DMatrix<f64>, f64)>>,
}

/// Row scores of the Gaussian block at one θ.
struct GaussianScorer<'a> {
    gc: &'a GaussianComponents,
    terms: GaussianTerms,
    r: Vec<f64>,
    u: Vec<f64>,
}

impl RowScorer for GaussianScorer<'_> {
    fn add(&mut self, i: usize, c: f64, t: &[f64], s: &mut [f64]) {
        let gc = self.gc;
        let (d, q) = (gc.d, gc.q);
        let y = &gc.rows.y[i * d..(i + 1) * d];
        let z = &gc.rows.design.x[i * q..(i + 1) * q];
        let (r, u) = (&mut self.r, &mut self.u);
        for (k, tk) in t.iter().enumerate() {
            let v = c * tk;
            if v == 0.0 {
                continue;
            }
            gc.mean(k, z, r);
            for (rj, yj) in r.iter_mut().zip(y) {
                *rj = yj - *rj;
            }
            let inv = &self.terms.inverse[k];
            for (a, ua) in u.iter_mut().enumerate() {
                *ua = (0..d).map(|b| inv[(a, b)] * r[b]).sum();
            }
            let base = k * q * d;
            for (a, za) in z.iter().enumerate() {
                for (j, uj) in u.iter().enumerate() {
                    s[base + a * d + j] += v * za * uj;
                }
            }
            for (index, m, trace) in &self.terms.derivatives[k] {
                let mut quad = 0.0;
                for a in 0..d {
                    let row: f64 = (0..d).map(|b| m[(a, b)] * u[b]).sum();
                    quad += u[a] * row;
                }
                s[*index] += v * 0.5 * (quad - trace);
            }
        }
    }
}

/// How a part of the covariance (volume, shape or orientation) is held across clusters.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Copies {
    /// Not estimated (a spherical shape, axis-aligned orientation, one indicator).
    None,
    /// One for every cluster.
    Shared,
    /// One per cluster.
    PerCluster,
}

impl Copies {
    /// How many copies of the part there are for `g` clusters.
    fn count(self, g: usize) -> usize {
        match self {
            Copies::None => 0,
            Copies::Shared => 1,
            Copies::PerCluster => g,
        }
    }

    fn of_volume(v: Volume) -> Copies {
        match v {
            Volume::Equal => Copies::Shared,
            Volume::Varying => Copies::PerCluster,
        }
    }

    fn of_shape(s: Shape, d: usize) -> Copies {
        match s {
            _ if d == 1 => Copies::None,
            Shape::Spherical => Copies::None,
            Shape::Equal => Copies::Shared,
            Shape::Varying => Copies::PerCluster,
        }
    }

    fn of_orientation(o: Orientation, d: usize) -> Copies {
        match o {
            _ if d == 1 => Copies::None,
            Orientation::Axes => Copies::None,
            Orientation::Equal => Copies::Shared,
            Orientation::Varying => Copies::PerCluster,
        }
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
        let volumes = Copies::of_volume(s.volume).count(g);
        let shapes = Copies::of_shape(s.shape, d).count(g);
        let orientations = Copies::of_orientation(s.orientation, d).count(g);
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
