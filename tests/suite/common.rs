//! Helpers shared by the integration tests.

use cohortmix::data::Column;
use cohortmix::spec::VariableType;
use std::path::{Path, PathBuf};

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
            p.block == block && p.cluster == cluster && p.indicator.as_deref() == indicator && p.term.as_deref() == term
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

/// The arrays of a mixture without covariates on `y` (n×d, row-major): every case weight,
/// design and gating column is `ones` (length n).
pub fn unadjusted_data<'a>(y: &'a [f64], d: usize, ones: &'a [f64]) -> cohortmix::model::FitData<'a> {
    cohortmix::model::FitData {
        n: ones.len(),
        weights: ones,
        y,
        d,
        z: ones,
        q: 1,
        w: ones,
        p: 1,
        ..Default::default()
    }
}
