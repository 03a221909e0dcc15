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

use super::{
    check_values, read_state, reference_row, subset_to_original, Block, BlockChart, BlockDesigns, Degeneracy, Family,
    Guard, ParamBlock, Parameter, Prepared, RowSampler, RowScorer,
};
use crate::data::{Dataset, Design, IndicatorSet, IndicatorValues, MISSING_ITEM};
use crate::model::gating::{fit_multinomial_logit, LogitRows};
use crate::model::{FitData, ModelOptions};
use crate::numerics::log_sum_exp;
use crate::rng::Stream;
use crate::spec::{FamilyInfo, FamilyKey, Layout, TypeKind};
use std::sync::Arc;

/// What the spec and data layers know of the family.
pub static INFO: FamilyInfo = FamilyInfo {
    word: "items",
    indicator_word: "item",
    wanted: "binary or categorical",
    types: &[TypeKind::Binary, TypeKind::Categorical],
    default_type: TypeKind::Categorical,
    mixed: &[TypeKind::Binary, TypeKind::Categorical],
    layout: Layout::Levels,
    shared_design: None,
    keys: &[FamilyKey::Smoothing],
};

/// The family of binary and categorical items.
#[derive(Debug)]
pub struct Items;

/// The items family, as [`super::Families`] lists it.
pub static ITEMS: Items = Items;

/// The parameter blocks the family writes.
const PROBABILITY: ParamBlock = ParamBlock::plain("item_probability");
const LOGIT: ParamBlock = ParamBlock::effects("item_logit", "odds ratio", true);

impl Family for Items {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn prepare(&self, set: &IndicatorSet, _data: &Dataset, designs: &BlockDesigns) -> Arc<dyn Prepared> {
        let (codes, level_names) = set.levels();
        let design = designs.components.clone();
        let terms: Vec<Vec<usize>> = set.names.iter().map(|nm| designs.terms_for(nm)).collect();
        prepared(ItemData::new(
            set.names.clone(),
            Arc::clone(codes),
            level_names.to_vec(),
            design,
            terms,
        ))
    }
}

/// The prepared block of these arrays.
pub fn prepared(data: ItemData) -> Arc<dyn Prepared> {
    Arc::new(data)
}

/// The item block's arrays for one placement.
#[derive(Debug, Clone)]
pub struct ItemData {
    /// Item names, in spec order.
    pub names: Vec<String>,
    /// Level codes, n×J row-major; [`MISSING_ITEM`] where missing.
    pub codes: Arc<Vec<u16>>,
    /// Level names of each item (code l is `level_names[j][l]`).
    pub level_names: Vec<Vec<String>>,
    /// Levels per item.
    pub levels: Vec<usize>,
    /// The placement's whole component design, n×qz (intercept first).
    pub design: Design,
    /// Per item, the design columns its logits use (column 0, the intercept, first).
    pub terms: Vec<Vec<usize>>,
    /// Per item, the arrays its M-step reuses at every EM iteration.
    pub rows: Vec<ItemRows>,
}

impl ItemData {
    /// The arrays of items `names` with codes (n×J), their level names, the component
    /// design and each item's design columns.
    pub fn new(
        names: Vec<String>,
        codes: Arc<Vec<u16>>,
        level_names: Vec<Vec<String>>,
        design: Design,
        terms: Vec<Vec<usize>>,
    ) -> ItemData {
        let levels: Vec<usize> = level_names.iter().map(Vec::len).collect();
        let rows = ItemRows::build(&codes, &levels, &design.x, design.p(), &terms);
        ItemData {
            names,
            codes,
            level_names,
            levels,
            design,
            terms,
            rows,
        }
    }

    /// Rows.
    pub fn n(&self) -> usize {
        self.design.n
    }

    /// Row `i`'s component design.
    fn z(&self, i: usize) -> &[f64] {
        let qz = self.design.p();
        &self.design.x[i * qz..(i + 1) * qz]
    }
}

/// The levels that stand for an item in profiles and in seeding distances: level 1 of
/// a binary item (level 0 is its complement), every level otherwise.
pub fn shown_levels(levels: &[String]) -> Vec<usize> {
    if levels.len() == 2 {
        vec![1]
    } else {
        (0..levels.len()).collect()
    }
}

