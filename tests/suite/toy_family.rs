//! A component family written outside the library: exponential waiting times, one rate
//! per cluster and indicator. Defined here through the public family traits alone and
//! listed with `Families::standard().with(..)`, it is fitted, given standard errors,
//! compared, saved, cached, predicted and simulated by the library's generic code, which
//! shows that a new family needs nothing else of the library.

use super::common::root;
use cohortmix::data::{Dataset, IndicatorSet, IndicatorValues};
use cohortmix::model::family::{
    read_state, Block, BlockChart, BlockDesigns, Degeneracy, Families, Family, ParamBlock, Parameter, Prepared,
    RowSampler, RowScorer,
};
use cohortmix::model::{FitData, GaussianStats, ModelOptions};
use cohortmix::pipeline::{self, Cache, Mode, Quiet};
use cohortmix::rng::Stream;
use cohortmix::spec::{FamilyInfo, Layout, TypeKind};
use std::sync::Arc;

static INFO: FamilyInfo = FamilyInfo {
    word: "waiting-times",
    indicator_word: "waiting time",
    wanted: "continuous",
    types: &[TypeKind::Continuous],
    default_type: TypeKind::Continuous,
    mixed: &[],
    layout: Layout::Columns,
    shared_design: None,
    keys: &[],
};

const RATE: ParamBlock = ParamBlock::plain("waiting_rate");

struct WaitingTimes;
static WAITING_TIMES: WaitingTimes = WaitingTimes;

impl Family for WaitingTimes {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn prepare(&self, set: &IndicatorSet, _data: &Dataset, _designs: &BlockDesigns) -> Arc<dyn Prepared> {
        Arc::new(Times {
            names: set.names.clone(),
            y: Arc::clone(set.numbers()),
        })
    }
}

/// The times, column by column.
#[derive(Debug)]
struct Times {
    names: Vec<String>,
    y: Arc<Vec<f64>>,
}

impl Times {
    fn n(&self) -> usize {
        self.y.len() / self.names.len()
    }
}

impl Prepared for Times {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn block(self: Arc<Self>, _fd: &FitData, g: usize, _options: &ModelOptions) -> Box<dyn Block> {
        let log_rate = vec![0.0; g * self.names.len()];
        Box::new(Rates {
            times: self,
            g,
            log_rate,
        })
    }

    fn restore(
        self: Arc<Self>,
        _fd: &FitData,
        g: usize,
        _options: &ModelOptions,
        state: &serde_json::Value,
    ) -> Result<Box<dyn Block>, String> {
        let log_rate: Vec<f64> = read_state(INFO.word, state)?;
        if log_rate.len() != g * self.names.len() || log_rate.iter().any(|v| !v.is_finite()) {
            return Err("its rates do not fit the study".into());
        }
        Ok(Box::new(Rates {
            times: self,
            g,
            log_rate,
        }))
    }

    fn seeding_columns(&self) -> Vec<Vec<f64>> {
        self.y
            .chunks_exact(self.n())
            .map(|c| c.iter().map(|v| v.ln()).collect())
            .collect()
    }

    fn profile_columns(&self) -> Vec<String> {
        self.names.iter().map(|n| format!("{n} (mean)")).collect()
    }
}

/// Log rates, `log_rate[k * J + j]`.
#[derive(Debug, Clone)]
struct Rates {
    times: Arc<Times>,
    g: usize,
    log_rate: Vec<f64>,
}

impl Rates {
    fn width(&self) -> usize {
        self.times.names.len()
    }
}

