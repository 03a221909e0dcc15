//! Covariance structures of Gaussian components and their M-steps.
//!
//! Each cluster covariance is decomposed as Sigma_g = lambda_g D_g A_g D_g' (Banfield &
//! Raftery 1993; Celeux & Govaert 1995): volume lambda_g = |Sigma_g|^(1/d), shape A_g
//! (diagonal, determinant 1, entries in decreasing order) and orientation D_g
//! (orthogonal). Holding each part equal across clusters or letting it vary, with the
//! shape optionally spherical (A = I) and the orientation optionally along the axes
//! (D = I), gives 14 structures.
//!
//! Given the weighted residual scatter W_g = sum_i v_ig r_ig r_ig' and n_g = sum_i v_ig,
//! the M-step minimises sum_g [ n_g log|Sigma_g| + tr(W_g Sigma_g^-1) ] within the structure.
//! Closed forms are used where they exist (Celeux & Govaert 1995, Table 1 and section 3).
//! Otherwise the step alternates exact block updates, starting from the previous estimate,
//! so each update lowers the objective:
//! - volumes given a common shape/orientation and vice versa (Celeux & Govaert 1995);
//! - a common orientation D given the cluster matrices Λ_g = λ_g A_g, by the
//!   majorisation–minimisation step of Browne & McNicholas (2014): with w_g the largest
//!   eigenvalue of W_g, tr(W_g D Λ_g^-1 D') is majorised at D0 by a function linear in D,
//!   whose minimiser over orthogonal matrices is D = U V' from the SVD
//!   U S V' = Σ_g (w_g I − W_g) D0 Λ_g^-1.

use nalgebra::{DMatrix, DVector, SymmetricEigen};

pub use crate::spec::{CovarianceStructure, Orientation, Shape, Volume};

/// The M-step objective, to be minimised: Σ_g [ n_g log|Σ_g| + tr(W_g Σ_g⁻¹) ].
pub fn objective(w: &[DMatrix<f64>], n: &[f64], sigma: &[DMatrix<f64>]) -> f64 {
    w.iter()
        .zip(n)
        .zip(sigma)
        .map(|((wg, ng), s)| match s.clone().cholesky() {
            Some(c) => {
                let log_det = 2.0 * c.l().diagonal().iter().map(|x| x.ln()).sum::<f64>();
                ng * log_det + (c.inverse() * wg).trace()
            }
            None => f64::INFINITY,
        })
        .sum()
}

/// Inner iterations of the iterative M-steps.
const MAX_INNER: usize = 50;
/// Relative objective change that ends the inner iterations.
const INNER_TOLERANCE: f64 = 1e-12;

/// Eigen-decomposition with eigenvalues in decreasing order.
pub fn eigen_desc(m: &DMatrix<f64>) -> (DVector<f64>, DMatrix<f64>) {
    let e = SymmetricEigen::new(m.clone());
    let d = m.nrows();
    let mut idx: Vec<usize> = (0..d).collect();
    idx.sort_by(|a, b| e.eigenvalues[*b].total_cmp(&e.eigenvalues[*a]));
    let vals = DVector::from_iterator(d, idx.iter().map(|&i| e.eigenvalues[i]));
    let vecs = DMatrix::from_fn(d, d, |r, c| e.eigenvectors[(r, idx[c])]);
    (vals, vecs)
}

/// Geometric mean of positive numbers (the d-th root of their product).
fn geo_mean(v: impl Iterator<Item = f64>) -> f64 {
    let (mut s, mut k) = (0.0, 0usize);
    for x in v {
        s += x.max(f64::MIN_POSITIVE).ln();
        k += 1;
    }
    (s / k as f64).exp()
}

fn diag_matrix(v: &DVector<f64>) -> DMatrix<f64> {
    DMatrix::from_diagonal(v)
}

/// D diag(l) D'.
fn compose(dm: &DMatrix<f64>, l: &DVector<f64>) -> DMatrix<f64> {
    let mut out = dm * diag_matrix(l) * dm.transpose();
    // Symmetrise away rounding.
    let t = out.transpose();
    out = (out + t) * 0.5;
    out
}

