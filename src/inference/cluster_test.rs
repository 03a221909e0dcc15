//! Bootstrap likelihood-ratio test of G against G − 1 clusters (McLachlan 1987).
//!
//! The likelihood-ratio statistic of a mixture does not follow its textbook chi-squared
//! distribution (the null lies on the boundary of the parameter space), so its null
//! distribution is simulated: B data sets are drawn from the fitted (G − 1)-cluster model
//! (covariates, exposure, case weights and the pattern of missing item values kept as
//! observed), each is fitted with G − 1 and with G clusters, and the p-value is
//! (1 + #{LR_b ≥ LR}) / (1 + B). Replicates run in parallel, each on its own random
//! streams, so the result does not depend on the thread count.

use crate::data::Dataset;
use crate::fit::{assemble, fit_cell, fit_data, FitResult, PreparedPlacement};
use crate::model::Model;
use crate::rng::Stream;
use crate::spec::Study;
use rayon::prelude::*;
use serde::Serialize;

/// The test of one placement's chosen cluster count.
#[derive(Debug, Clone, Serialize, schemars::JsonSchema)]
pub struct ClusterCountTest {
    /// Placement.
    pub placement: String,
    /// G, tested against G − 1.
    pub clusters: usize,
    /// Observed statistic 2(ℓ_G − ℓ_{G−1}).
    pub statistic: f64,
    /// Replicates drawn.
    pub replicates: usize,
    /// Replicates whose two refits were both usable.
    pub usable: usize,
    /// Usable replicates whose statistic reached the observed one.
    pub reached: usize,
    /// Bootstrap p-value (1 + reached) / (1 + usable).
    pub p_value: f64,
}

/// A data set drawn from `model` at the rows of `data`: clusters from the gating network,
/// indicators from the cluster's components (each block draws its own, in block order,
/// row by row); covariates, weights, exposure and missing item values as observed.
pub fn draw(model: &Model, data: &Dataset, prepared: &PreparedPlacement, rng: &mut Stream) -> Dataset {
    let fd = fit_data(data, prepared);
    let g = model.clusters();
    let mut samplers: Vec<_> = model.components.blocks.iter().map(|b| b.sampler()).collect();
    let mut log_pi = vec![0.0; g];
    for i in 0..data.n() {
        model.gating.log_priors(&fd.w[i * fd.p..(i + 1) * fd.p], &mut log_pi);
        let pi: Vec<f64> = log_pi.iter().map(|l| l.exp()).collect();
        let k = rng.weighted_index(&pi);
        for s in samplers.iter_mut() {
            s.draw(i, k, rng);
        }
    }
    let mut out = data.clone();
    for (set, sampler) in out.indicator_sets.iter_mut().zip(samplers) {
        set.values = sampler.finish();
    }
    out
}

/// Test each listed fit's cluster count G ≥ 2 against G − 1 with `replicates` bootstrap
/// replicates. The (G − 1)-cluster fit is taken from `fits` (same placement and
/// structure) or fitted here.
pub fn test(
    study: &Study,
    data: &Dataset,
    prepared: &[PreparedPlacement],
    fits: &[FitResult],
    which: &[usize],
    replicates: usize,
) -> Vec<ClusterCountTest> {
    let mut out = Vec::new();
    for &fi in which {
        let f = &fits[fi];
        let (g, structure) = (f.clusters, f.structure);
        let Some(alt_ll) = f.loglik().filter(|_| g >= 2) else {
            continue;
        };
        let pp = &prepared[f.placement_index];
        let fit_at = |d: &Dataset, pp: &PreparedPlacement, g: usize, streams: &str| -> FitResult {
            fit_cell(&f.spec.with(g, streams), d, pp)
        };
        let null_fit = fits
            .iter()
            .find(|x| x.placement_index == f.placement_index && x.clusters == g - 1 && x.structure == structure)
            .cloned()
            .unwrap_or_else(|| fit_at(data, pp, g - 1, "start"));
        let Some(null_best) = &null_fit.best else { continue };
        let statistic = 2.0 * (alt_ll - null_best.run.loglik);
        let draws: Vec<Option<f64>> = (0..replicates)
            .into_par_iter()
            .map(|b| {
                let label = format!("cluster-count|{}|{g}|{}|{}", f.placement, structure.describe(), b + 1);
                let mut rng = Stream::new(study.seed, &format!("{label}|draw"));
                let sim = draw(&null_best.run.model, data, pp, &mut rng);
                let sim_pp = assemble(
                    &sim,
                    &pp.placement,
                    pp.gating.clone(),
                    pp.components.clone(),
                    &pp.families,
                );
                let l0 = fit_at(&sim, &sim_pp, g - 1, &label).loglik()?;
                let l1 = fit_at(&sim, &sim_pp, g, &label).loglik()?;
                Some(2.0 * (l1 - l0))
            })
            .collect();
        let ok: Vec<f64> = draws.into_iter().flatten().collect();
        let reached = ok.iter().filter(|x| **x >= statistic).count();
        out.push(ClusterCountTest {
            placement: f.placement.clone(),
            clusters: g,
            statistic,
            replicates,
            usable: ok.len(),
            reached,
            p_value: (1 + reached) as f64 / (1 + ok.len()) as f64,
        });
    }
    out
}