impl Block for Rates {
    fn info(&self) -> &'static FamilyInfo {
        &INFO
    }

    fn add_log_density(&self, out: &mut [f64]) {
        let (n, j_count, g) = (self.times.n(), self.width(), self.g);
        for i in 0..n {
            for k in 0..g {
                for j in 0..j_count {
                    let l = self.log_rate[k * j_count + j];
                    out[i * g + k] += l - l.exp() * self.times.y[j * n + i];
                }
            }
        }
    }

    /// The rate of cluster k is Σ v / Σ v y with v = c τ_k.
    fn m_step(&mut self, fd: &FitData, tau: &[f64], _sums: Option<&GaussianStats>) -> Result<(), Degeneracy> {
        let (n, j_count, g) = (self.times.n(), self.width(), self.g);
        for k in 0..g {
            for j in 0..j_count {
                let (mut sv, mut svy) = (0.0, 0.0);
                for i in 0..n {
                    let v = fd.weights[i] * tau[i * g + k];
                    sv += v;
                    svy += v * self.times.y[j * n + i];
                }
                if !(sv > 0.0 && svy > 0.0) {
                    return Err(Degeneracy {
                        cluster: k + 1,
                        reason: "it holds no waiting time".into(),
                    });
                }
                self.log_rate[k * j_count + j] = (sv / svy).ln();
            }
        }
        Ok(())
    }

    fn n_params(&self) -> usize {
        self.log_rate.len()
    }

    fn permute(&mut self, order: &[usize]) {
        let w = self.width();
        self.log_rate = order
            .iter()
            .flat_map(|&k| self.log_rate[k * w..(k + 1) * w].to_vec())
            .collect();
    }

    fn push_coordinates(&self, out: &mut Vec<f64>) {
        out.extend_from_slice(&self.log_rate);
    }

    fn set_coordinates(&mut self, c: &[f64]) -> Result<usize, Degeneracy> {
        let len = self.log_rate.len();
        self.log_rate.copy_from_slice(&c[..len]);
        Ok(len)
    }

    fn chart(&self) -> Result<Box<dyn BlockChart + '_>, String> {
        Ok(Box::new(RateChart { base: self }))
    }

    fn parameters(&self) -> Vec<Parameter> {
        let w = self.width();
        (0..self.log_rate.len())
            .map(|i| Parameter {
                block: RATE,
                cluster: i / w + 1,
                indicator: Some(self.times.names[i % w].clone()),
                term: None,
                value: self.log_rate[i].exp(),
            })
            .collect()
    }

    fn profile(&self, k: usize, _row: Option<usize>, out: &mut Vec<f64>) {
        let w = self.width();
        out.extend(self.log_rate[k * w..(k + 1) * w].iter().map(|l| (-l).exp()));
    }

    fn sampler(&self) -> Box<dyn RowSampler + '_> {
        Box::new(TimeSampler {
            rates: self,
            y: self.times.y.to_vec(),
        })
    }

    fn state(&self) -> serde_json::Value {
        serde_json::to_value(&self.log_rate).unwrap()
    }
}

struct RateChart<'a> {
    base: &'a Rates,
}

impl BlockChart for RateChart<'_> {
    fn len(&self) -> usize {
        self.base.log_rate.len()
    }
    fn scales(&self) -> Vec<f64> {
        vec![1.0; self.len()]
    }
    fn at(&self, theta: &[f64]) -> Result<Box<dyn Block>, Degeneracy> {
        let mut b = self.base.clone();
        for (l, t) in b.log_rate.iter_mut().zip(theta) {
            *l += t;
        }
        Ok(Box::new(b))
    }
    fn scorer<'b>(&'b self, block: &'b dyn Block, _theta: &'b [f64]) -> Box<dyn RowScorer + 'b> {
        Box::new(RateScorer {
            rates: block.as_any().downcast_ref::<Rates>().unwrap(),
        })
    }
}

/// d/d log λ of log λ − λ y is 1 − λ y.
struct RateScorer<'a> {
    rates: &'a Rates,
}

impl RowScorer for RateScorer<'_> {
    fn add(&mut self, i: usize, c: f64, tau: &[f64], s: &mut [f64]) {
        let (n, w) = (self.rates.times.n(), self.rates.width());
        for (k, t) in tau.iter().enumerate() {
            for j in 0..w {
                let rate = self.rates.log_rate[k * w + j].exp();
                s[k * w + j] += c * t * (1.0 - rate * self.rates.times.y[j * n + i]);
            }
        }
    }
}

