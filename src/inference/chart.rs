//! A local chart of a fitted model: every free parameter as one coordinate of a flat
//! vector θ, with θ = 0 at the fit, and the observed-data score as a function of θ.
//!
//! Coordinates, in this order:
//! - gating: logit coefficients on the fitting scale (clusters 2..G), or the log odds
//!   log(π_k/π_1) of free proportions;
//! - then each component block's own chart ([`crate::model::family::BlockChart`]): the
//!   Gaussian block's coefficients and covariance coordinates (volume, shape and a
//!   Cayley-map orientation within its structure), the items' baseline-category logits,
//!   the counts' log-rate coefficients.
//!
//! The score is analytic (Fisher's identity: the responsibility-weighted complete-data
//! score), row by row, so the sandwich can use it and the observed information is its
//! central difference.

use crate::model::family::{BlockChart, Components, Degeneracy};
use crate::model::gating::{Gating, GatingStats};
use crate::model::{e_step, FitData, Model};
use crate::numerics::{log_softmax_row, log_sum_exp};

/// The flat parameter vector of a fitted model.
pub struct Chart<'a> {
    base: &'a Model,
    n_gating: usize,
    blocks: Vec<Box<dyn BlockChart + 'a>>,
    /// Where each block's coordinates begin.
    offsets: Vec<usize>,
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
        let mut blocks = Vec::with_capacity(model.components.blocks.len());
        let mut offsets = Vec::with_capacity(blocks.capacity());
        for b in &model.components.blocks {
            let chart = b.chart()?;
            offsets.push(scales.len());
            scales.extend(chart.scales());
            blocks.push(chart);
        }
        Ok(Chart {
            base: model,
            n_gating,
            blocks,
            offsets,
            len: scales.len(),
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

    /// Block `b`'s part of θ.
    fn part<'t>(&self, b: usize, theta: &'t [f64]) -> &'t [f64] {
        &theta[self.offsets[b]..self.offsets[b] + self.blocks[b].len()]
    }

    /// The model at θ.
    pub fn model(&self, theta: &[f64]) -> Result<Model, Degeneracy> {
        debug_assert_eq!(theta.len(), self.len);
        let mut gating = self.base.gating.clone();
        let gating_part = &theta[..self.n_gating];
        match &mut gating {
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
        let blocks = (0..self.blocks.len())
            .map(|b| self.blocks[b].at(self.part(b, theta)))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(Model {
            gating,
            components: Components { blocks },
        })
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
        let mut scorers: Vec<_> = model
            .components
            .blocks
            .iter()
            .enumerate()
            .map(|(b, block)| self.blocks[b].scorer(block.as_ref(), self.part(b, theta)))
            .collect();
        let mut s = vec![0.0; self.len];
        let mut log_pi = vec![0.0; g];
        let fixed_pi: Option<Vec<f64>> = match &model.gating {
            Gating::Free { log_pi } => Some(log_pi.iter().map(|l| l.exp()).collect()),
            _ => None,
        };
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
            for (b, scorer) in scorers.iter_mut().enumerate() {
                let at = self.offsets[b];
                scorer.add(i, c, t, &mut s[at..at + self.blocks[b].len()]);
            }
            visit(i, &s);
        }
        Ok(loglik)
    }

    /// The total score at θ. When the model's one block can make its part from one pass
    /// of sums (the Gaussian block, [`BlockChart::total_score`]), it is made so: the
    /// observed information calls it 2P times. Otherwise row scores are added.
    pub fn total_score(&self, theta: &[f64], data: &FitData) -> Result<Vec<f64>, Degeneracy> {
        let model = self.model(theta)?;
        if let [block] = &model.components.blocks[..] {
            let part = self.part(0, theta);
            if let Some((loglik, gating, own)) = self.blocks[0].total_score(block.as_ref(), part, data, &model.gating) {
                if !loglik.is_finite() {
                    return Err(not_finite());
                }
                let mut total = vec![0.0; self.len];
                self.gating_total(&model.gating, &gating, data, &mut total);
                total[self.offsets[0]..].copy_from_slice(&own);
                return Ok(total);
            }
        }
        let mut total = vec![0.0; self.len];
        self.row_scores(&model, theta, data, |_, s| add(&mut total, s))?;
        Ok(total)
    }

    /// The gating part of the total score from a pass's gating sums: Σ c(τ_k − π_k) w for
    /// a logit, Σ cτ_k − π_k Σ c for free shares.
    fn gating_total(&self, gating: &Gating, sums: &GatingStats, data: &FitData, total: &mut [f64]) {
        match gating {
            Gating::Logit { .. } => total[..self.n_gating].copy_from_slice(&sums.score),
            Gating::Free { log_pi } => {
                let weight: f64 = data.weights.iter().sum();
                for k in 1..log_pi.len() {
                    total[k - 1] = sums.cluster_weight[k] - log_pi[k].exp() * weight;
                }
            }
            Gating::Equal { .. } | Gating::Fixed { .. } => {}
        }
    }
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
