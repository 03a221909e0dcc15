//! Data from a stated truth: `cohortmix simulate TRUTH.toml`.
//!
//! A truth spec names the rows, the covariates and how they are drawn, and per cluster
//! the gating coefficients (multinomial logit against the first cluster), the indicator
//! means, the covariate effects on the indicators, and the covariance (standard
//! deviations and correlations). Coefficients are per unit of each covariate on its
//! original scale; a categorical level is written `"sex=male"`.
//!
//! ```toml
//! [simulation]
//! rows = 2000
//! seed = 7
//! output = "cohort.csv"
//! id = "person"
//! indicators = ["fev1_pct", "fvc_pct"]
//!
//! [[covariate]]
//! name = "age"
//! distribution = "normal"
//! mean = 45
//! sd = 10
//!
//! [[cluster]]
//! name = "preserved"
//! mean = { fev1_pct = 98, fvc_pct = 100 }
//! sd = { fev1_pct = 9, fvc_pct = 9 }
//! correlation = 0.6
//!
//! [[cluster]]
//! name = "reduced"
//! gating = { intercept = -3, age = 0.05 }
//! mean = { fev1_pct = 75, fvc_pct = 90 }
//! sd = { fev1_pct = 10, fvc_pct = 10 }
//! ```

use crate::error::{did_you_mean, Diagnostic, Error, Location, Result};
use crate::rng::Stream;
use nalgebra::DMatrix;
use serde::Deserialize;
use std::collections::BTreeMap;
use std::ops::Range;
use std::path::{Path, PathBuf};
use toml::Spanned;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawTruth {
    simulation: Spanned<RawSimulation>,
    #[serde(default)]
    covariate: Vec<Spanned<RawCovariate>>,
    cluster: Vec<Spanned<RawCluster>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSimulation {
    title: Option<String>,
    rows: Spanned<i64>,
    seed: Option<Spanned<i64>>,
    output: Spanned<String>,
    id: Option<String>,
    #[serde(default)]
    indicators: Option<Spanned<Vec<String>>>,
    #[serde(default)]
    items: Vec<String>,
    #[serde(default)]
    item_levels: BTreeMap<String, Vec<String>>,
    #[serde(default)]
    counts: Vec<String>,
    exposure: Option<Spanned<String>>,
    missing_items: Option<Spanned<f64>>,
    decimals: Option<Spanned<i64>>,
    truth_column: Option<String>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCovariate {
    name: Spanned<String>,
    distribution: Spanned<String>,
    mean: Option<f64>,
    sd: Option<f64>,
    min: Option<f64>,
    max: Option<f64>,
    probability: Option<f64>,
    levels: Option<Vec<String>>,
    shares: Option<Vec<f64>>,
    decimals: Option<i64>,
    missing: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCluster {
    name: String,
    gating: Option<Spanned<BTreeMap<String, f64>>>,
    #[serde(default = "empty")]
    mean: Spanned<BTreeMap<String, f64>>,
    effects: Option<Spanned<BTreeMap<String, BTreeMap<String, f64>>>>,
    #[serde(default = "empty")]
    sd: Spanned<BTreeMap<String, f64>>,
    correlation: Option<Spanned<toml::Value>>,
    #[serde(default = "empty")]
    item_probability: Spanned<BTreeMap<String, toml::Value>>,
    #[serde(default = "empty")]
    item_effects: Spanned<BTreeMap<String, BTreeMap<String, toml::Value>>>,
    #[serde(default = "empty")]
    rate: Spanned<BTreeMap<String, f64>>,
    #[serde(default = "empty")]
    count_effects: Spanned<BTreeMap<String, BTreeMap<String, f64>>>,
}

/// An absent table: empty, with no span.
fn empty<T: Default>() -> Spanned<T> {
    Spanned::new(0..0, T::default())
}

/// How a covariate is drawn.
#[derive(Debug, Clone, PartialEq)]
pub enum Draw {
    /// Normal(mean, sd), clipped to [min, max].
    Normal {
        /// Mean.
        mean: f64,
        /// Standard deviation.
        sd: f64,
        /// Lower clip.
        min: f64,
        /// Upper clip.
        max: f64,
    },
    /// Uniform on [min, max].
    Uniform {
        /// Lower end.
        min: f64,
        /// Upper end.
        max: f64,
    },
    /// 0/1 with P(1) = probability.
    Bernoulli {
        /// P(1).
        probability: f64,
    },
    /// One of the levels with the given shares.
    Categorical {
        /// Levels.
        levels: Vec<String>,
        /// Shares (sum 1).
        shares: Vec<f64>,
    },
}

/// A simulated covariate.
#[derive(Debug, Clone, PartialEq)]
pub struct SimCovariate {
    /// Column name.
    pub name: String,
    /// How it is drawn.
    pub draw: Draw,
    /// Decimals written.
    pub decimals: usize,
    /// Share of values written as missing.
    pub missing: f64,
}

/// One true cluster.
#[derive(Debug, Clone, PartialEq)]
pub struct SimCluster {
    /// Name.
    pub name: String,
    /// Gating coefficients by term (`intercept`, `age`, `sex=male`); empty for cluster 1.
    pub gating: BTreeMap<String, f64>,
    /// Indicator means (at covariates = 0), in indicator order.
    pub mean: Vec<f64>,
    /// Effects on each indicator (indicator order), by term.
    pub effects: Vec<BTreeMap<String, f64>>,
    /// Covariance.
    pub covariance: DMatrix<f64>,
    /// Per item, the baseline log odds of levels 1.. against level 0 (covariates at 0).
    pub item_logits: Vec<Vec<f64>>,
    /// Per item and level 1.., covariate effects on those log odds, by term.
    pub item_effects: Vec<Vec<BTreeMap<String, f64>>>,
    /// Per count, the log rate per unit of exposure (covariates at 0).
    pub log_rate: Vec<f64>,
    /// Per count, effects on the log rate, by term.
    pub count_effects: Vec<BTreeMap<String, f64>>,
}

/// A validated truth spec.
#[derive(Debug, Clone, PartialEq)]
pub struct Truth {
    /// Title.
    pub title: String,
    /// Rows to draw.
    pub rows: usize,
    /// Master seed.
    pub seed: u64,
    /// Output CSV, resolved against the truth spec's folder.
    pub output: PathBuf,
    /// Id column name.
    pub id: String,
    /// Indicator names.
    pub indicators: Vec<String>,
    /// Items: name and levels (a binary item has levels "0" and "1").
    pub items: Vec<(String, Vec<String>)>,
    /// Count names.
    pub counts: Vec<String>,
    /// The covariate that is the counts' exposure (person-time), if any.
    pub exposure: Option<String>,
    /// Share of item values written as missing, completely at random.
    pub missing_items: f64,
    /// Decimals for indicators.
    pub decimals: usize,
    /// Column with the true cluster, if wanted.
    pub truth_column: Option<String>,
    /// Covariates.
    pub covariates: Vec<SimCovariate>,
    /// Clusters.
    pub clusters: Vec<SimCluster>,
}

/// Read and validate a truth spec.
pub fn load(path: &Path) -> Result<Truth> {
    let text = crate::spec::read_text(path, "truth spec")?;
    parse(path, &text)
}

/// Parse and validate truth-spec text read from `path`.
pub fn parse(path: &Path, text: &str) -> Result<Truth> {
    let err = |span: Range<usize>, msg: String| Diagnostic::new(msg).at(Location::from_span(path, text, span));
    let raw: RawTruth = toml::from_str(text).map_err(|e| {
        let mut d = Diagnostic::new(e.message().lines().next().unwrap_or("").to_string());
        if let Some(span) = e.span() {
            d = d.at(Location::from_span(path, text, span));
        }
        Error::input(d.help("see the example at the top of docs/simulate.md"))
    })?;
    let sim = raw.simulation.get_ref();
    let head = simulation_keys(&raw, &err)?;
    let covariates = raw
        .covariate
        .iter()
        .map(|c| covariate(c, &err))
        .collect::<Result<Vec<_>>>()?;
    let exposure = exposure(sim, &covariates, &err)?;
    let terms = term_names(&covariates);
    let check_terms = |map: &BTreeMap<String, f64>, span: Range<usize>, allow_intercept: bool| -> Result<()> {
        for k in map.keys() {
            let ok = (allow_intercept && k == "intercept") || terms.contains(k);
            if !ok {
                let mut d = err(span.clone(), format!("unknown term '{k}'"));
                if let Some(s) = did_you_mean(k, terms.iter().map(String::as_str)) {
                    d = d.help(format!("did you mean '{s}'?"));
                }
                return Err(Error::input(d.help(format!("terms: intercept, {}", terms.join(", ")))));
            }
        }
        Ok(())
    };
    if raw.cluster.is_empty() {
        return Err(Error::input(err(
            raw.simulation.span(),
            "the truth needs at least one [[cluster]]".into(),
        )));
    }
    let clusters = raw
        .cluster
        .iter()
        .enumerate()
        .map(|(k, c)| cluster(k, c, &head, sim, &check_terms, &err))
        .collect::<Result<Vec<_>>>()?;
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    Ok(Truth {
        title: sim.title.clone().unwrap_or_else(|| "simulated data".into()),
        rows: head.rows as usize,
        seed: head.seed,
        output: crate::spec::resolve(&base, sim.output.get_ref()),
        id: sim.id.clone().unwrap_or_else(|| "id".into()),
        indicators: head.indicators,
        items: head.items,
        counts: sim.counts.clone(),
        exposure,
        missing_items: head.missing_items,
        decimals: head.decimals,
        truth_column: sim.truth_column.clone(),
        covariates,
        clusters,
    })
}

/// Builds a diagnostic at a span of the truth spec.
type ErrAt<'a> = dyn Fn(Range<usize>, String) -> Diagnostic + 'a;

/// `[simulation]`'s keys other than the output's.
struct Head {
    rows: i64,
    seed: u64,
    decimals: usize,
    indicators: Vec<String>,
    items: Vec<(String, Vec<String>)>,
    missing_items: f64,
}

/// `[simulation]`: rows, seed, decimals, the indicators, items and their levels.
fn simulation_keys(raw: &RawTruth, err: &ErrAt) -> Result<Head> {
    let sim = raw.simulation.get_ref();
    let rows = *sim.rows.get_ref();
    if !(1..=100_000_000).contains(&rows) {
        return Err(Error::input(err(
            sim.rows.span(),
            format!("[simulation].rows must be between 1 and 100000000, not {rows}"),
        )));
    }
    let seed = match &sim.seed {
        Some(s) if *s.get_ref() < 0 => {
            return Err(Error::input(err(
                s.span(),
                "[simulation].seed must be zero or positive".into(),
            )))
        }
        Some(s) => *s.get_ref() as u64,
        None => crate::spec::DEFAULT_SEED,
    };
    let decimals = match &sim.decimals {
        Some(d) if !(0..=12).contains(d.get_ref()) => {
            return Err(Error::input(err(d.span(), "decimals must be 0 to 12".into())))
        }
        Some(d) => *d.get_ref() as usize,
        None => 2,
    };
    let indicators = sim.indicators.as_ref().map_or_else(Vec::new, |v| v.get_ref().clone());
    if indicators.is_empty() && sim.items.is_empty() && sim.counts.is_empty() {
        return Err(Error::input(
            err(raw.simulation.span(), "the truth has no indicators".into()).help(
                "list continuous indicators (indicators = [...]), items (items = [...]) or counts (counts = [...])",
            ),
        ));
    }
    let items: Vec<(String, Vec<String>)> = sim
        .items
        .iter()
        .map(|name| {
            let levels = sim
                .item_levels
                .get(name)
                .cloned()
                .unwrap_or_else(|| vec!["0".to_string(), "1".to_string()]);
            (name.clone(), levels)
        })
        .collect();
    if let Some(name) = sim.item_levels.keys().find(|k| !sim.items.contains(k)) {
        return Err(Error::input(err(
            raw.simulation.span(),
            format!("item_levels names '{name}', which is not in items"),
        )));
    }
    if let Some((name, _)) = items.iter().find(|(_, l)| l.len() < 2) {
        return Err(Error::input(err(
            raw.simulation.span(),
            format!("item '{name}' needs at least two levels"),
        )));
    }
    let missing_items = match &sim.missing_items {
        Some(m) if !(0.0..1.0).contains(m.get_ref()) => {
            return Err(Error::input(err(
                m.span(),
                "missing_items must be a share from 0 up to 1".into(),
            )))
        }
        Some(m) => *m.get_ref(),
        None => 0.0,
    };

    Ok(Head {
        rows,
        seed,
        decimals,
        indicators,
        items,
        missing_items,
    })
}

/// How a `[[covariate]]` is drawn.
fn distribution(c: &Spanned<RawCovariate>, err: &ErrAt) -> Result<Draw> {
    let r = c.get_ref();
    let need = |v: Option<f64>, key: &str| -> Result<f64> {
        v.ok_or_else(|| Error::input(err(c.span(), format!("covariate '{}' needs {key}", r.name.get_ref()))))
    };
    Ok(match r.distribution.get_ref().as_str() {
        "normal" => {
            let sd = need(r.sd, "sd")?;
            if !(sd > 0.0) {
                return Err(Error::input(err(c.span(), "sd must be positive".into())));
            }
            Draw::Normal {
                mean: need(r.mean, "mean")?,
                sd,
                min: r.min.unwrap_or(f64::NEG_INFINITY),
                max: r.max.unwrap_or(f64::INFINITY),
            }
        }
        "uniform" => {
            let (min, max) = (need(r.min, "min")?, need(r.max, "max")?);
            if !(min < max) {
                return Err(Error::input(err(c.span(), "min must be below max".into())));
            }
            Draw::Uniform { min, max }
        }
        "bernoulli" => {
            let p = need(r.probability, "probability")?;
            if !(0.0..=1.0).contains(&p) {
                return Err(Error::input(err(
                    c.span(),
                    "probability must be between 0 and 1".into(),
                )));
            }
            Draw::Bernoulli { probability: p }
        }
        "categorical" => {
            let levels = r
                .levels
                .clone()
                .ok_or_else(|| Error::input(err(c.span(), "a categorical covariate needs levels".into())))?;
            let shares = r
                .shares
                .clone()
                .ok_or_else(|| Error::input(err(c.span(), "a categorical covariate needs shares".into())))?;
            let total: f64 = shares.iter().sum();
            if shares.len() != levels.len()
                || levels.len() < 2
                || (total - 1.0).abs() > 1e-9
                || shares.iter().any(|s| *s < 0.0)
            {
                return Err(Error::input(err(
                    c.span(),
                    "levels and shares must have the same length (at least 2) and the shares must add up to 1".into(),
                )));
            }
            Draw::Categorical { levels, shares }
        }
        other => {
            let words = ["normal", "uniform", "bernoulli", "categorical"];
            let mut d = err(r.distribution.span(), format!("unknown distribution '{other}'"));
            if let Some(s) = did_you_mean(other, words) {
                d = d.help(format!("did you mean '{s}'?"));
            }
            return Err(Error::input(
                d.help("distributions: normal, uniform, bernoulli, categorical"),
            ));
        }
    })
}

/// One `[[covariate]]`: how it is drawn, its decimals and missing share.
fn covariate(c: &Spanned<RawCovariate>, err: &ErrAt) -> Result<SimCovariate> {
    let r = c.get_ref();
    let draw = distribution(c, err)?;
    let missing = r.missing.unwrap_or(0.0);
    if !(0.0..1.0).contains(&missing) {
        return Err(Error::input(err(
            c.span(),
            "missing must be a share from 0 up to 1".into(),
        )));
    }
    Ok(SimCovariate {
        name: r.name.get_ref().clone(),
        draw,
        decimals: r.decimals.unwrap_or(2).clamp(0, 12) as usize,
        missing,
    })
}

/// `[simulation].exposure`: a covariate with positive values, with counts to scale.
fn exposure(sim: &RawSimulation, covariates: &[SimCovariate], err: &ErrAt) -> Result<Option<String>> {
    Ok(match &sim.exposure {
        None => None,
        Some(e) => {
            let c = covariates.iter().find(|c| c.name == *e.get_ref()).ok_or_else(|| {
                Error::input(err(
                    e.span(),
                    format!("exposure '{}' is not a [[covariate]]", e.get_ref()),
                ))
            })?;
            let positive = match &c.draw {
                Draw::Normal { min, .. } | Draw::Uniform { min, .. } => *min > 0.0,
                _ => false,
            };
            if !positive || sim.counts.is_empty() {
                return Err(Error::input(
                    err(
                        e.span(),
                        "the exposure must be a normal or uniform covariate with min > 0, and counts must be listed"
                            .into(),
                    )
                    .help("exposure is person-time: give it min = 0.5 (say)"),
                ));
            }
            Some(e.get_ref().clone())
        }
    })
}

/// One `[[cluster]]` (the `k`-th): its gating coefficients, means, effects, covariance,
/// item logits and count rates.
/// A cluster's count rates (as logs) and their effects by term.
#[allow(clippy::type_complexity)]
fn cluster_counts(
    c: &Spanned<RawCluster>,
    sim: &RawSimulation,
    check_terms: &TermCheck,
    err: &ErrAt,
) -> Result<(Vec<f64>, Vec<BTreeMap<String, f64>>)> {
    let r = c.get_ref();
    let mut log_rate = Vec::new();
    let mut count_effects = Vec::new();
    for name in &sim.counts {
        let rate = r.rate.get_ref().get(name).copied().ok_or_else(|| {
            Error::input(err(
                c.span(),
                format!("cluster '{}' gives no rate for count '{name}'", r.name),
            ))
        })?;
        if !(rate > 0.0) {
            return Err(Error::input(err(r.rate.span(), "every rate must be positive".into())));
        }
        log_rate.push(rate.ln());
        let e = r.count_effects.get_ref().get(name).cloned().unwrap_or_default();
        check_terms(&e, r.count_effects.span(), false)?;
        count_effects.push(e);
    }
    for key in r.rate.get_ref().keys().chain(r.count_effects.get_ref().keys()) {
        if !sim.counts.contains(key) {
            return Err(Error::input(err(
                c.span(),
                format!("'{key}' is not a count of the truth"),
            )));
        }
    }
    Ok((log_rate, count_effects))
}

fn cluster(
    k: usize,
    c: &Spanned<RawCluster>,
    head: &Head,
    sim: &RawSimulation,
    check_terms: &TermCheck,
    err: &ErrAt,
) -> Result<SimCluster> {
    let (indicators, items) = (&head.indicators, &head.items);
    let d = indicators.len();
    let r = c.get_ref();
    let gating = match &r.gating {
        Some(g) if k == 0 => {
            return Err(Error::input(err(
                g.span(),
                "the first cluster is the gating reference and takes no gating coefficients".into(),
            )));
        }
        Some(g) => {
            check_terms(g.get_ref(), g.span(), true)?;
            g.get_ref().clone()
        }
        None => BTreeMap::new(),
    };
    let per_indicator = |m: &Spanned<BTreeMap<String, f64>>, key: &str| -> Result<Vec<f64>> {
        indicators
            .iter()
            .map(|i| {
                m.get_ref().get(i).copied().ok_or_else(|| {
                    let at = if m.span().is_empty() { c.span() } else { m.span() };
                    Error::input(err(at, format!("cluster '{}' gives no {key} for '{i}'", r.name)))
                })
            })
            .collect()
    };
    let mean = per_indicator(&r.mean, "mean")?;
    let sd = per_indicator(&r.sd, "sd")?;
    let (item_logits, item_effects) = cluster_items(r, items, check_terms, err)?;
    let (log_rate, count_effects) = cluster_counts(c, sim, check_terms, err)?;
    if sd.iter().any(|s| !(*s > 0.0)) {
        return Err(Error::input(err(r.sd.span(), "every sd must be positive".into())));
    }
    let mut effects = vec![BTreeMap::new(); d];
    if let Some(e) = &r.effects {
        for (ind, map) in e.get_ref() {
            let j = indicators.iter().position(|i| i == ind).ok_or_else(|| {
                Error::input(err(
                    e.span(),
                    format!("effects name '{ind}', which is not an indicator"),
                ))
            })?;
            check_terms(map, e.span(), false)?;
            effects[j] = map.clone();
        }
    }
    let corr = correlation(r.correlation.as_ref(), d)
        .map_err(|m| Error::input(err(r.correlation.as_ref().map_or(c.span(), Spanned::span), m)))?;
    let covariance = DMatrix::from_fn(d, d, |a, b| corr[(a, b)] * sd[a] * sd[b]);
    if d > 0 && covariance.clone().cholesky().is_none() {
        return Err(Error::input(err(
            c.span(),
            format!("the covariance of cluster '{}' is not positive definite", r.name),
        )));
    }
    Ok(SimCluster {
        name: r.name.clone(),
        gating,
        mean,
        effects,
        covariance,
        item_logits,
        item_effects,
        log_rate,
        count_effects,
    })
}

type TermCheck<'a> = dyn Fn(&BTreeMap<String, f64>, Range<usize>, bool) -> Result<()> + 'a;

/// A cluster's item probabilities and effects: per item the log odds of levels 1..
/// against level 0, and per item and level the effects by term.
#[allow(clippy::type_complexity)]
fn cluster_items(
    r: &RawCluster,
    items: &[(String, Vec<String>)],
    check_terms: &TermCheck,
    err: &dyn Fn(Range<usize>, String) -> Diagnostic,
) -> Result<(Vec<Vec<f64>>, Vec<Vec<BTreeMap<String, f64>>>)> {
    let number = |v: &toml::Value| v.as_float().or_else(|| v.as_integer().map(|i| i as f64));
    let span = r.item_probability.span();
    let mut logits = Vec::new();
    let mut effects = Vec::new();
    for (name, levels) in items {
        let l = levels.len();
        let value = r.item_probability.get_ref().get(name).ok_or_else(|| {
            Error::input(err(
                span.clone(),
                format!("cluster '{}' gives no item_probability for '{name}'", r.name),
            ))
        })?;
        let probs: Vec<f64> = match (value, l) {
            (v, 2) if number(v).is_some() => {
                let p = number(v).unwrap_or(0.5);
                vec![1.0 - p, p]
            }
            (toml::Value::Array(a), _) if a.len() == l => a.iter().map(|x| number(x).unwrap_or(-1.0)).collect(),
            _ => {
                return Err(Error::input(err(
                    span.clone(),
                    format!("item_probability of '{name}' must be P(1) for a binary item, or {l} level probabilities"),
                )))
            }
        };
        if probs.iter().any(|p| !(*p > 0.0 && *p < 1.0)) || (probs.iter().sum::<f64>() - 1.0).abs() > 1e-9 {
            return Err(Error::input(err(
                span.clone(),
                format!("item probabilities of '{name}' must lie strictly between 0 and 1 and add up to 1"),
            )));
        }
        logits.push(probs[1..].iter().map(|p| (p / probs[0]).ln()).collect());
        let mut per_level = vec![BTreeMap::new(); l - 1];
        if let Some(map) = r.item_effects.get_ref().get(name) {
            for (term, v) in map {
                let values: Vec<f64> = match v {
                    toml::Value::Array(a) if a.len() == l - 1 => a.iter().map(|x| number(x).unwrap_or(f64::NAN)).collect(),
                    other if number(other).is_some() && l == 2 => vec![number(other).unwrap_or(0.0)],
                    _ => {
                        return Err(Error::input(err(
                            r.item_effects.span(),
                            format!("the effect of '{term}' on '{name}' must be one log odds ratio per level after the first ({})", l - 1),
                        )))
                    }
                };
                for (lv, b) in values.into_iter().enumerate() {
                    per_level[lv].insert(term.clone(), b);
                }
            }
            for m in &per_level {
                check_terms(m, r.item_effects.span(), false)?;
            }
        }
        effects.push(per_level);
    }
    for key in r
        .item_probability
        .get_ref()
        .keys()
        .chain(r.item_effects.get_ref().keys())
    {
        if !items.iter().any(|(n, _)| n == key) {
            return Err(Error::input(err(
                span.clone(),
                format!("'{key}' is not an item of the truth"),
            )));
        }
    }
    Ok((logits, effects))
}

fn correlation(v: Option<&Spanned<toml::Value>>, d: usize) -> std::result::Result<DMatrix<f64>, String> {
    let Some(v) = v else {
        return Ok(DMatrix::identity(d, d));
    };
    match v.get_ref() {
        toml::Value::Float(_) | toml::Value::Integer(_) => {
            let r = v
                .get_ref()
                .as_float()
                .or_else(|| v.get_ref().as_integer().map(|i| i as f64))
                .unwrap_or(0.0);
            if !(-1.0 < r && r < 1.0) {
                return Err("correlation must be strictly between -1 and 1".into());
            }
            Ok(DMatrix::from_fn(d, d, |a, b| if a == b { 1.0 } else { r }))
        }
        toml::Value::Array(rows) => {
            let m: Option<Vec<Vec<f64>>> = rows
                .iter()
                .map(|row| {
                    row.as_array().and_then(|r| {
                        r.iter()
                            .map(|x| x.as_float().or_else(|| x.as_integer().map(|i| i as f64)))
                            .collect()
                    })
                })
                .collect();
            let m = m.ok_or("correlation must be a number or a square matrix of numbers")?;
            if m.len() != d || m.iter().any(|r| r.len() != d) {
                return Err(format!("correlation must be {d}×{d}"));
            }
            Ok(DMatrix::from_fn(d, d, |a, b| m[a][b]))
        }
        _ => Err("correlation must be a number or a square matrix".into()),
    }
}

fn term_names(covariates: &[SimCovariate]) -> Vec<String> {
    covariates
        .iter()
        .flat_map(|c| match &c.draw {
            Draw::Categorical { levels, .. } => levels.iter().skip(1).map(|l| format!("{}={l}", c.name)).collect(),
            _ => vec![c.name.clone()],
        })
        .collect()
}

/// Simulated data: the CSV text and the true cluster of each row (0-based).
#[derive(Debug, Clone)]
pub struct Simulated {
    /// CSV text with a header.
    pub csv: String,
    /// True cluster per row.
    pub clusters: Vec<usize>,
}

/// Draw the data. Covariate values used by the model are the rounded values written.
pub fn generate(truth: &Truth) -> Simulated {
    let mut rng = Stream::new(truth.seed, "simulate");
    let mut out = csv::WriterBuilder::new().flexible(true).from_writer(Vec::new());
    let mut header = vec![truth.id.clone()];
    header.extend(truth.covariates.iter().map(|c| c.name.clone()));
    header.extend(truth.indicators.iter().cloned());
    header.extend(truth.items.iter().map(|(c, _)| c.clone()));
    header.extend(truth.counts.iter().cloned());
    header.extend(truth.truth_column.iter().cloned());
    out.write_record(&header).expect("writing to memory does not fail");
    let d = truth.indicators.len();
    let chol: Vec<DMatrix<f64>> = truth
        .clusters
        .iter()
        .map(|c| {
            c.covariance
                .clone()
                .cholesky()
                .map(|l| l.l())
                .unwrap_or_else(|| DMatrix::identity(d, d))
        })
        .collect();
    let mut classes = Vec::with_capacity(truth.rows);
    let width = truth.rows.to_string().len();
    for i in 0..truth.rows {
        let (k, row) = draw_row(truth, &chol, &mut rng);
        classes.push(k);
        let mut record = vec![format!("{:0width$}", i + 1)];
        record.extend(row);
        if truth.truth_column.is_some() {
            record.push((k + 1).to_string());
        }
        out.write_record(&record).expect("writing to memory does not fail");
    }
    let csv = String::from_utf8(out.into_inner().expect("a flushed buffer")).expect("the data are text");
    Simulated { csv, clusters: classes }
}

/// One row: its true cluster, and its covariates' and indicators' cells.
fn draw_row(truth: &Truth, chol: &[DMatrix<f64>], rng: &mut Stream) -> (usize, Vec<String>) {
    let d = truth.indicators.len();
    // Draw covariates; remember each term's value for the linear predictors.
    let mut term_values: BTreeMap<String, f64> = BTreeMap::new();
    let mut row = Vec::with_capacity(truth.covariates.len() + d);
    for c in &truth.covariates {
        let (text, values) = draw_covariate(c, rng);
        term_values.extend(values);
        let missing = c.missing > 0.0 && rng.uniform() < c.missing;
        row.push(if missing { String::new() } else { text });
    }
    let eta: Vec<f64> = truth
        .clusters
        .iter()
        .enumerate()
        .map(|(k, cl)| if k == 0 { 0.0 } else { linear(&cl.gating, &term_values) })
        .collect();
    let m = eta.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let probs: Vec<f64> = eta.iter().map(|e| (e - m).exp()).collect();
    let k = rng.weighted_index(&probs);
    let cl = &truth.clusters[k];
    let e: Vec<f64> = (0..d).map(|_| rng.normal()).collect();
    for j in 0..d {
        let noise: f64 = (0..=j).map(|c| chol[k][(j, c)] * e[c]).sum();
        let y = cl.mean[j] + linear(&cl.effects[j], &term_values) + noise;
        row.push(format!("{:.*}", truth.decimals, y));
    }
    for (j, (_, levels)) in truth.items.iter().enumerate() {
        let mut eta = vec![0.0];
        for (base, effects) in cl.item_logits[j].iter().zip(&cl.item_effects[j]) {
            eta.push(base + linear(effects, &term_values));
        }
        let m = eta.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let probs: Vec<f64> = eta.iter().map(|e| (e - m).exp()).collect();
        let level = rng.weighted_index(&probs);
        let missing = truth.missing_items > 0.0 && rng.uniform() < truth.missing_items;
        row.push(if missing { String::new() } else { levels[level].clone() });
    }
    for c in 0..truth.counts.len() {
        let exposure = truth
            .exposure
            .as_ref()
            .map_or(1.0, |e| term_values.get(e).copied().unwrap_or(1.0));
        let mean = (cl.log_rate[c] + linear(&cl.count_effects[c], &term_values)).exp() * exposure;
        row.push(rng.poisson(mean).to_string());
    }
    (k, row)
}

fn linear(coefs: &BTreeMap<String, f64>, values: &BTreeMap<String, f64>) -> f64 {
    coefs
        .iter()
        .map(|(t, b)| {
            if t == "intercept" {
                *b
            } else {
                b * values.get(t).copied().unwrap_or(0.0)
            }
        })
        .sum()
}

fn draw_covariate(c: &SimCovariate, rng: &mut Stream) -> (String, Vec<(String, f64)>) {
    let round = |x: f64| -> (String, f64) {
        let text = format!("{:.*}", c.decimals, x);
        let v = text.parse().unwrap_or(x);
        (text, v)
    };
    match &c.draw {
        Draw::Normal { mean, sd, min, max } => {
            let (t, v) = round((mean + sd * rng.normal()).clamp(*min, *max));
            (t, vec![(c.name.clone(), v)])
        }
        Draw::Uniform { min, max } => {
            let (t, v) = round(min + (max - min) * rng.uniform());
            (t, vec![(c.name.clone(), v)])
        }
        Draw::Bernoulli { probability } => {
            let v = f64::from(u8::from(rng.uniform() < *probability));
            (format!("{v}"), vec![(c.name.clone(), v)])
        }
        Draw::Categorical { levels, shares } => {
            let k = rng.weighted_index(shares);
            let dummies = levels
                .iter()
                .enumerate()
                .skip(1)
                .map(|(j, l)| (format!("{}={l}", c.name), f64::from(u8::from(j == k))))
                .collect();
            (levels[k].clone(), dummies)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const TRUTH: &str = r#"
[simulation]
rows = 50
seed = 3
output = "x.csv"
indicators = ["a", "b"]
truth_column = "true_cluster"

[[covariate]]
name = "age"
distribution = "normal"
mean = 40
sd = 10

[[covariate]]
name = "sex"
distribution = "categorical"
levels = ["f", "m"]
shares = [0.5, 0.5]

[[cluster]]
name = "one"
mean = { a = 0, b = 0 }
sd = { a = 1, b = 1 }

[[cluster]]
name = "two"
gating = { intercept = 0.5, "sex=m" = 1.0 }
mean = { a = 5, b = 5 }
effects = { a = { age = 0.1 } }
sd = { a = 1, b = 2 }
correlation = 0.3
"#;

    #[test]
    fn generation_is_seeded_and_shaped() {
        let t = parse(Path::new("t.toml"), TRUTH).unwrap();
        let a = generate(&t);
        let b = generate(&t);
        assert_eq!(a.csv, b.csv);
        let lines: Vec<&str> = a.csv.lines().collect();
        assert_eq!(lines[0], "id,age,sex,a,b,true_cluster");
        assert_eq!(lines.len(), 51);
        assert!(a.clusters.contains(&0) && a.clusters.contains(&1));
    }

    #[test]
    fn unknown_terms_are_named() {
        let bad = TRUTH.replace("\"sex=m\"", "\"sex=male\"");
        let e = parse(Path::new("t.toml"), &bad).unwrap_err().to_string();
        assert!(
            e.contains("unknown term 'sex=male'") && e.contains("did you mean 'sex=m'?"),
            "{e}"
        );
    }
}