/// Estimate the covariances of all clusters under `structure`.
///
/// `w` are the scatter matrices, `n` the weight sums, `previous` the current covariances
/// (the warm start of iterative steps; they satisfy the structure) and `orientation` the
/// common orientation kept between calls for the structures that have one.
pub fn estimate(
    structure: CovarianceStructure,
    w: &[DMatrix<f64>],
    n: &[f64],
    previous: &[DMatrix<f64>],
    orientation: &mut Option<DMatrix<f64>>,
) -> Vec<DMatrix<f64>> {
    let g = w.len();
    let d = w[0].nrows();
    let n_total: f64 = n.iter().sum();
    let pooled: DMatrix<f64> = w.iter().fold(DMatrix::zeros(d, d), |acc, x| acc + x);
    let diag = |m: &DMatrix<f64>| DVector::from_iterator(d, (0..d).map(|i| m[(i, i)]));
    let prev_volume = |k: usize| geo_mean(eigen_desc(&previous[k]).0.iter().copied());
    use Orientation as O;
    use Shape as S;
    use Volume as V;
    match (structure.volume, structure.shape, structure.orientation) {
        (V::Equal, S::Spherical, _) => {
            let lambda = pooled.trace() / (d as f64 * n_total);
            vec![DMatrix::identity(d, d) * lambda; g]
        }
        (V::Varying, S::Spherical, _) => (0..g)
            .map(|k| DMatrix::identity(d, d) * (w[k].trace() / (d as f64 * n[k])))
            .collect(),
        (V::Equal, S::Equal, O::Axes) => vec![diag_matrix(&(diag(&pooled) / n_total)); g],
        (V::Varying, S::Varying, O::Axes) => (0..g).map(|k| diag_matrix(&(diag(&w[k]) / n[k]))).collect(),
        (V::Equal, S::Varying, O::Axes) => {
            // Σ_g = λ A_g: A_g = diag(W_g)/|diag(W_g)|^(1/d), λ = Σ_g |diag(W_g)|^(1/d) / n.
            let dg: Vec<DVector<f64>> = w.iter().map(diag).collect();
            let roots: Vec<f64> = dg.iter().map(|v| geo_mean(v.iter().copied())).collect();
            let lambda = roots.iter().sum::<f64>() / n_total;
            dg.iter()
                .zip(&roots)
                .map(|(v, r)| diag_matrix(&(v * (lambda / r))))
                .collect()
        }
        (V::Varying, S::Equal, O::Axes) => volumes_and_diagonal_shape(w, n, (0..g).map(prev_volume).collect()),
        (V::Equal, S::Equal, O::Equal) => vec![pooled / n_total; g],
        (V::Varying, S::Varying, O::Varying) => (0..g).map(|k| &w[k] / n[k]).collect(),
        (V::Equal, S::Varying, O::Varying) => {
            // Σ_g = λ C_g, C_g = W_g/|W_g|^(1/d), λ = Σ_g |W_g|^(1/d) / n.
            let roots: Vec<f64> = w.iter().map(|m| geo_mean(eigen_desc(m).0.iter().copied())).collect();
            let lambda = roots.iter().sum::<f64>() / n_total;
            w.iter().zip(&roots).map(|(m, r)| m * (lambda / r)).collect()
        }
        (V::Equal, S::Equal, O::Varying) => {
            // D_g from W_g = L_g Ω_g L_g'; A ∝ Σ_g Ω_g; λ = |Σ_g Ω_g|^(1/d) / n.
            let eig: Vec<(DVector<f64>, DMatrix<f64>)> = w.iter().map(eigen_desc).collect();
            let omega: DVector<f64> = eig.iter().fold(DVector::zeros(d), |acc, (v, _)| acc + v);
            let lambda = geo_mean(omega.iter().copied()) / n_total;
            let a = &omega / geo_mean(omega.iter().copied());
            eig.iter().map(|(_, l)| compose(l, &(&a * lambda))).collect()
        }
        (V::Varying, S::Equal, O::Varying) => volumes_and_shape(w, n, (0..g).map(prev_volume).collect()),
        (V::Varying, S::Equal, O::Equal) => volumes_and_shared_matrix(w, n, (0..g).map(prev_volume).collect()),
        (volume, S::Varying, O::Equal) => common_orientation(volume, w, n, orientation),
    }
}

