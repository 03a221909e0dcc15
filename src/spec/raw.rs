//! The study spec exactly as written: serde types that mirror the TOML.
//!
//! Unknown keys are rejected (`deny_unknown_fields`); values keep their byte spans
//! ([`toml::Spanned`]) so that checks made after parsing can still point at the line and
//! column. Nothing outside `spec` sees these types: [`super::validate`] turns them into a
//! [`super::Study`].

use serde::de::{self, Deserializer, MapAccess, Visitor};
use serde::Deserialize;
use std::collections::BTreeMap;
use std::fmt;
use toml::Spanned;

/// Spanned string.
pub type SStr = Spanned<String>;
/// Spanned list of spanned strings.
pub type SList = Spanned<Vec<SStr>>;

/// The whole spec file.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSpec {
    /// `[study]`: title, data file, id and weight columns, seed, output folder.
    pub study: Spanned<RawStudy>,
    /// `[variables]`: the type of each column used.
    #[serde(default)]
    pub variables: BTreeMap<String, Spanned<RawVariable>>,
    /// `[indicators]`: the columns that define the clusters, and their family.
    pub indicators: Spanned<RawIndicators>,
    /// `[search]`: cluster counts, starts, convergence.
    #[serde(default)]
    pub search: Option<Spanned<RawSearch>>,
    /// `[[placement]]`: where the covariates go.
    #[serde(default)]
    pub placement: Vec<Spanned<RawPlacement>>,
    /// `[compare]`: how placements are compared.
    #[serde(default)]
    pub compare: Option<Spanned<RawCompare>>,
    /// `[inference]`: standard errors and effect units.
    #[serde(default)]
    pub inference: Option<Spanned<RawInference>>,
}

/// `[inference]`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawInference {
    /// `observed-information` (default), `sandwich` or `bootstrap`.
    pub standard_errors: Option<SStr>,
    /// Bootstrap replicates (default 200).
    pub replicates: Option<Spanned<i64>>,
    /// Units per which a numeric covariate's effects are shown, e.g. `{ age = 10 }`.
    pub per: Option<Spanned<BTreeMap<String, Spanned<f64>>>>,
    /// Likelihood-ratio tests of the direct effects each compared fit leaves out
    /// (default true).
    pub direct_effect_screen: Option<Spanned<bool>>,
    /// Bootstrap replicates of the test of G against G − 1 clusters (default 0: off).
    pub cluster_count_replicates: Option<Spanned<i64>>,
}

/// `[compare]`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawCompare {
    /// Placement the others are aligned to (default: the first).
    pub reference: Option<SStr>,
    /// Cluster count used for every placement (default: each placement's lowest BIC).
    pub clusters: Option<Spanned<i64>>,
    /// Names of aligned clusters by number, e.g. `{ 1 = "preserved function" }`.
    pub names: Option<Spanned<BTreeMap<String, SStr>>>,
}

/// `[study]`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawStudy {
    /// Free text shown on every output.
    pub title: SStr,
    /// CSV file, relative to the spec file.
    pub data: SStr,
    /// Column that identifies a row; row numbers are used without it.
    pub id: Option<SStr>,
    /// Column of case weights (non-negative).
    pub weights: Option<SStr>,
    /// What the weights mean: `frequency` or `sampling`.
    pub weight_type: Option<SStr>,
    /// Column of sampling strata (design-based standard errors).
    pub strata: Option<SStr>,
    /// Column of primary sampling units, read within strata.
    pub psu: Option<SStr>,
    /// Master random seed.
    pub seed: Option<Spanned<i64>>,
    /// Run folder, relative to the spec file.
    pub output: Option<SStr>,
    /// Whether the data are simulated (the report then says so).
    pub simulated: Option<bool>,
    /// Cell texts that mean "missing" besides an empty cell and `NA`.
    pub missing_codes: Option<SList>,
}

/// One entry of `[variables]`: either a bare type word or a table.
#[derive(Debug)]
pub struct RawVariable {
    /// `continuous`, `binary`, `categorical` or `count`.
    pub kind: String,
    /// Reference level of a categorical column.
    pub reference: Option<String>,
    /// All levels of a categorical column, in order.
    pub levels: Option<Vec<String>>,
    /// What the column is called in tables and sentences.
    pub label: Option<String>,
    /// Its unit ("years", "% predicted").
    pub unit: Option<String>,
}

