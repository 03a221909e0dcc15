//! Helpers shared by the integration tests.

use cohortmix::data::{Column, Design};
use cohortmix::model::family::gaussian::GaussianRows;
use cohortmix::model::family::items::ItemData;
use cohortmix::model::family::Prepared;
use cohortmix::spec::VariableType;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// The families the program offers.
pub fn families() -> cohortmix::model::family::Families {
    cohortmix::model::family::Families::standard()
}

/// The fit of a study's placement `placement` at `g` clusters with `structure`, as the
/// grid makes it.
pub fn fit_one(
    study: &cohortmix::spec::Study,
    data: &cohortmix::data::Dataset,
    prepared: &cohortmix::fit::PreparedPlacement,
    placement: usize,
    g: usize,
    structure: cohortmix::model::family::CovarianceStructure,
) -> cohortmix::fit::FitResult {
    let identity = cohortmix::fit::DataIdentity::of(data);
    let spec = cohortmix::fit::fit_spec(study, &identity, placement, g, structure);
    cohortmix::fit::fit_cell(&spec, data, prepared)
}

/// A path under the crate root.
pub fn root(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(rel)
}

/// Read a CSV into named columns of text.
pub fn read_csv(path: &Path) -> (Vec<String>, Vec<Vec<String>>) {
    let mut r = csv::Reader::from_path(path).expect("fixture CSV");
    let header: Vec<String> = r.headers().unwrap().iter().map(str::to_string).collect();
    let mut cols = vec![Vec::new(); header.len()];
    for rec in r.records() {
        let rec = rec.unwrap();
        for (c, v) in cols.iter_mut().zip(rec.iter()) {
            c.push(v.to_string());
        }
    }
    (header, cols)
}

/// A continuous column from text.
pub fn numeric(values: &[String]) -> Column {
    Column::Numeric {
        kind: VariableType::Continuous,
        values: values.iter().map(|v| v.parse().unwrap()).collect(),
    }
}

/// Column by name.
pub fn col<'a>(header: &[String], cols: &'a [Vec<String>], name: &str) -> &'a [String] {
    &cols[header
        .iter()
        .position(|h| h == name)
        .unwrap_or_else(|| panic!("no column {name}"))]
}

/// Significant digits on which a and b agree (16 when equal).
pub fn digits(a: f64, b: f64) -> f64 {
    if a == b {
        16.0
    } else {
        -((a - b).abs() / b.abs().max(f64::MIN_POSITIVE)).log10()
    }
}

/// A placement with estimated proportions and no covariate lists, for tests that build
/// their designs by hand (the design decides whether the gating network has covariates).
pub fn free_placement() -> cohortmix::spec::Placement {
    cohortmix::spec::Placement {
        name: "test".into(),
        gating: vec![],
        components: vec![],
        proportions: cohortmix::spec::Proportions::Free,
        clusters: vec![],
        clusters_span: 0..0,
        acts_on: Default::default(),
        method: Default::default(),
        outcomes: vec![],
        outcome_method: Default::default(),
    }
}

/// The value of a named parameter (panics, naming it, when there is none).
pub fn param_value(
    params: &[cohortmix::model::family::Parameter],
    block: &str,
    cluster: usize,
    indicator: Option<&str>,
    term: Option<&str>,
) -> f64 {
    params
        .iter()
        .find(|p| {
            p.block.name == block
                && p.cluster == cluster
                && p.indicator.as_deref() == indicator
                && p.term.as_deref() == term
        })
        .unwrap_or_else(|| panic!("no parameter {block} {cluster} {indicator:?} {term:?}"))
        .value
}

/// Options for a plain fit of one structure: no ridge, prior, floor or smoothing.
pub fn plain_options(structure: cohortmix::model::family::CovarianceStructure) -> cohortmix::fit::ModelOptions {
    cohortmix::fit::ModelOptions {
        structure,
        gating_ridge: 0.0,
        covariance_prior: false,
        variance_floor: 0.0,
        smoothing: 0.0,
    }
}

/// Fisher's iris measurements as shipped with the reference values
/// (`tests/reference/iris.csv`): sepal length and width, petal length and width, n×4
/// row-major, and n.
pub fn iris_measurements() -> (Vec<f64>, usize) {
    let (header, cols) = read_csv(&root("tests/reference/iris.csv"));
    let names = ["sepal_length", "sepal_width", "petal_length", "petal_width"];
    let n = cols[0].len();
    let mut y = Vec::with_capacity(n * names.len());
    for i in 0..n {
        for name in names {
            y.push(col(&header, &cols, name)[i].parse::<f64>().unwrap());
        }
    }
    (y, n)
}

/// What every block of a fit without covariates shares: every case weight and gating
/// column is `ones` (length n).
pub fn unadjusted_data(ones: &[f64]) -> cohortmix::model::FitData<'_> {
    cohortmix::model::FitData {
        n: ones.len(),
        weights: ones,
        w: ones,
        p: 1,
    }
}

/// The prepared Gaussian block of `y` (n×d, row-major) on `design`; the indicators are
/// named y1, y2, ...
pub fn gaussian_block(y: &[f64], d: usize, design: &Design) -> Vec<Arc<dyn Prepared>> {
    let names: Vec<String> = (1..=d).map(|j| format!("y{j}")).collect();
    named_gaussian_block(&names, y, design)
}

/// The prepared Gaussian block of indicators `names` with values `y` (row-major) on `design`.
pub fn named_gaussian_block(names: &[String], y: &[f64], design: &Design) -> Vec<Arc<dyn Prepared>> {
    vec![cohortmix::model::family::gaussian::prepared(GaussianRows::new(
        names.to_vec(),
        Arc::new(y.to_vec()),
        design.clone(),
    ))]
}

/// Item data: codes (n×J), levels per item (named 0, 1, ...), the component design and
/// each item's design columns.
pub fn item_data(names: &[String], codes: &[u16], levels: &[usize], design: &Design, terms: &[Vec<usize>]) -> ItemData {
    let level_names = levels
        .iter()
        .map(|l| (0..*l).map(|v| v.to_string()).collect())
        .collect();
    ItemData::new(
        names.to_vec(),
        Arc::new(codes.to_vec()),
        level_names,
        design.clone(),
        terms.to_vec(),
    )
}
