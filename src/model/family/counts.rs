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

use super::{
    check_values, read_state, reference_row, subset_to_original, Block, BlockChart, BlockDesigns, Degeneracy, Family,
    Guard, ParamBlock, Parameter, Prepared, RowSampler, RowScorer,
};
use crate::data::{Dataset, Design, Exposure, IndicatorSet, IndicatorValues};
use crate::model::glm::{fit_poisson, PoissonRows};
use crate::model::{design_rows, FitData, ModelOptions};
use crate::rng::Stream;
use crate::spec::{FamilyInfo, FamilyKey, Layout, TypeKind};
use std::sync::{Arc, Mutex, Weak};

/// What the spec and data layers know of the family.
pub static INFO: FamilyInfo = FamilyInfo {
    word: "counts",
    indicator_word: "count",
    wanted: "count",
    types: &[TypeKind::Count],
    default_type: TypeKind::Count,
    mixed: &[TypeKind::Count],
    layout: Layout::Columns,
    shared_design: None,
    keys: &[FamilyKey::Exposure],
};

/// The family of Poisson counts.
#[derive(Debug)]
pub struct Counts;

/// The counts family, as [`super::Families`] lists it.
pub static COUNTS: Counts = Counts;

/// The parameter blocks the family writes.
const RATE: ParamBlock = ParamBlock::plain("count_rate");
const LOG_RATE: ParamBlock = ParamBlock::effects("count_log_rate", "rate ratio", true);

impl Family for Counts {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn prepare(&self, set: &IndicatorSet, data: &Dataset, designs: &BlockDesigns) -> Arc<dyn Prepared> {
        let design = designs.components.clone();
        let terms: Vec<Vec<usize>> = set.names.iter().map(|nm| designs.terms_for(nm)).collect();
        prepared(CountData::new(
            set.names.clone(),
            Arc::clone(set.numbers()),
            design,
            terms,
            data.exposure.clone(),
        ))
    }
}

/// log(y!) of every count in `y`, made once per count array: every placement prepares
/// its block from the same array, and each copy would be as large as the data. Entries
/// whose array has been dropped are forgotten.
fn ln_factorials(y: &Arc<Vec<f64>>) -> Arc<Vec<f64>> {
    type Made = Vec<(Weak<Vec<f64>>, Arc<Vec<f64>>)>;
    static MADE: Mutex<Made> = Mutex::new(Vec::new());
    let mut made = MADE.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
    made.retain(|(of, _)| of.strong_count() > 0);
    if let Some((_, lf)) = made
        .iter()
        .find(|(of, _)| of.upgrade().is_some_and(|of| Arc::ptr_eq(&of, y)))
    {
        return Arc::clone(lf);
    }
    let lf: Arc<Vec<f64>> = Arc::new(
        y.iter()
            .map(|v| statrs::function::factorial::ln_factorial(*v as u64))
            .collect(),
    );
    made.push((Arc::downgrade(y), Arc::clone(&lf)));
    lf
}

/// The prepared block of these arrays.
pub fn prepared(data: CountData) -> Arc<dyn Prepared> {
    Arc::new(data)
}

/// The count block's arrays for one placement.
#[derive(Debug, Clone)]
pub struct CountData {
    /// Count names, in spec order.
    pub names: Vec<String>,
    /// Counts, column by column: count c of row i at `y[c * n + i]`.
    pub y: Arc<Vec<f64>>,
    /// log(y!) of every count, laid out as `y` (shared by every placement's block).
    pub ln_factorial: Arc<Vec<f64>>,
    /// The placement's whole component design, n×qz (intercept first).
    pub design: Design,
    /// Per count, the design columns its regression uses (intercept first).
    pub terms: Vec<Vec<usize>>,
    /// Per count with covariates, its design on those columns (n×q, row-major; empty for
    /// a count without covariates).
    pub x: Vec<Vec<f64>>,
    /// Exposure per row and its log (the offset), if an exposure is given.
    pub exposure: Option<Arc<Exposure>>,
}