impl<'de> Deserialize<'de> for RawVariable {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawVariable;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str(
                    "a type word (\"continuous\", \"binary\", \"categorical\", \"count\") \
                     or a table such as { type = \"categorical\", reference = \"female\" }",
                )
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<RawVariable, E> {
                Ok(RawVariable {
                    kind: v.to_string(),
                    reference: None,
                    levels: None,
                    label: None,
                    unit: None,
                })
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<RawVariable, A::Error> {
                let mut kind = None;
                let mut reference = None;
                let mut levels = None;
                let (mut label, mut unit) = (None, None);
                while let Some(key) = map.next_key::<String>()? {
                    match key.as_str() {
                        "type" => kind = Some(map.next_value::<String>()?),
                        "reference" => reference = Some(map.next_value::<String>()?),
                        "levels" => levels = Some(map.next_value::<Vec<String>>()?),
                        "label" => label = Some(map.next_value::<String>()?),
                        "unit" => unit = Some(map.next_value::<String>()?),
                        other => {
                            return Err(de::Error::unknown_field(
                                other,
                                &["type", "reference", "levels", "label", "unit"],
                            ))
                        }
                    }
                }
                let kind = kind.ok_or_else(|| de::Error::missing_field("type"))?;
                Ok(RawVariable {
                    kind,
                    reference,
                    levels,
                    label,
                    unit,
                })
            }
        }
        deserializer.deserialize_any(V)
    }
}

/// `[indicators]`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawIndicators {
    /// Component family: `gaussian` (default), `items`, `counts` or `mixed`.
    pub family: Option<SStr>,
    /// The indicator columns.
    pub columns: SList,
    /// Person-time column for count indicators: its log is an offset (counts and mixed).
    pub exposure: Option<SStr>,
    /// Pseudo-count spread over an item's levels in every cluster, keeping item
    /// probabilities off 0 and 1 (items and mixed); 0 or absent = none.
    pub smoothing: Option<Spanned<f64>>,
}

/// `[search]`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSearch {
    /// Cluster counts to fit.
    pub clusters: Option<Spanned<Vec<Spanned<i64>>>>,
    /// Starts per fit.
    pub starts: Option<Spanned<i64>>,
    /// EM iteration cap per start.
    pub max_iterations: Option<Spanned<i64>>,
    /// Relative log-likelihood change that counts as converged.
    pub tolerance: Option<Spanned<f64>>,
    /// EM iterations every start runs before the starts are ranked.
    pub warmup_iterations: Option<Spanned<i64>>,
    /// Starts, the best after the warm-up, that run on to convergence.
    pub finish_best: Option<Spanned<i64>>,
    /// Whether EM steps are extrapolated.
    pub accelerate: Option<Spanned<bool>>,
    /// Whether starts that end in a spurious solution are set apart.
    pub spurious_guard: Option<Spanned<bool>>,
    /// Ridge penalty on the gating slopes.
    pub gating_ridge: Option<Spanned<f64>>,
    /// Covariance structures (gaussian only).
    pub covariance: Option<Spanned<toml::Value>>,
    /// Conjugate prior on covariances (posterior-mode estimates).
    pub covariance_prior: Option<Spanned<bool>>,
    /// Floor on covariance eigenvalues, relative to the smallest indicator variance.
    pub variance_floor: Option<Spanned<f64>>,
}

/// `[[placement]]`.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawPlacement {
    /// Unique name shown in every table.
    pub name: SStr,
    /// How gating effects are estimated: `one-step` (default), `three-step-bch` or
    /// `three-step-ml`.
    pub method: Option<SStr>,
    /// Covariates of the gating network (membership).
    pub gating: Option<SList>,
    /// Covariates of the component models (inside clusters).
    pub components: Option<SList>,
    /// `free`, `equal`, or a list of fixed proportions.
    pub proportions: Option<Spanned<toml::Value>>,
    /// Cluster counts for this placement instead of `[search].clusters`.
    pub clusters: Option<Spanned<Vec<Spanned<i64>>>>,
    /// Which indicators a component covariate acts on, e.g. `{ age = ["cough", "wheeze"] }`;
    /// a covariate not named here acts on every indicator.
    pub acts_on: Option<Spanned<BTreeMap<String, SList>>>,
    /// Distal outcome columns compared across the clusters.
    pub outcomes: Option<SList>,
    /// How the outcomes are compared: `bch` (default) or `ml`.
    pub outcome_method: Option<SStr>,
}