struct TimeSampler<'a> {
    rates: &'a Rates,
    y: Vec<f64>,
}

impl RowSampler for TimeSampler<'_> {
    fn draw(&mut self, i: usize, k: usize, rng: &mut Stream) {
        let (n, w) = (self.rates.times.n(), self.rates.width());
        for j in 0..w {
            let rate = self.rates.log_rate[k * w + j].exp();
            self.y[j * n + i] = -(1.0 - rng.uniform()).ln() / rate;
        }
    }
    fn finish(self: Box<Self>) -> IndicatorValues {
        IndicatorValues::Columns(Arc::new(self.y))
    }
}

/// Two groups of workers, waiting times to a first and a second sick-leave spell with
/// rates 0.2 and 0.1 per year in one group, 1 and 0.8 in the other; membership of the
/// second group rises with age.
fn write_data(path: &std::path::Path, n: usize, seed: u64) {
    let mut rng = Stream::new(seed, "waiting times");
    let mut text = String::from("worker,age,first,second\n");
    for i in 0..n {
        let age = 25.0 + 35.0 * rng.uniform();
        let second = rng.uniform() < 1.0 / (1.0 + (-(age - 42.0) / 5.0).exp());
        let (a, b) = if second { (1.0, 0.8) } else { (0.2, 0.1) };
        let draw = |r: f64, rng: &mut Stream| -(1.0 - rng.uniform()).ln() / r;
        let (x, y) = (draw(a, &mut rng), draw(b, &mut rng));
        text.push_str(&format!("w{i},{age:.1},{x:.4},{y:.4}\n"));
    }
    std::fs::write(path, text).unwrap();
}

const SPEC: &str = r#"
[study]
title = "Waiting times (simulated)"
data = "times.csv"
id = "worker"
seed = 5

[variables]
age = "continuous"

[indicators]
family = "waiting-times"
columns = ["first", "second"]

[search]
clusters = [1, 2, 3]
starts = 6

[[placement]]
name = "unadjusted"

[[placement]]
name = "age drives membership"
gating = ["age"]

[inference]
cluster_count_replicates = 9
"#;