/// Σ_g = λ_g A with A diagonal (varying volume, equal shape, axis-aligned): alternate A
/// and λ_g from the volumes `lambda` of the previous estimate.
fn volumes_and_diagonal_shape(w: &[DMatrix<f64>], n: &[f64], mut lambda: Vec<f64>) -> Vec<DMatrix<f64>> {
    let (g, d) = (w.len(), w[0].nrows());
    let diag = |m: &DMatrix<f64>| DVector::from_iterator(d, (0..d).map(|i| m[(i, i)]));
    // Σ_g = λ_g A, A diagonal: alternate A and λ_g.
    let dg: Vec<DVector<f64>> = w.iter().map(diag).collect();
    let mut a = DVector::from_element(d, 1.0);
    let mut last = f64::INFINITY;
    for _ in 0..MAX_INNER {
        let c: DVector<f64> = dg
            .iter()
            .zip(&lambda)
            .fold(DVector::zeros(d), |acc, (v, l)| acc + v / *l);
        a = &c / geo_mean(c.iter().copied());
        for k in 0..g {
            lambda[k] = dg[k].component_div(&a).sum() / (d as f64 * n[k]);
        }
        let sig: Vec<DMatrix<f64>> = lambda.iter().map(|l| diag_matrix(&(&a * *l))).collect();
        let obj = objective(w, n, &sig);
        if (last - obj).abs() <= INNER_TOLERANCE * obj.abs() {
            break;
        }
        last = obj;
    }
    lambda.iter().map(|l| diag_matrix(&(&a * *l))).collect()
}

/// Σ_g = λ_g D_g A D_g′ (varying volume and orientation, equal shape): D_g from W_g;
/// alternate A ∝ Σ_g Ω_g/λ_g and λ_g = tr(Ω_g A⁻¹)/(d n_g) from the volumes `lambda`.
fn volumes_and_shape(w: &[DMatrix<f64>], n: &[f64], mut lambda: Vec<f64>) -> Vec<DMatrix<f64>> {
    let (g, d) = (w.len(), w[0].nrows());
    // D_g from W_g; alternate A ∝ Σ_g Ω_g/λ_g and λ_g = tr(Ω_g A⁻¹)/(d n_g).
    let eig: Vec<(DVector<f64>, DMatrix<f64>)> = w.iter().map(eigen_desc).collect();
    let mut a = DVector::from_element(d, 1.0);
    let mut last = f64::INFINITY;
    for _ in 0..MAX_INNER {
        let c: DVector<f64> = eig
            .iter()
            .zip(&lambda)
            .fold(DVector::zeros(d), |acc, ((v, _), l)| acc + v / *l);
        a = &c / geo_mean(c.iter().copied());
        for k in 0..g {
            lambda[k] = eig[k].0.component_div(&a).sum() / (d as f64 * n[k]);
        }
        let sig: Vec<DMatrix<f64>> = eig
            .iter()
            .zip(&lambda)
            .map(|((_, l), lam)| compose(l, &(&a * *lam)))
            .collect();
        let obj = objective(w, n, &sig);
        if (last - obj).abs() <= INNER_TOLERANCE * obj.abs() {
            break;
        }
        last = obj;
    }
    eig.iter()
        .zip(&lambda)
        .map(|((_, l), lam)| compose(l, &(&a * *lam)))
        .collect()
}