impl Prepared for ItemData {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn block(self: Arc<Self>, _fd: &FitData, g: usize, options: &ModelOptions) -> Box<dyn Block> {
        Box::new(ItemComponents::new(self, g, options.smoothing))
    }

    fn restore(
        self: Arc<Self>,
        _fd: &FitData,
        g: usize,
        _options: &ModelOptions,
        state: &serde_json::Value,
    ) -> std::result::Result<Box<dyn Block>, String> {
        let saved: SavedItems = read_state(INFO.word, state)?;
        if !saved.smoothing.is_finite() || saved.smoothing < 0.0 {
            return Err("its smoothing is not a number of zero or more".into());
        }
        let mut b = ItemComponents::new(self, g, saved.smoothing);
        check_item_state(&b, &saved)?;
        b.log_prob = saved.log_probabilities;
        b.coef = saved.logit_coefficients;
        b.empty_cells = saved.empty_cells;
        b.failed_steps = saved.failed_steps;
        Ok(Box::new(b))
    }

    /// A binary item as 0/1, a categorical item as one 0/1 column per level; a missing
    /// value takes the item's observed mean.
    fn seeding_columns(&self) -> Vec<Vec<f64>> {
        let (n, nj) = (self.n(), self.names.len());
        let mut cols = Vec::new();
        for (j, levels) in self.level_names.iter().enumerate() {
            for l in shown_levels(levels) {
                let raw: Vec<Option<f64>> = (0..n)
                    .map(|i| {
                        let c = self.codes[i * nj + j];
                        (c != MISSING_ITEM).then(|| f64::from(u8::from(usize::from(c) == l)))
                    })
                    .collect();
                let seen: Vec<f64> = raw.iter().flatten().copied().collect();
                let mean = seen.iter().sum::<f64>() / seen.len().max(1) as f64;
                cols.push(raw.into_iter().map(|v| v.unwrap_or(mean)).collect());
            }
        }
        cols
    }

    fn profile_columns(&self) -> Vec<String> {
        let mut out = Vec::new();
        for (name, levels) in self.names.iter().zip(&self.level_names) {
            for l in shown_levels(levels) {
                out.push(format!("{name}={}", levels[l]));
            }
        }
        out
    }
}

/// Check saved item parameters against the shapes of `fresh` (the block they are for):
/// every value finite, and each cluster's probabilities of an item's levels in [0, 1]
/// and summing to 1.
fn check_item_state(fresh: &ItemComponents, saved: &SavedItems) -> std::result::Result<(), String> {
    let same_count = |what: &str, a: usize, b: usize| {
        if a == b {
            Ok(())
        } else {
            Err(format!("it has {what} for {a} items where the study has {b}"))
        }
    };
    same_count("probabilities", saved.log_probabilities.len(), fresh.log_prob.len())?;
    same_count("logit coefficients", saved.logit_coefficients.len(), fresh.coef.len())?;
    for (j, name) in fresh.rows.names.iter().enumerate() {
        let (lp, want) = (&saved.log_probabilities[j], fresh.log_prob[j].len());
        // A probability may be exactly 0 (log −∞), never NaN or above 1.
        let finite: Vec<f64> = lp
            .iter()
            .map(|l| if *l == f64::NEG_INFINITY { 0.0 } else { *l })
            .collect();
        check_values(&format!("probabilities of item '{name}'"), &finite, want)?;
        let levels = fresh.levels[j];
        for (k, cluster) in lp.chunks_exact(levels.max(1)).enumerate() {
            let total: f64 = cluster.iter().map(|l| l.exp()).sum();
            if cluster.iter().any(|l| *l > 1e-12) || (total - 1.0).abs() > 1e-6 {
                return Err(format!(
                    "its probabilities of item '{name}' in cluster {} are not probabilities summing to 1",
                    k + 1
                ));
            }
        }
        let want = fresh.coef[j].len();
        check_values(
            &format!("logit coefficients of item '{name}'"),
            &saved.logit_coefficients[j],
            want,
        )?;
    }
    Ok(())
}

/// Log probabilities as JSON numbers, with log 0 = −∞ as null (JSON has no infinity).
mod log_probabilities {
    use serde::{Deserialize, Deserializer, Serialize, Serializer};