impl CountData {
    /// The arrays of counts `names` (column by column), the component design, each
    /// count's design columns and the exposure.
    pub fn new(
        names: Vec<String>,
        y: Arc<Vec<f64>>,
        design: Design,
        terms: Vec<Vec<usize>>,
        exposure: Option<Arc<Exposure>>,
    ) -> CountData {
        let ln_factorial = ln_factorials(&y);
        let x = terms
            .iter()
            .map(|cols| {
                if cols.len() > 1 {
                    design_rows(&design.x, design.p(), cols)
                } else {
                    Vec::new()
                }
            })
            .collect();
        CountData {
            names,
            y,
            ln_factorial,
            design,
            terms,
            x,
            exposure,
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

    /// Row `i`'s offset: log exposure, or 0.
    fn offset(&self, i: usize) -> f64 {
        self.exposure.as_ref().map_or(0.0, |e| e.logs[i])
    }
}

impl Prepared for CountData {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn block(self: Arc<Self>, _fd: &FitData, g: usize, _options: &ModelOptions) -> Box<dyn Block> {
        Box::new(CountComponents::new(self, g))
    }

    fn restore(
        self: Arc<Self>,
        _fd: &FitData,
        g: usize,
        _options: &ModelOptions,
        state: &serde_json::Value,
    ) -> std::result::Result<Box<dyn Block>, String> {
        let saved: SavedCounts = read_state(INFO.word, state)?;
        let mut b = CountComponents::new(self, g);
        if saved.coefficients.len() != b.coef.len() {
            return Err(format!(
                "it has coefficients for {} counts where the study has {}",
                saved.coefficients.len(),
                b.coef.len()
            ));
        }
        for ((name, saved), fresh) in b.rows.names.iter().zip(&saved.coefficients).zip(&b.coef) {
            check_values(&format!("coefficients of count '{name}'"), saved, fresh.len())?;
        }
        b.coef = saved.coefficients;
        b.started = saved.started;
        b.failed_steps = saved.failed_steps;
        Ok(Box::new(b))
    }

    /// log(1 + y) of each count.
    fn seeding_columns(&self) -> Vec<Vec<f64>> {
        self.y
            .chunks_exact(self.n())
            .map(|col| col.iter().map(|y| y.ln_1p()).collect())
            .collect()
    }

    fn profile_columns(&self) -> Vec<String> {
        self.names.iter().map(|n| format!("{n} (rate)")).collect()
    }
}

/// The saved state of a count block.
#[derive(Debug, serde::Serialize, serde::Deserialize)]
struct SavedCounts {
    /// Per count, log-rate coefficients on the fitting scale, `[k q + a]`.
    coefficients: Vec<Vec<f64>>,
    /// Whether an M-step has run.
    started: bool,
    /// Rate-regression Newton steps that failed.
    #[serde(default)]
    failed_steps: usize,
}

/// Largest |coefficient| (fitting scale) taken as estimable: a log rate ratio of 50 is a
/// factor of 5e21, so a larger value means a cluster's events are separated by covariates.
pub const SEPARATION_LOG_RATE: f64 = 50.0;

/// Parameters of G clusters' count regressions.
#[derive(Debug, Clone)]
pub struct CountComponents {
    /// The arrays the components are fitted to.
    pub rows: Arc<CountData>,
    /// Clusters.
    pub g: usize,
    /// Design columns per count (intercept first).
    pub terms: Vec<Vec<usize>>,
    /// Per count: coefficients on the fitting scale, `[k * q + a]`.
    pub coef: Vec<Vec<f64>>,
    /// Whether an M-step has run (the first one starts each regression from scratch).
    pub started: bool,
    /// M-steps of rate regressions whose Newton step failed (line search or singular
    /// Hessian).
    pub failed_steps: usize,
}

impl CountComponents {
    /// Empty parameters over `rows`' counts; [`Block::m_step`] fills them.
    pub fn new(rows: Arc<CountData>, g: usize) -> CountComponents {
        let terms = rows.terms.clone();
        let coef = terms.iter().map(|t| vec![0.0; g * t.len()]).collect();
        CountComponents {
            rows,
            g,
            terms,
            coef,
            started: false,
            failed_steps: 0,
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

impl Block for CountComponents {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn add_log_density(&self, out: &mut [f64]) {
        let ct = &self.rows;
        let (g, nc, n) = (self.g, self.terms.len(), ct.n());
        for i in 0..n {
            let z = ct.z(i);
            let offset = ct.offset(i);
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

    fn m_step(
        &mut self,
        data: &FitData,
        tau: &[f64],
        _sums: Option<&crate::model::GaussianStats>,
    ) -> std::result::Result<(), Degeneracy> {
        let ct = Arc::clone(&self.rows);
        let (g, nc, n) = (self.g, self.terms.len(), data.n);
        let ones;
        let exposure = match &ct.exposure {
            Some(e) => &e.values[..],
            None => {
                ones = vec![1.0; n];
                &ones
            }
        };
        let offset = ct.exposure.as_ref().map(|e| &e.logs[..]);
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
                            ct.names[c]
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
                    offset,
                    weights: &v,
                };
                let fit = fit_poisson(&rows, &start, 1);
                self.failed_steps += usize::from(fit.outcome.failed());
                if fit.beta.iter().any(|b| !(b.abs() <= SEPARATION_LOG_RATE)) {
                    return Err(Degeneracy {
                        cluster: k + 1,
                        reason: format!(
                            "the rate of '{}' inside it grows without bound along a covariate (separation); restrict the covariates with acts_on or fit fewer clusters",
                            ct.names[c]
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

    fn set_coordinates(&mut self, c: &[f64]) -> std::result::Result<usize, Degeneracy> {
        let mut read = 0;
        for v in &mut self.coef {
            let len = v.len();
            v.copy_from_slice(&c[read..read + len]);
            read += len;
        }
        Ok(read)
    }

    fn embed(&mut self, smaller: &dyn Block) -> std::result::Result<(), String> {
        let small = smaller
            .as_any()
            .downcast_ref::<CountComponents>()
            .ok_or("the smaller block is not of counts")?;
        if small.g != self.g || small.terms.len() != self.terms.len() {
            return Err("the smaller block of counts has other clusters or counts".into());
        }
        let names = |c: &CountComponents, j: usize| -> Vec<String> {
            c.terms[j]
                .iter()
                .map(|&t| c.rows.design.terms[t].name.clone())
                .collect()
        };
        for j in 0..self.terms.len() {
            let (large, small_terms) = (names(self, j), names(small, j));
            let positions = super::term_positions(
                &large.iter().map(String::as_str).collect::<Vec<_>>(),
                &small_terms.iter().map(String::as_str).collect::<Vec<_>>(),
            );
            let (q, qs) = (large.len(), small_terms.len());
            for k in 0..self.g {
                for (a, from) in positions.iter().enumerate() {
                    self.coef[j][k * q + a] = from.map_or(0.0, |b| small.coef[j][k * qs + b]);
                }
            }
        }
        self.started = true;
        Ok(())
    }

    fn chart(&self) -> std::result::Result<Box<dyn BlockChart + '_>, String> {
        Ok(Box::new(CountChart {
            base: self,
            len: self.coef.iter().map(Vec::len).sum(),
        }))
    }

    fn parameters(&self) -> Vec<Parameter> {
        let mut out = Vec::new();
        for k in 0..self.g {
            for c in 0..self.terms.len() {
                let q = self.terms[c].len();
                let beta = &self.coef[c][k * q..(k + 1) * q];
                let name = &self.rows.names[c];
                out.push(Parameter {
                    block: RATE,
                    cluster: k + 1,
                    indicator: Some(name.clone()),
                    term: None,
                    value: beta[0].exp(),
                });
                for (term, value) in subset_to_original(&self.rows.design, &self.terms[c], beta) {
                    out.push(Parameter {
                        block: LOG_RATE,
                        cluster: k + 1,
                        indicator: Some(name.clone()),
                        term: Some(term),
                        value,
                    });
                }
            }
        }
        out
    }

    fn profile_scale(&self) -> super::ProfileScale {
        super::ProfileScale::Rate
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
        out.extend((0..self.terms.len()).map(|c| self.eta(c, k, z).exp()));
    }

    fn guards(&self) -> Vec<Guard> {
        vec![Guard {
            name: super::NEWTON_STEPS_FAILED,
            count: self.failed_steps,
        }]
    }

    fn sampler(&self) -> Box<dyn RowSampler + '_> {
        Box::new(CountSampler {
            block: self,
            y: self.rows.y.to_vec(),
        })
    }

    fn state(&self) -> serde_json::Value {
        let saved = SavedCounts {
            coefficients: self.coef.clone(),
            started: self.started,
            failed_steps: self.failed_steps,
        };
        serde_json::to_value(saved).expect("numbers encode")
    }
}

/// Draws each count from its cluster's Poisson rate at the row's covariates and exposure.
struct CountSampler<'a> {
    block: &'a CountComponents,
    y: Vec<f64>,
}

impl RowSampler for CountSampler<'_> {
    fn draw(&mut self, i: usize, k: usize, rng: &mut Stream) {
        let ct = self.block;
        let n = ct.rows.n();
        let z = ct.rows.z(i);
        let offset = ct.rows.offset(i);
        for c in 0..ct.terms.len() {
            self.y[c * n + i] = rng.poisson((ct.eta(c, k, z) + offset).exp()) as f64;
        }
    }

    fn finish(self: Box<Self>) -> IndicatorValues {
        IndicatorValues::Columns(Arc::new(self.y))
    }
}

/// The count block's local chart: the log-rate coefficients on the fitting scale.
struct CountChart<'a> {
    base: &'a CountComponents,
    len: usize,
}

impl BlockChart for CountChart<'_> {
    fn len(&self) -> usize {
        self.len
    }

    fn scales(&self) -> Vec<f64> {
        vec![1.0; self.len]
    }

    fn at(&self, theta: &[f64]) -> std::result::Result<Box<dyn Block>, Degeneracy> {
        let mut ct = self.base.clone();
        let mut off = 0;
        for v in &mut ct.coef {
            for (a, b) in v.iter_mut().zip(&theta[off..]) {
                *a += b;
            }
            off += v.len();
        }
        Ok(Box::new(ct))
    }

    fn scorer<'b>(&'b self, block: &'b dyn Block, _theta: &'b [f64]) -> Box<dyn RowScorer + 'b> {
        let ct = block
            .as_any()
            .downcast_ref::<CountComponents>()
            .expect("a count chart scores count blocks");
        Box::new(CountScorer { ct })
    }
}

/// Row scores of the count block: (y − rate) times each count's design terms, weighted
/// by the posterior.
struct CountScorer<'a> {
    ct: &'a CountComponents,
}

impl RowScorer for CountScorer<'_> {
    fn add(&mut self, i: usize, c: f64, t: &[f64], s: &mut [f64]) {
        let ct = self.ct;
        let n = ct.rows.n();
        let z = ct.rows.z(i);
        let offset = ct.rows.offset(i);
        let mut at = 0;
        for (cc, terms) in ct.terms.iter().enumerate() {
            let y = ct.rows.y[cc * n + i];
            let q = terms.len();
            for (k, tk) in t.iter().enumerate() {
                let v = c * tk;
                if v == 0.0 {
                    continue;
                }
                let resid = v * (y - (ct.eta(cc, k, z) + offset).exp());
                let base = at + k * q;
                for (a, col) in terms.iter().enumerate() {
                    s[base + a] += resid * z[*col];
                }
            }
            at += ct.coef[cc].len();
        }
    }
}