/// Σ_g = λ_g C, |C| = 1 (varying volume, equal shape and orientation): alternate
/// C ∝ Σ_g W_g/λ_g and λ_g = tr(W_g C⁻¹)/(d n_g) from the volumes `lambda`.
fn volumes_and_shared_matrix(w: &[DMatrix<f64>], n: &[f64], mut lambda: Vec<f64>) -> Vec<DMatrix<f64>> {
    let (g, d) = (w.len(), w[0].nrows());
    // Σ_g = λ_g C, |C| = 1: alternate C ∝ Σ_g W_g/λ_g and λ_g = tr(W_g C⁻¹)/(d n_g).
    let mut c = DMatrix::identity(d, d);
    let mut last = f64::INFINITY;
    for _ in 0..MAX_INNER {
        let s: DMatrix<f64> = w
            .iter()
            .zip(&lambda)
            .fold(DMatrix::zeros(d, d), |acc, (m, l)| acc + m / *l);
        c = &s / geo_mean(eigen_desc(&s).0.iter().copied());
        let c_inv = c.clone().try_inverse().unwrap_or_else(|| DMatrix::identity(d, d));
        for k in 0..g {
            lambda[k] = (&c_inv * &w[k]).trace() / (d as f64 * n[k]);
        }
        let sig: Vec<DMatrix<f64>> = lambda.iter().map(|l| &c * *l).collect();
        let obj = objective(w, n, &sig);
        if (last - obj).abs() <= INNER_TOLERANCE * obj.abs() {
            break;
        }
        last = obj;
    }
    lambda.iter().map(|l| &c * *l).collect()
}