#[test]
fn a_family_defined_outside_the_library_runs_through_every_generic_path() {
    let families = Families::standard().with(&WAITING_TIMES);
    let dir = tempfile::tempdir().unwrap();
    write_data(&dir.path().join("times.csv"), 1500, 11);
    let spec = dir.path().join("study.toml");
    std::fs::write(&spec, SPEC).unwrap();
    let loaded = pipeline::load(&spec, &families).unwrap();
    let folder = dir.path().join("run");
    let cache = Cache {
        folder: Some(&folder),
        read: true,
    };
    let run = pipeline::run(&loaded, Mode::Compare, cache, &mut Quiet).unwrap();
    assert_eq!(run.cache.fitted, 6);

    // Fitted: BIC picks two clusters, whose rates are near the truth.
    let chosen = &run.results.chosen;
    assert!(chosen.iter().all(|c| c.clusters == 2), "{chosen:?}");
    let gated = run
        .fits
        .iter()
        .find(|f| f.placement == "age drives membership" && f.clusters == 2)
        .unwrap();
    let rates: Vec<f64> = gated
        .best
        .as_ref()
        .unwrap()
        .run
        .model
        .components
        .parameters()
        .iter()
        .map(|p| p.value)
        .collect();
    let mut slow = [rates[0], rates[1]];
    let mut fast = [rates[2], rates[3]];
    if slow[0] > fast[0] {
        std::mem::swap(&mut slow, &mut fast);
    }
    for (got, want) in slow.iter().chain(&fast).zip([0.2, 0.1, 1.0, 0.8]) {
        assert!((got / want - 1.0).abs() < 0.2, "rate {got} against {want} ({rates:?})");
    }

    // Standard errors through the family's chart, an age effect on membership, and the
    // comparison with its bootstrap cluster-count test (the family's sampler).
    let record = run
        .results
        .fits
        .iter()
        .find(|f| f.placement == "age drives membership" && f.clusters == 2)
        .unwrap();
    assert_eq!(
        record.standard_errors.as_ref().and_then(|s| s.method),
        Some("observed-information")
    );
    assert!(record.parameters_named.iter().all(|p| p.se.is_some_and(|s| s > 0.0)));
    assert!(record
        .gating_tests
        .iter()
        .any(|t| t.covariate == "age" && t.p_value < 1e-6));
    let comparison = run.results.comparison.as_ref().unwrap();
    assert_eq!(comparison.indicators, ["first (mean)", "second (mean)"]);
    assert_eq!(comparison.cluster_count_tests.len(), 2);
    assert!(comparison
        .cluster_count_tests
        .iter()
        .all(|t| t.usable == 9 && t.p_value <= 0.1));

    // Saved: the run folder holds the family's block under its word.
    cohortmix::runfolder::write(&folder, &loaded, &run, manifest(&loaded)).unwrap();
    let saved_text = std::fs::read_to_string(folder.join("fitted-models.json")).unwrap();
    assert!(saved_text.contains("\"family\": \"waiting-times\""));
    let memberships = std::fs::read_to_string(folder.join("memberships.csv")).unwrap();

    // Cached: a rerun reuses every fit and gives the same results.
    let again = pipeline::run(&loaded, Mode::Compare, cache, &mut Quiet).unwrap();
    assert_eq!((again.cache.reused, again.cache.fitted), (6, 0));
    assert_eq!(
        cohortmix::render::json::results_json(&again.results),
        cohortmix::render::json::results_json(&run.results)
    );

    // Predicted: the saved models score the fitted rows to the memberships' bits.
    let stored = cohortmix::fit::saved::load_run(&folder).unwrap();
    let (study, new) = cohortmix::fit::saved::load_new_data(&stored, &dir.path().join("times.csv"), &families).unwrap();
    let predicted = cohortmix::fit::saved::predict(&stored, &study, &new, &families).unwrap();
    let sets: Vec<_> = predicted
        .iter()
        .map(|p| cohortmix::render::csv::MembershipSet {
            placement: &p.placement,
            numbers: &p.numbers,
            tau: &p.tau,
        })
        .collect();
    assert_eq!(cohortmix::render::csv::memberships_table(&new.ids, &sets), memberships);

    // Simulated: data drawn from the fitted model have the model's waiting times.
    let best = &gated.best.as_ref().unwrap().run.model;
    let pp = &loaded.prepared[1];
    let sim = cohortmix::inference::cluster_test::draw(best, &loaded.data, pp, &mut Stream::new(1, "draw"));
    let drawn = sim.indicator_sets[0].numbers();
    let mean: f64 = drawn.iter().take(1500).sum::<f64>() / 1500.0;
    let observed: f64 = loaded.data.indicator_sets[0].numbers().iter().take(1500).sum::<f64>() / 1500.0;
    assert!(
        (mean / observed - 1.0).abs() < 0.15,
        "mean first time {mean} drawn, {observed} observed"
    );
    let _ = root("");
}

fn manifest(loaded: &pipeline::Loaded) -> cohortmix::runfolder::Manifest {
    cohortmix::runfolder::Manifest {
        program: "cohortmix",
        version: "test",
        command: "compare",
        spec_sha256: String::new(),
        data_sha256: loaded.data.sha256.clone(),
        spec_file: String::new(),
        data_file: String::new(),
        threads: 1,
        fits: 0,
        seconds_reading: 0.0,
        seconds_fitting: 0.0,
        seconds_inference: 0.0,
        files: Vec::new(),
    }
}