    pub fn serialize<S: Serializer>(v: &[Vec<f64>], s: S) -> Result<S::Ok, S::Error> {
        let as_options: Vec<Vec<Option<f64>>> = v
            .iter()
            .map(|item| item.iter().map(|l| l.is_finite().then_some(*l)).collect())
            .collect();
        as_options.serialize(s)
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<Vec<f64>>, D::Error> {
        let as_options: Vec<Vec<Option<f64>>> = Vec::deserialize(d)?;
        Ok(as_options
            .into_iter()
            .map(|item| item.into_iter().map(|l| l.unwrap_or(f64::NEG_INFINITY)).collect())
            .collect())
    }
}

/// The saved state of an item block.
#[derive(Debug, serde::Serialize, serde::Deserialize)]
struct SavedItems {
    /// Per item without covariates: log probabilities `[k L + l]` (else empty); a
    /// probability of exactly 0 (log −∞) is written as null.
    #[serde(with = "log_probabilities")]
    log_probabilities: Vec<Vec<f64>>,
    /// Per item with covariates: logit coefficients `[(k (L − 1) + l − 1) q + a]` (else empty).
    logit_coefficients: Vec<Vec<f64>>,
    /// Smoothing pseudo-count.
    smoothing: f64,
    /// Cells held off 0 by smoothing at the last M-step.
    empty_cells: usize,
    /// Item-logit Newton steps that failed.
    #[serde(default)]
    failed_steps: usize,
}

/// Largest |coefficient| (log odds, fitting scale) taken as estimable. A log odds of 50
/// puts a probability within e^-50 ≈ 2e-22 of 0 or 1: beyond what any data can support,
/// so a larger value means the covariates separate the item's levels.
pub const SEPARATION_LOGIT: f64 = 50.0;

/// Parameters of G clusters' item distributions.
#[derive(Debug, Clone)]
pub struct ItemComponents {
    /// The arrays the components are fitted to.
    pub rows: Arc<ItemData>,
    /// Clusters.
    pub g: usize,
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
    /// Newton steps of (item, cluster) logits that failed, over the fit (line search, or a
    /// Hessian singular even when damped).
    pub failed_steps: usize,
}

impl ItemComponents {
    /// Empty parameters over `rows`' items; [`Block::m_step`] fills them.
    pub fn new(rows: Arc<ItemData>, g: usize, smoothing: f64) -> ItemComponents {
        let levels = rows.levels.clone();
        let terms = rows.terms.clone();
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
            rows,
            g,
            levels,
            terms,
            log_prob,
            coef,
            smoothing,
            empty_cells: 0,
            failed_steps: 0,
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

impl Block for ItemComponents {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn add_log_density(&self, out: &mut [f64]) {
        let it = &self.rows;
        let (g, nj) = (self.g, self.levels.len());
        let mut eta = Vec::with_capacity(self.levels.iter().copied().max().unwrap_or(2));
        for i in 0..it.n() {
            let codes = &it.codes[i * nj..(i + 1) * nj];
            let z = it.z(i);
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

    fn m_step(
        &mut self,
        data: &FitData,
        tau: &[f64],
        _sums: Option<&crate::model::GaussianStats>,
    ) -> std::result::Result<(), Degeneracy> {
        let it = Arc::clone(&self.rows);
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
                self.failed_steps += usize::from(fit.outcome.failed());
                if fit.gamma.iter().any(|b| !(b.abs() <= SEPARATION_LOGIT)) {
                    return Err(Degeneracy {
                        cluster: k + 1,
                        reason: format!(
                            "item '{}' is perfectly predicted by its covariates inside it (separation): its log odds grow without bound; set [indicators] smoothing (e.g. 1), or restrict the covariates with acts_on",
                            self.rows.names[j]
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

    fn set_coordinates(&mut self, c: &[f64]) -> std::result::Result<usize, Degeneracy> {
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

    fn embed(&mut self, smaller: &dyn Block) -> std::result::Result<(), String> {
        let small = smaller
            .as_any()
            .downcast_ref::<ItemComponents>()
            .ok_or("the smaller block is not of items")?;
        if small.g != self.g || small.levels != self.levels {
            return Err("the smaller block of items has other clusters or items".into());
        }
        let names = |c: &ItemComponents, j: usize| -> Vec<String> {
            c.terms[j]
                .iter()
                .map(|&t| c.rows.design.terms[t].name.clone())
                .collect()
        };
        for j in 0..self.levels.len() {
            let l = self.levels[j];
            let (large, small_terms) = (names(self, j), names(small, j));
            let q = large.len();
            if q == 1 {
                if small_terms.len() != 1 {
                    return Err("the smaller block of items has a term the larger lacks".into());
                }
                self.log_prob[j].clone_from(&small.log_prob[j]);
                continue;
            }
            let positions = super::term_positions(
                &large.iter().map(String::as_str).collect::<Vec<_>>(),
                &small_terms.iter().map(String::as_str).collect::<Vec<_>>(),
            );
            let qs = small_terms.len();
            for k in 0..self.g {
                for lv in 1..l {
                    let start = (k * (l - 1) + lv - 1) * q;
                    for (a, from) in positions.iter().enumerate() {
                        self.coef[j][start + a] = match (from, qs) {
                            // Without covariates the smaller block holds probabilities:
                            // the intercept is the level's log odds against the first.
                            (Some(0), 1) => small.log_prob[j][k * l + lv] - small.log_prob[j][k * l],
                            (Some(b), _) => small.coef[j][(k * (l - 1) + lv - 1) * qs + b],
                            (None, _) => 0.0,
                        };
                    }
                }
            }
        }
        Ok(())
    }

    fn chart(&self) -> std::result::Result<Box<dyn BlockChart + '_>, String> {
        for (j, lp) in self.log_prob.iter().enumerate() {
            if self.terms[j].len() == 1 && lp.iter().any(|v| !v.is_finite()) {
                return Err(format!(
                    "a level of item '{}' has probability 0 in some cluster, a boundary \
                     where standard errors do not exist; set [indicators] smoothing",
                    self.rows.names[j]
                ));
            }
        }
        let mut offsets = Vec::new();
        let mut len = 0;
        for (j, l) in self.levels.iter().enumerate() {
            offsets.push(len);
            len += self.g * (l - 1) * self.terms[j].len();
        }
        Ok(Box::new(ItemChart {
            base: self,
            offsets,
            len,
        }))
    }

    fn parameters(&self) -> Vec<Parameter> {
        let mut out = Vec::new();
        let design = &self.rows.design;
        for k in 0..self.g {
            for j in 0..self.levels.len() {
                let l = self.levels[j];
                let level_names = &self.rows.level_names[j];
                let name = &self.rows.names[j];
                for (lv, p) in self.reference_probabilities(j, k).into_iter().enumerate() {
                    out.push(Parameter {
                        block: PROBABILITY,
                        cluster: k + 1,
                        indicator: Some(format!("{name}={}", level_names[lv])),
                        term: None,
                        value: p,
                    });
                }
                if self.terms[j].len() == 1 {
                    continue;
                }
                let q = self.terms[j].len();
                for (lv, level) in level_names.iter().enumerate().skip(1) {
                    let start = (k * (l - 1) + lv - 1) * q;
                    let beta = &self.coef[j][start..start + q];
                    for (term, value) in subset_to_original(design, &self.terms[j], beta) {
                        out.push(Parameter {
                            block: LOGIT,
                            cluster: k + 1,
                            indicator: Some(format!("{name}={level}")),
                            term: Some(term),
                            value,
                        });
                    }
                }
            }
        }
        out
    }

    fn profile_scale(&self) -> super::ProfileScale {
        super::ProfileScale::Probability
    }

    fn profile(&self, k: usize, row: Option<usize>, out: &mut Vec<f64>) {
        let reference;
        let z = match row {
            Some(i) => self.rows.z(i),
            None => {
                reference = reference_row(self.rows.design.p());
                &reference[..]
            }
        };
        let mut eta = Vec::new();
        for (j, item_levels) in self.rows.level_names.iter().enumerate() {
            for l in shown_levels(item_levels) {
                out.push(self.log_probability(j, k, z, l, &mut eta).exp());
            }
        }
    }

    fn guards(&self) -> Vec<Guard> {
        let mut out = vec![Guard {
            name: super::NEWTON_STEPS_FAILED,
            count: self.failed_steps,
        }];
        if self.smoothing > 0.0 {
            out.push(Guard {
                name: super::ITEM_CELLS_HELD_OFF_ZERO,
                count: self.empty_cells,
            });
        }
        out
    }

    fn sampler(&self) -> Box<dyn RowSampler + '_> {
        Box::new(ItemSampler {
            block: self,
            codes: self.rows.codes.to_vec(),
            eta: Vec::new(),
        })
    }

    fn state(&self) -> serde_json::Value {
        let saved = SavedItems {
            log_probabilities: self.log_prob.clone(),
            logit_coefficients: self.coef.clone(),
            smoothing: self.smoothing,
            empty_cells: self.empty_cells,
            failed_steps: self.failed_steps,
        };
        serde_json::to_value(saved).expect("numbers encode")
    }
}

/// Draws each observed item value from its cluster's level probabilities at the row's
/// covariates; missing values stay missing.
struct ItemSampler<'a> {
    block: &'a ItemComponents,
    codes: Vec<u16>,
    eta: Vec<f64>,
}

impl RowSampler for ItemSampler<'_> {
    fn draw(&mut self, i: usize, k: usize, rng: &mut Stream) {
        let it = self.block;
        let nj = it.levels.len();
        let z = it.rows.z(i);
        for j in 0..nj {
            if self.codes[i * nj + j] == MISSING_ITEM {
                continue;
            }
            let probs: Vec<f64> = (0..it.levels[j])
                .map(|l| it.log_probability(j, k, z, l, &mut self.eta).exp())
                .collect();
            self.codes[i * nj + j] = rng.weighted_index(&probs) as u16;
        }
    }

    fn finish(self: Box<Self>) -> IndicatorValues {
        IndicatorValues::Levels {
            codes: Arc::new(self.codes),
            levels: self.block.rows.level_names.clone(),
            missing: self.block.rows.codes.iter().filter(|c| **c == MISSING_ITEM).count(),
        }
    }
}

/// The item block's local chart: the baseline-category logits of each item (per level
/// above the first, per design term), moved from the fit.
struct ItemChart<'a> {
    base: &'a ItemComponents,
    offsets: Vec<usize>,
    len: usize,
}

fn add(x: &mut [f64], delta: &[f64]) {
    for (a, b) in x.iter_mut().zip(delta) {
        *a += b;
    }
}

impl BlockChart for ItemChart<'_> {
    fn len(&self) -> usize {
        self.len
    }

    fn scales(&self) -> Vec<f64> {
        vec![1.0; self.len]
    }

    fn at(&self, theta: &[f64]) -> std::result::Result<Box<dyn Block>, Degeneracy> {
        let mut it = self.base.clone();
        for (j, &off) in self.offsets.iter().enumerate() {
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
        Ok(Box::new(it))
    }

    fn scorer<'b>(&'b self, block: &'b dyn Block, _theta: &'b [f64]) -> Box<dyn RowScorer + 'b> {
        let it = block
            .as_any()
            .downcast_ref::<ItemComponents>()
            .expect("an item chart scores item blocks");
        Box::new(ItemScorer {
            it,
            offsets: &self.offsets,
            eta: Vec::new(),
        })
    }
}

/// Row scores of the item block: per observed item, (indicator − probability) of each
/// level above the first times the item's design terms, weighted by the posterior.
struct ItemScorer<'a> {
    it: &'a ItemComponents,
    offsets: &'a [usize],
    eta: Vec<f64>,
}

impl RowScorer for ItemScorer<'_> {
    fn add(&mut self, i: usize, c: f64, t: &[f64], s: &mut [f64]) {
        let it = self.it;
        let nj = it.levels.len();
        let z = it.rows.z(i);
        for (j, &code) in it.rows.codes[i * nj..(i + 1) * nj].iter().enumerate() {
            if code == MISSING_ITEM {
                continue;
            }
            let (l, q) = (it.levels[j], it.terms[j].len());
            for (k, tk) in t.iter().enumerate() {
                let v = c * tk;
                if v == 0.0 {
                    continue;
                }
                for level in 1..l {
                    let p = it.log_probability(j, k, z, level, &mut self.eta).exp();
                    let resid = v * (f64::from(u8::from(usize::from(code) == level)) - p);
                    let at = self.offsets[j] + (k * (l - 1) + level - 1) * q;
                    for (a, col) in it.terms[j].iter().enumerate() {
                        s[at + a] += resid * z[*col];
                    }
                }
            }
        }
    }
}

impl ItemComponents {
    fn empty(&self, k: usize, j: usize) -> Degeneracy {
        Degeneracy {
            cluster: k + 1,
            reason: format!("no row in it has a value of item '{}'", self.rows.names[j]),
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
        let n = codes.len().checked_div(nj).unwrap_or(0);
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