/// Σ_g = D Λ_g D' with a common orientation D and diagonal Λ_g: λ A_g (equal volume) or
/// λ_g A_g (varying volume). Alternates Λ_g given D (closed form) and D given Λ_g (MM).
fn common_orientation(
    volume: Volume,
    w: &[DMatrix<f64>],
    n: &[f64],
    orientation: &mut Option<DMatrix<f64>>,
) -> Vec<DMatrix<f64>> {
    let g = w.len();
    let d = w[0].nrows();
    let n_total: f64 = n.iter().sum();
    let mut dm = orientation.clone().unwrap_or_else(|| {
        let pooled: DMatrix<f64> = w.iter().fold(DMatrix::zeros(d, d), |acc, x| acc + x);
        eigen_desc(&pooled).1
    });
    let top: Vec<f64> = w.iter().map(|m| eigen_desc(m).0[0]).collect();
    let lambdas = |dm: &DMatrix<f64>| -> Vec<DVector<f64>> {
        let omega: Vec<DVector<f64>> = w
            .iter()
            .map(|m| (dm.transpose() * m * dm).diagonal().map(|x| x.max(f64::MIN_POSITIVE)))
            .collect();
        match volume {
            Volume::Varying => omega.iter().zip(n).map(|(o, ng)| o / *ng).collect(),
            Volume::Equal => {
                let roots: Vec<f64> = omega.iter().map(|o| geo_mean(o.iter().copied())).collect();
                let lambda = roots.iter().sum::<f64>() / n_total;
                omega.iter().zip(&roots).map(|(o, r)| o * (lambda / r)).collect()
            }
        }
    };
    let mut lam = lambdas(&dm);
    let compose_all =
        |dm: &DMatrix<f64>, lam: &[DVector<f64>]| -> Vec<DMatrix<f64>> { lam.iter().map(|l| compose(dm, l)).collect() };
    let mut last = objective(w, n, &compose_all(&dm, &lam));
    for _ in 0..MAX_INNER {
        let before = (dm.clone(), lam.clone());
        // D given Λ_g: a few majorisation–minimisation steps.
        for _ in 0..5 {
            let mut f = DMatrix::<f64>::zeros(d, d);
            for k in 0..g {
                let m = DMatrix::identity(d, d) * top[k] - &w[k];
                let inv = lam[k].map(|x| 1.0 / x);
                f += m * &dm * diag_matrix(&inv);
            }
            let svd = f.svd(true, true);
            match (svd.u, svd.v_t) {
                (Some(u), Some(v_t)) => dm = u * v_t,
                _ => break,
            }
        }
        lam = lambdas(&dm);
        let obj = objective(w, n, &compose_all(&dm, &lam));
        if !(obj <= last) {
            // When the largest eigenvalue of a scatter is the majoriser's own constant, the
            // step's matrix is singular and the SVD may return a worse orientation (seen
            // with one cluster, where the eigenvectors are already the answer): keep the
            // previous orientation, so that the M-step never lowers the likelihood.
            (dm, lam) = before;
            break;
        }
        if (last - obj).abs() <= INNER_TOLERANCE * obj.abs() {
            break;
        }
        last = obj;
    }
    *orientation = Some(dm.clone());
    lam.iter().map(|l| compose(&dm, l)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn random_scatter(seed: u64, d: usize, g: usize) -> (Vec<DMatrix<f64>>, Vec<f64>) {
        let mut s = crate::rng::Stream::new(seed, "scatter");
        let mut w = Vec::new();
        let mut n = Vec::new();
        for _ in 0..g {
            let rows = 20 + s.index(40);
            let m = DMatrix::from_fn(rows, d, |_, j| s.normal() * (1.0 + j as f64) + 0.3 * s.normal());
            w.push(m.transpose() * &m);
            n.push(rows as f64);
        }
        (w, n)
    }

    fn commute(a: &DMatrix<f64>, b: &DMatrix<f64>) -> bool {
        let ab = a * b;
        (&ab - b * a).amax() <= 1e-6 * ab.amax()
    }

    fn shape(m: &DMatrix<f64>) -> DVector<f64> {
        let v = eigen_desc(m).0;
        &v / geo_mean(v.iter().copied())
    }

    /// Every structure's estimate satisfies its constraints and does not raise the M-step
    /// objective above that of the previous estimate (the warm start).
    #[test]
    fn m_steps_respect_the_structure_and_never_lose_ground() {
        for seed in 0..25u64 {
            for d in [2usize, 3, 4] {
                let g = 2 + (seed as usize % 3);
                let (w_old, n_old) = random_scatter(seed, d, g);
                let (w, n) = random_scatter(seed + 1000, d, g);
                for s in CovarianceStructure::all() {
                    let mut orient = None;
                    let previous = estimate(s, &w_old, &n_old, &vec![DMatrix::identity(d, d); g], &mut orient);
                    let sigma = estimate(s, &w, &n, &previous, &mut orient);
                    let (before, after) = (objective(&w, &n, &previous), objective(&w, &n, &sigma));
                    assert!(
                        after <= before + 1e-9 * before.abs(),
                        "{}: {after} > {before}",
                        s.describe()
                    );
                    // Better than or equal to the unconstrained optimum's structure-free bound.
                    let free = objective(
                        &w,
                        &n,
                        &estimate(CovarianceStructure::UNCONSTRAINED, &w, &n, &previous, &mut None),
                    );
                    assert!(
                        after >= free - 1e-9 * free.abs(),
                        "{} beats the unconstrained optimum",
                        s.describe()
                    );
                    let dets: Vec<f64> = sigma.iter().map(|m| m.determinant()).collect();
                    if s.volume == Volume::Equal {
                        assert!(
                            dets.iter().all(|x| (x - dets[0]).abs() <= 1e-8 * dets[0]),
                            "{}: {dets:?}",
                            s.describe()
                        );
                    }
                    match s.shape {
                        Shape::Spherical => {
                            for m in &sigma {
                                assert!((m - DMatrix::identity(d, d) * m[(0, 0)]).amax() <= 1e-12 * m[(0, 0)]);
                            }
                        }
                        Shape::Equal => {
                            let a0 = shape(&sigma[0]);
                            assert!(
                                sigma.iter().all(|m| (shape(m) - &a0).amax() <= 1e-6 * a0.amax()),
                                "{}",
                                s.describe()
                            );
                        }
                        Shape::Varying => {}
                    }
                    match s.orientation {
                        Orientation::Axes => {
                            for m in &sigma {
                                assert!(
                                    (m - DMatrix::from_diagonal(&m.diagonal())).amax() == 0.0,
                                    "{}",
                                    s.describe()
                                );
                            }
                        }
                        Orientation::Equal if s.shape != Shape::Spherical => {
                            assert!(sigma.iter().all(|m| commute(m, &sigma[0])), "{}", s.describe());
                        }
                        _ => {}
                    }
                }
            }
        }
    }
}
