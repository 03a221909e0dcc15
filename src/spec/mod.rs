//! The study spec: reading the TOML file and validating it into a [`Study`].
//!
//! A spec has five parts (every key is documented on the field that holds it, in
//! [`raw`], and in `docs/spec.md`):
//!
//! ```toml
//! [study]
//! title = "Respiratory profiles in an occupational cohort (simulated)"
//! data  = "../demo-data/respiratory.csv"   # relative to this file
//! id    = "worker_id"
//! seed  = 20261202
//!
//! [variables]
//! age = "continuous"
//! sex = { type = "categorical", reference = "female" }
//!
//! [indicators]
//! family  = "gaussian"
//! columns = ["fev1_pct", "fvc_pct"]
//!
//! [search]
//! clusters = [1, 2, 3]
//! starts   = 20
//!
//! [[placement]]
//! name   = "age and sex drive membership"
//! gating = ["age", "sex"]
//! ```
//!
//! [`load`] parses and checks everything that can be checked without the data; the data
//! module checks column names against the CSV header, pointing back at the spec.

pub mod families;
pub mod limits;
pub mod raw;
pub mod settings;

/// A closed set of spec words: one enum, each value with its word, written once (by
/// [`words!`]). Validation turns a word into its value with [`choose`], which suggests
/// the nearest word when it is misspelt.
pub trait Choice: Copy + 'static {
    /// Every value, in the order messages list them.
    const ALL: &'static [Self];
    /// The value's word in the spec.
    fn spec_word(&self) -> &'static str;
    /// Every word, in order.
    fn words() -> Vec<&'static str> {
        Self::ALL.iter().map(|x| x.spec_word()).collect()
    }
}

/// Give an enum its spec words: `word()` and [`Choice`].
macro_rules! words {
    ($t:ty { $($v:ident => $w:literal),* $(,)? }) => {
        impl $t {
            /// The spec word.
            pub fn word(&self) -> &'static str {
                match self {
                    $(Self::$v => $w),*
                }
            }
        }

        impl $crate::spec::Choice for $t {
            const ALL: &'static [Self] = &[$(Self::$v),*];
            fn spec_word(&self) -> &'static str {
                self.word()
            }
        }
    };
}
pub(crate) use words;

pub use families::{FamilyInfo, FamilyKey, Layout, TypeKind};
pub use limits::{MAX_CLUSTERS, MAX_PLACEMENTS};

pub use settings::{
    CompareSettings, CovarianceChoice, CovarianceStructure, ErrorMethod, Orientation, ProportionsChoice, Shape, Volume,
    WeightType,
};

use crate::error::{did_you_mean, Diagnostic, Error, Location, Result};
use raw::{RawPlacement, RawSpec, SList, SStr};
use std::collections::BTreeMap;
use std::ops::Range;
use std::path::{Path, PathBuf};
use toml::Spanned;

/// Default number of starts per fit.
pub const DEFAULT_STARTS: usize = 20;
/// Default EM iteration cap per start.
pub const DEFAULT_MAX_ITERATIONS: usize = 1000;
/// Default convergence tolerance on the relative log-likelihood change.
pub const DEFAULT_TOLERANCE: f64 = 1e-10;
/// Default EM iterations every start runs before the starts are ranked (when
/// `[search].finish_best` turns the two-stage search on).
pub const DEFAULT_WARMUP_ITERATIONS: usize = 25;
/// Default master seed when the spec gives none.
pub const DEFAULT_SEED: u64 = 1;

/// The type of a data column.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum VariableType {
    /// A real number.
    Continuous,
    /// 0 or 1.
    Binary,
    /// Unordered levels; coded against `reference` (treatment coding).
    Categorical {
        /// Level that the other levels are compared with; the first level if not given.
        reference: Option<String>,
        /// All levels in order, when the spec lists them.
        levels: Option<Vec<String>>,
    },
    /// A non-negative whole number.
    Count,
}

impl VariableType {
    /// The type without its levels.
    pub fn kind(&self) -> TypeKind {
        match self {
            VariableType::Continuous => TypeKind::Continuous,
            VariableType::Binary => TypeKind::Binary,
            VariableType::Categorical { .. } => TypeKind::Categorical,
            VariableType::Count => TypeKind::Count,
        }
    }

    /// The word used in the spec.
    pub fn word(&self) -> &'static str {
        match self {
            VariableType::Continuous => "continuous",
            VariableType::Binary => "binary",
            VariableType::Categorical { .. } => "categorical",
            VariableType::Count => "count",
        }
    }
}

/// A column name as written in the spec, with where it was written.
#[derive(Debug, Clone, PartialEq)]
pub struct ColumnRef {
    /// The column name.
    pub name: String,
    /// Byte span in the spec text.
    pub span: Range<usize>,
    /// Which key it came from, e.g. `[indicators].columns`.
    pub key: String,
}

/// The spec's choice of component family for the indicators.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FamilyChoice {
    /// Every indicator in one family.
    One(&'static FamilyInfo),
    /// Each indicator in the family its declared type belongs to ([`FamilyInfo::mixed`]).
    Mixed,
}

impl FamilyChoice {
    /// The word used in the spec.
    pub fn word(&self) -> &'static str {
        match self {
            FamilyChoice::One(f) => f.word,
            FamilyChoice::Mixed => MIXED,
        }
    }
}

/// The spec word for indicators each in the family of their declared type.
pub const MIXED: &str = "mixed";

/// The indicators of one family: they form one block of the component model.
#[derive(Debug, Clone, PartialEq)]
pub struct IndicatorBlock {
    /// The family.
    pub family: &'static FamilyInfo,
    /// Its indicators, in spec order.
    pub columns: Vec<ColumnRef>,
}

/// How cluster proportions are modelled when the gating network has no covariates.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Proportions {
    /// Estimated (a multinomial logit with covariates, or free shares without).
    Free,
    /// All clusters 1/G; no parameters.
    Equal,
    /// Given by the user; no parameters.
    Fixed(Vec<f64>),
}

/// One covariate placement: which covariates go in the gating network and which in the
/// component models.
#[derive(Debug, Clone, PartialEq)]
pub struct Placement {
    /// Unique name.
    pub name: String,
    /// Gating (membership) covariates.
    pub gating: Vec<ColumnRef>,
    /// Component (within-cluster) covariates.
    pub components: Vec<ColumnRef>,
    /// Proportions model.
    pub proportions: Proportions,
    /// Cluster counts to fit for this placement.
    pub clusters: Vec<usize>,
    /// Where the cluster counts were written (the placement's own key, else [search]).
    pub clusters_span: Range<usize>,
    /// Component covariates restricted to some indicators (`acts_on`); a component
    /// covariate not listed acts on every indicator.
    pub acts_on: BTreeMap<String, Vec<String>>,
    /// How the gating effects are estimated.
    pub method: Method,
    /// Distal outcomes compared across the clusters (not part of any model).
    pub outcomes: Vec<ColumnRef>,
    /// How the distal outcomes are compared.
    pub outcome_method: OutcomeMethod,
}

/// How a placement compares distal outcomes across its clusters, both correcting for the
/// errors of assigning rows to their most likely cluster.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, schemars::JsonSchema)]
#[serde(rename_all = "kebab-case")]
pub enum OutcomeMethod {
    /// Weighted means with the inverse classification-error weights (Bolck, Croon &
    /// Hagenaars 2004; Bakk & Vermunt 2016).
    #[default]
    Bch,
    /// A mixture of the outcome's distributions with the classification errors as known
    /// cluster densities (Vermunt 2010).
    Ml,
}

words!(OutcomeMethod {
    Bch => "bch",
    Ml => "ml",
});

/// How a placement estimates its gating effects.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, schemars::JsonSchema)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    /// Covariates in the gating network of the mixture itself (one likelihood).
    #[default]
    OneStep,
    /// Fit the clusters without gating covariates, classify, then a multinomial logit
    /// weighted to undo the classification errors (Bolck, Croon & Hagenaars 2004).
    ThreeStepBch,
    /// Fit the clusters without gating covariates, classify, then a multinomial logit
    /// whose likelihood includes the classification errors (Vermunt 2010).
    ThreeStepMl,
    /// Fit the clusters without gating covariates, then the multinomial logit of the full
    /// likelihood with the clusters' models held at that fit (Bakk & Kuha 2018).
    TwoStep,
}

words!(Method {
    OneStep => "one-step",
    ThreeStepBch => "three-step-bch",
    ThreeStepMl => "three-step-ml",
    TwoStep => "two-step",
});

impl Method {
    /// Whether the gating effects come after the clusters are fixed (three-step or
    /// two-step).
    pub fn is_stepwise(&self) -> bool {
        !matches!(self, Method::OneStep)
    }
}

impl Placement {
    /// Whether component covariate `covariate` acts on indicator `indicator`.
    pub fn acts_on(&self, covariate: &str, indicator: &str) -> bool {
        self.acts_on
            .get(covariate)
            .is_none_or(|list| list.iter().any(|i| i == indicator))
    }
}

/// Search settings shared by all placements.
#[derive(Debug, Clone, PartialEq)]
pub struct Search {
    /// Starts per fit.
    pub starts: usize,
    /// EM iteration cap per start.
    pub max_iterations: usize,
    /// Relative log-likelihood change that counts as converged.
    pub tolerance: f64,
    /// EM iterations every start runs before the starts still running are ranked.
    pub warmup_iterations: usize,
    /// How many of the starts still running after the warm-up, the best by objective,
    /// run on to convergence; the others are set aside. Equal to `starts` (the default),
    /// every start runs to its end.
    pub finish_best: usize,
    /// Whether every two EM steps are extrapolated (squared extrapolation, Varadhan &
    /// Roland 2008; see [`crate::fit::em::run`]). On by default.
    pub accelerate: bool,
    /// Whether a start whose Gaussian cluster fits a few rows too closely (see
    /// [`crate::model::family::SPURIOUS_EIGENVALUE_RATIO`]) is set apart as spurious and never
    /// chosen. On by default.
    pub spurious_guard: bool,
    /// Ridge penalty on the gating slopes (not the intercepts); 0 = none.
    pub gating_ridge: f64,
    /// Covariance structures to fit (gaussian), in the order listed.
    pub structures: Vec<CovarianceStructure>,
    /// Whether covariances get the conjugate prior (posterior-mode estimates).
    pub covariance_prior: bool,
    /// Floor on covariance eigenvalues relative to the smallest indicator variance; 0 = off.
    pub variance_floor: f64,
}

impl Search {
    /// Whether starts are set aside after the warm-up (see [`Search::finish_best`]).
    pub fn two_stages(&self) -> bool {
        two_stages(
            self.starts,
            self.finish_best,
            self.warmup_iterations,
            self.max_iterations,
        )
    }
}

/// Whether a fit of `starts` starts sets some aside: fewer finish than start, and the
/// warm-up ends before the iteration cap.
pub fn two_stages(starts: usize, finish_best: usize, warmup_iterations: usize, max_iterations: usize) -> bool {
    finish_best < starts && warmup_iterations < max_iterations
}

/// A validated study spec: the only spec type the rest of the program sees.
#[derive(Debug, Clone)]
pub struct Study {
    /// The spec file as given.
    pub spec_path: PathBuf,
    /// The spec text (for error excerpts and hashing).
    pub spec_text: String,
    /// Title.
    pub title: String,
    /// Data file, resolved against the spec's folder.
    pub data_path: PathBuf,
    /// Span of `[study].data` in the spec.
    pub data_span: Range<usize>,
    /// Id column.
    pub id: Option<ColumnRef>,
    /// Weight column.
    pub weights: Option<ColumnRef>,
    /// What the weights mean (set exactly when `weights` is).
    pub weight_type: Option<WeightType>,
    /// Sampling strata column (`[study] strata`): design-based standard errors.
    pub strata: Option<ColumnRef>,
    /// Primary sampling unit column (`[study] psu`), read within strata.
    pub psu: Option<ColumnRef>,
    /// Master seed.
    pub seed: u64,
    /// Run folder from the spec, resolved against the spec's folder.
    pub output: Option<PathBuf>,
    /// Whether the data are simulated (`[study] simulated`): the reports then say that
    /// they describe no real people.
    pub simulated: bool,
    /// Cell texts read as missing besides an empty cell and `NA` (`[study] missing_codes`).
    pub missing_codes: Vec<String>,
    /// Declared column types, by name, with their spans.
    pub variables: BTreeMap<String, (VariableType, Range<usize>)>,
    /// Labels and units of columns, by name (`[variables]`), for tables and sentences.
    pub words: BTreeMap<String, ColumnWords>,
    /// Family of the indicators, as the spec chose it.
    pub family: FamilyChoice,
    /// Indicator columns.
    pub indicators: Vec<ColumnRef>,
    /// The family of each indicator (same order as `indicators`).
    pub indicator_families: Vec<&'static FamilyInfo>,
    /// The indicators by family, in the order the program lists its families: the blocks
    /// of the component model.
    pub blocks: Vec<IndicatorBlock>,
    /// Exposure (person-time) column of count indicators.
    pub exposure: Option<ColumnRef>,
    /// Pseudo-count spread over each item's levels in every cluster (0 = none).
    pub smoothing: f64,
    /// Search settings.
    pub search: Search,
    /// Placements, in spec order.
    pub placements: Vec<Placement>,
    /// How the comparison is made.
    pub compare: CompareSettings,
    /// Standard errors and effect units.
    pub inference: Inference,
}

/// `[inference]` as validated.
#[derive(Debug, Clone, PartialEq)]
pub struct Inference {
    /// How standard errors are computed.
    pub method: ErrorMethod,
    /// Bootstrap replicates.
    pub replicates: usize,
    /// Units per which a numeric covariate's effects are shown (1 when absent).
    pub per: BTreeMap<String, f64>,
    /// Whether `compare` screens the compared fits for direct effects.
    pub direct_effect_screen: bool,
    /// Bootstrap replicates of the cluster-count test (0: not run).
    pub cluster_count_replicates: usize,
}

impl Default for Inference {
    fn default() -> Inference {
        Inference {
            method: ErrorMethod::ObservedInformation,
            replicates: DEFAULT_REPLICATES,
            per: BTreeMap::new(),
            direct_effect_screen: true,
            cluster_count_replicates: 0,
        }
    }
}

/// Bootstrap replicates when the spec does not say.
pub const DEFAULT_REPLICATES: usize = 200;

impl Study {
    /// A diagnostic pointing at a span of the spec.
    pub fn error_at(&self, span: Range<usize>, message: impl Into<String>) -> Diagnostic {
        Diagnostic::new(message).at(Location::from_span(&self.spec_path, &self.spec_text, span))
    }

    /// The type of a column: declared, or for an undeclared indicator its family's
    /// default type (gaussian: continuous, items: categorical, counts: count).
    pub fn variable_type(&self, name: &str) -> Option<VariableType> {
        if let Some((t, _)) = self.variables.get(name) {
            return Some(t.clone());
        }
        let at = self.indicators.iter().position(|c| c.name == name)?;
        Some(self.indicator_families[at].default_type.undeclared())
    }

    /// Whether some indicator's family reads `key`.
    pub fn reads(&self, key: FamilyKey) -> bool {
        self.blocks.iter().any(|b| b.family.reads(key))
    }

    /// The indicators of the families that read `key`, in block order.
    pub fn indicators_reading(&self, key: FamilyKey) -> Vec<&ColumnRef> {
        self.blocks
            .iter()
            .filter(|b| b.family.reads(key))
            .flat_map(|b| &b.columns)
            .collect()
    }

    /// Every distal outcome of any placement, in first-use order, without repeats.
    pub fn all_outcomes(&self) -> Vec<&ColumnRef> {
        let mut seen: Vec<&ColumnRef> = Vec::new();
        for o in self.placements.iter().flat_map(|p| &p.outcomes) {
            if !seen.iter().any(|s| s.name == o.name) {
                seen.push(o);
            }
        }
        seen
    }

    /// Every covariate used by any placement, in first-use order, without repeats.
    pub fn all_covariates(&self) -> Vec<&ColumnRef> {
        let mut seen: Vec<&ColumnRef> = Vec::new();
        for p in &self.placements {
            for c in p.gating.iter().chain(&p.components) {
                if !seen.iter().any(|s| s.name == c.name) {
                    seen.push(c);
                }
            }
        }
        seen
    }

    /// The largest cluster count any placement fits.
    pub fn max_clusters(&self) -> usize {
        self.placements
            .iter()
            .flat_map(|p| p.clusters.iter().copied())
            .max()
            .unwrap_or(1)
    }
}

/// Read and validate a spec file against the component families the program offers
/// (in their order).
pub fn load(path: &Path, families: &[&'static FamilyInfo]) -> Result<Study> {
    if let Ok(meta) = std::fs::metadata(path) {
        if meta.is_file() && meta.len() > limits::MAX_SPEC_BYTES {
            return Err(Error::input(
                Diagnostic::new(format!(
                    "the spec file {} holds {} bytes; a spec is at most {} KiB",
                    path.display(),
                    meta.len(),
                    limits::MAX_SPEC_BYTES >> 10
                ))
                .help("is this the spec? a study spec is a short TOML file (see docs/spec.md)"),
            ));
        }
    }
    let text = read_text(path, "spec")?;
    parse(path, &text, families)
}

/// Join a spec-relative path to the spec's folder and drop `a/..` pairs, so messages
/// show `demo-data/x.csv` rather than `configs/../demo-data/x.csv`. Purely lexical.
pub fn resolve(base: &Path, rel: &str) -> PathBuf {
    use std::path::Component;
    let joined = base.join(rel);
    let mut out: Vec<Component> = Vec::new();
    for c in joined.components() {
        match c {
            Component::CurDir => {}
            Component::ParentDir if matches!(out.last(), Some(Component::Normal(_))) => {
                out.pop();
            }
            other => out.push(other),
        }
    }
    if out.is_empty() {
        return PathBuf::from(".");
    }
    out.iter().collect()
}

/// Read a whole text file, with an input error that names it when that fails.
pub fn read_text(path: &Path, what: &str) -> Result<String> {
    if path.is_dir() {
        return Err(Error::input(
            Diagnostic::new(format!("the {what} path {} is a folder, not a file", path.display()))
                .help(format!("give the path of the {what} file inside it")),
        ));
    }
    if std::fs::metadata(path).is_ok_and(|m| !m.is_file()) {
        return Err(Error::input(
            Diagnostic::new(format!(
                "the {what} path {} is a device, a pipe or a socket, not a file",
                path.display()
            ))
            .help(format!("give the path of the {what} file")),
        ));
    }
    let bytes = std::fs::read(path).map_err(|e| {
        Error::input(
            Diagnostic::new(format!(
                "cannot read the {what} file {}: {}",
                path.display(),
                io_words(&e)
            ))
            .help("check the path; paths in a spec are relative to the spec file"),
        )
    })?;
    String::from_utf8(bytes).map_err(|e| {
        let text_before = String::from_utf8_lossy(&e.as_bytes()[..e.utf8_error().valid_up_to()]).to_string();
        let line = text_before.matches('\n').count() + 1;
        let column = text_before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
        Error::input(
            Diagnostic::new(format!("the {what} file is not valid UTF-8 text"))
                .at(Location::at(path, line, column, None))
                .help("save the file as UTF-8"),
        )
    })
}

/// Plain words for an I/O error kind.
pub fn io_words(e: &std::io::Error) -> String {
    match e.kind() {
        std::io::ErrorKind::NotFound => "no such file".to_string(),
        std::io::ErrorKind::PermissionDenied => "permission denied".to_string(),
        _ => e.to_string(),
    }
}

/// Parse and validate spec text that was read from `path` (see [`load`]).
///
/// The text is read in Unicode normal form C, so that names typed with a precomposed or
/// a decomposed accent are the same name; a key or string holding a control character
/// (a line break, a tab, a terminal escape) is refused where it stands.
pub fn parse(path: &Path, text: &str, families: &[&'static FamilyInfo]) -> Result<Study> {
    let text = nfc(text);
    let raw: RawSpec = toml::from_str(&text).map_err(|e| toml_error(path, &text, &e))?;
    plain_text(path, &text)?;
    validate(path, &text, raw, families)
}

/// `s` in Unicode normal form C (the text itself when it is already, as ASCII always is).
pub fn nfc(s: &str) -> std::borrow::Cow<'_, str> {
    use unicode_normalization::{is_nfc_quick, IsNormalized, UnicodeNormalization};
    if s.is_ascii() || is_nfc_quick(s.chars()) == IsNormalized::Yes {
        std::borrow::Cow::Borrowed(s)
    } else {
        std::borrow::Cow::Owned(s.nfc().collect())
    }
}

/// The first control character of `s`, if any.
pub fn control_character(s: &str) -> Option<char> {
    s.chars().find(|c| c.is_control())
}

/// Every key and string of the spec is plain text: no control character.
fn plain_text(path: &Path, text: &str) -> Result<()> {
    use toml::de::{DeTable, DeValue};
    use toml::Spanned;
    fn value(v: &Spanned<DeValue>) -> Option<Range<usize>> {
        match v.get_ref() {
            DeValue::String(s) => control_character(s).map(|_| v.span()),
            DeValue::Array(items) => items.iter().find_map(value),
            DeValue::Table(t) => table(t),
            _ => None,
        }
    }
    fn table(t: &DeTable) -> Option<Range<usize>> {
        t.iter().find_map(|(k, v)| {
            if control_character(k.get_ref()).is_some() {
                Some(k.span())
            } else {
                value(v)
            }
        })
    }
    let Ok(doc) = DeTable::parse(text) else {
        return Ok(());
    };
    match table(doc.get_ref()) {
        None => Ok(()),
        Some(span) => {
            let found = control_character(&text[span.clone()]).map_or_else(
                || "an escaped control character".to_string(),
                |c| format!("the control character U+{:04X}", u32::from(c)),
            );
            Err(Error::input(
                Diagnostic::new(format!("this name or text holds {found}"))
                    .at(Location::from_span(path, text, span))
                    .help("titles, names and levels are plain text on one line: remove line breaks, tabs and escapes such as \\n or \\u001b"),
            ))
        }
    }
}

fn toml_error(path: &Path, text: &str, e: &toml::de::Error) -> Error {
    let message = e.message().trim().to_string();
    let mut d = Diagnostic::new(first_line(&message));
    if let Some(span) = e.span() {
        d = d.at(Location::from_span(path, text, span));
    }
    let structural = message.starts_with("unknown field") || message.starts_with("missing field");
    if !structural {
        d = d.help("the spec is not valid TOML here, or a value has the wrong kind (see docs/spec.md)");
    }
    // serde says: unknown field `x`, expected one of `a`, `b`
    if let Some(rest) = message.strip_prefix("unknown field `") {
        if let Some((word, expected)) = rest.split_once('`') {
            let options: Vec<&str> = expected.split('`').skip(1).step_by(2).collect();
            d.message = format!("unknown key '{word}'");
            if let Some(s) = did_you_mean(word, options.iter().copied()) {
                d = d.help(format!("did you mean '{s}'?"));
            }
            if !options.is_empty() {
                d = d.help(format!("keys allowed here: {}", options.join(", ")));
            }
        }
    } else if let Some(field) = message.strip_prefix("missing field `") {
        let field = field.split('`').next().unwrap_or("");
        d.message = format!("missing key '{field}'");
        d = d.help(format!("add {field} = ... to this table (see docs/spec.md)"));
    }
    Error::input(d)
}

fn first_line(s: &str) -> String {
    s.lines().next().unwrap_or("").to_string()
}

fn column_ref(s: &SStr, key: &str) -> ColumnRef {
    ColumnRef {
        name: s.get_ref().clone(),
        span: s.span(),
        key: key.to_string(),
    }
}

fn column_list(list: &Option<SList>, key: &str) -> Vec<ColumnRef> {
    list.as_ref()
        .map_or_else(Vec::new, |l| l.get_ref().iter().map(|s| column_ref(s, key)).collect())
}

struct Ctx<'a> {
    path: &'a Path,
    text: &'a str,
}

impl Ctx<'_> {
    fn err(&self, span: Range<usize>, message: impl Into<String>) -> Diagnostic {
        Diagnostic::new(message).at(Location::from_span(self.path, self.text, span))
    }
}

/// The value of a spec word `got` (written at `span`), or an input error: `message` says
/// what is wrong, then the nearest word as "did you mean", then `help` of every word.
fn choose<T: Choice>(
    ctx: &Ctx,
    span: Range<usize>,
    got: &str,
    message: String,
    help: impl FnOnce(&[&str]) -> String,
) -> Result<T> {
    if let Some(v) = T::ALL.iter().find(|x| x.spec_word() == got) {
        return Ok(*v);
    }
    let words = T::words();
    let mut d = ctx.err(span, message);
    if let Some(s) = did_you_mean(got, words.iter().copied()) {
        d = d.help(format!("did you mean '{s}'?"));
    }
    Err(Error::input(d.help(help(&words))))
}

/// `help` for [`choose`] that lists the words after `label`.
fn listed(label: &'static str) -> impl FnOnce(&[&str]) -> String {
    move |words| format!("{label}{}", words.join(", "))
}

fn positive(ctx: &Ctx, v: &Spanned<i64>, key: &str, min: i64) -> Result<usize> {
    let x = *v.get_ref();
    if x < min {
        return Err(Error::input(
            ctx.err(v.span(), format!("{key} must be at least {min}, not {x}"))
                .help(format!("write a whole number of {min} or more")),
        ));
    }
    usize::try_from(x).map_err(|_| Error::input(ctx.err(v.span(), format!("{key} is too large"))))
}

/// [`positive`], and at most `max` (a limit of [`limits`]).
fn bounded(ctx: &Ctx, v: &Spanned<i64>, key: &str, min: i64, max: usize) -> Result<usize> {
    let x = positive(ctx, v, key, min)?;
    if x > max {
        return Err(Error::input(
            ctx.err(v.span(), format!("{key} is {x}; at most {max} are supported"))
                .help("the limits and their reasons are listed in docs/spec.md"),
        ));
    }
    Ok(x)
}

fn cluster_list(ctx: &Ctx, v: &Spanned<Vec<Spanned<i64>>>, key: &str) -> Result<Vec<usize>> {
    if v.get_ref().is_empty() {
        return Err(Error::input(
            ctx.err(v.span(), format!("{key} is empty"))
                .help("list at least one cluster count, e.g. [1, 2, 3]"),
        ));
    }
    let mut out = Vec::new();
    for c in v.get_ref() {
        let g = positive(ctx, c, key, 1)?;
        if g > MAX_CLUSTERS {
            return Err(Error::input(
                ctx.err(
                    c.span(),
                    format!("{key} asks for {g} clusters; at most {MAX_CLUSTERS} are supported"),
                )
                .help("list fewer clusters; the limits are listed in docs/spec.md"),
            ));
        }
        if out.contains(&g) {
            return Err(Error::input(ctx.err(c.span(), format!("{key} lists {g} twice"))));
        }
        out.push(g);
    }
    out.sort_unstable();
    Ok(out)
}

/// Validate a parsed spec into a [`Study`] (see [`load`]).
pub fn validate(path: &Path, text: &str, raw: RawSpec, families: &[&'static FamilyInfo]) -> Result<Study> {
    let ctx = Ctx { path, text };
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let study = raw.study.get_ref();
    let (title, seed) = study_keys(&ctx, study)?;
    let variables = variables(&ctx, &raw.variables)?;
    let words = column_words(&ctx, &raw.variables)?;
    let ind = indicators(&ctx, &raw.indicators, families, &variables)?;
    let (default_clusters, default_span, search) = search(&ctx, &raw, &ind.blocks)?;
    let placements = placements(&ctx, &raw.placement, &default_clusters, &default_span, &ind)?;
    let id = study.id.as_ref().map(|s| column_ref(s, "[study].id"));
    let weights = study.weights.as_ref().map(|s| column_ref(s, "[study].weights"));
    let strata = study.strata.as_ref().map(|s| column_ref(s, "[study].strata"));
    let psu = study.psu.as_ref().map(|s| column_ref(s, "[study].psu"));
    let specials = [&id, &weights, &strata, &psu];
    special_columns(&ctx, &specials, &ind, &placements)?;
    let weight_type = weight_type(&ctx, study)?;
    survey_design(&ctx, study, weight_type, &placements)?;
    let survey = strata.is_some() || psu.is_some();
    let output = study.output.as_ref().map(|o| resolve(&base, o.get_ref()));
    let search_span = raw.search.as_ref().map_or(0..0, |s| s.span());
    grid_size(&ctx, search_span, &placements, &search)?;
    let compare = compare_settings(&ctx, raw.compare.as_ref(), &placements)?;
    let inference = inference_settings(
        &ctx,
        raw.inference.as_ref(),
        &placements,
        &variables,
        weight_type,
        survey,
    )?;
    Ok(Study {
        spec_path: path.to_path_buf(),
        spec_text: text.to_string(),
        title,
        data_path: resolve(&base, study.data.get_ref()),
        data_span: study.data.span(),
        id,
        weights,
        weight_type,
        strata,
        psu,
        seed,
        output,
        simulated: study.simulated.unwrap_or(false),
        missing_codes: missing_codes(&ctx, study.missing_codes.as_ref())?,
        variables,
        words,
        family: ind.family,
        indicators: ind.indicators,
        indicator_families: ind.indicator_families,
        blocks: ind.blocks,
        exposure: ind.exposure,
        smoothing: ind.smoothing,
        search,
        placements,
        compare,
        inference,
    })
}

/// `[study]`: its title and seed (and that its data path is not empty).
fn study_keys(ctx: &Ctx, study: &raw::RawStudy) -> Result<(String, u64)> {
    let title = study.title.get_ref().trim().to_string();
    if title.is_empty() {
        return Err(Error::input(
            ctx.err(study.title.span(), "[study].title is empty")
                .help("give the study a title"),
        ));
    }
    let data = study.data.get_ref();
    if data.trim().is_empty() {
        return Err(Error::input(
            ctx.err(study.data.span(), "[study].data is empty")
                .help("give the path of the CSV file"),
        ));
    }
    let seed = match &study.seed {
        None => DEFAULT_SEED,
        Some(s) if *s.get_ref() < 0 => {
            return Err(Error::input(ctx.err(s.span(), "[study].seed must be zero or positive")));
        }
        Some(s) => *s.get_ref() as u64,
    };

    Ok((title, seed))
}

/// The declared types of `[variables]`.
fn variables(ctx: &Ctx, raw: &BTreeMap<String, Spanned<raw::RawVariable>>) -> Result<Variables> {
    let mut variables = BTreeMap::new();
    for (name, v) in raw {
        let r = v.get_ref();
        let kind: TypeKind = choose(
            ctx,
            v.span(),
            &r.kind,
            format!("unknown variable type '{}' for '{name}'", r.kind),
            listed("types: "),
        )?;
        let t = match kind {
            TypeKind::Categorical => {
                if let (Some(reference), Some(levels)) = (&r.reference, &r.levels) {
                    if !levels.contains(reference) {
                        return Err(Error::input(
                            ctx.err(
                                v.span(),
                                format!("reference level '{reference}' of '{name}' is not in its levels"),
                            )
                            .help(format!("levels listed: {}", levels.join(", "))),
                        ));
                    }
                }
                VariableType::Categorical {
                    reference: r.reference.clone(),
                    levels: r.levels.clone(),
                }
            }
            other => other.undeclared(),
        };
        if !matches!(t, VariableType::Categorical { .. }) && (r.reference.is_some() || r.levels.is_some()) {
            return Err(Error::input(
                ctx.err(
                    v.span(),
                    format!("'{name}' is {}, so it has no reference level or levels", t.word()),
                )
                .help("use type = \"categorical\" for a column with levels"),
            ));
        }
        variables.insert(name.clone(), (t, v.span()));
    }

    Ok(variables)
}

/// `[study] missing_codes`: texts such as "." or "-99" that mean a missing value. A code
/// is compared with the whole cell (after Unicode normalisation), so "-99" does not
/// make "-99.5" missing; an empty code is an error (an empty cell is missing already).
fn missing_codes(ctx: &Ctx, list: Option<&SList>) -> Result<Vec<String>> {
    let Some(list) = list else { return Ok(Vec::new()) };
    let mut out = Vec::new();
    for code in list.get_ref() {
        let text = nfc(code.get_ref()).to_string();
        if text.trim().is_empty() {
            return Err(Error::input(
                ctx.err(code.span(), "a missing-value code is empty")
                    .help("empty cells are read as missing already; list only codes such as \".\" or \"-99\""),
            ));
        }
        if !out.contains(&text) {
            out.push(text);
        }
    }
    Ok(out)
}

/// What a column is called in tables and sentences, and its unit.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, schemars::JsonSchema)]
pub struct ColumnWords {
    /// Label (the column name when not given).
    pub label: Option<String>,
    /// Unit, such as "years" or "% predicted".
    pub unit: Option<String>,
}

/// The labels and units of `[variables]`; an empty one is an error.
fn column_words(ctx: &Ctx, raw: &BTreeMap<String, Spanned<raw::RawVariable>>) -> Result<BTreeMap<String, ColumnWords>> {
    let mut out = BTreeMap::new();
    for (name, v) in raw {
        let r = v.get_ref();
        for (key, text) in [("label", &r.label), ("unit", &r.unit)] {
            if text.as_deref().is_some_and(|t| t.trim().is_empty()) {
                return Err(Error::input(
                    ctx.err(v.span(), format!("the {key} of '{name}' is empty"))
                        .help(format!("write a {key}, or leave the key out")),
                ));
            }
        }
        if r.label.is_some() || r.unit.is_some() {
            let clean = |t: &Option<String>| t.as_ref().map(|t| t.trim().to_string());
            out.insert(
                name.clone(),
                ColumnWords {
                    label: clean(&r.label),
                    unit: clean(&r.unit),
                },
            );
        }
    }
    Ok(out)
}

/// Declared column types, by name, with their spans.
type Variables = BTreeMap<String, (VariableType, Range<usize>)>;

/// `[indicators]` as validated.
struct IndicatorKeys {
    family: FamilyChoice,
    indicators: Vec<ColumnRef>,
    indicator_families: Vec<&'static FamilyInfo>,
    blocks: Vec<IndicatorBlock>,
    exposure: Option<ColumnRef>,
    smoothing: f64,
}

/// `[indicators]`: the family of each indicator, the blocks, exposure and smoothing.
fn indicators(
    ctx: &Ctx,
    raw: &Spanned<raw::RawIndicators>,
    families: &[&'static FamilyInfo],
    variables: &Variables,
) -> Result<IndicatorKeys> {
    let ind = raw.get_ref();
    let family = family_choice(ctx, ind.family.as_ref(), families)?;
    let indicators = column_list(&Some(ind.columns.clone()), "[indicators].columns");
    if indicators.is_empty() {
        return Err(Error::input(
            ctx.err(ind.columns.span(), "[indicators].columns is empty")
                .help("list the columns that define the clusters"),
        ));
    }
    check_unique(ctx, &indicators)?;
    let indicator_families = indicators
        .iter()
        .map(|c| indicator_family(ctx, family, families, c, variables.get(&c.name).map(|(t, _)| t)))
        .collect::<Result<Vec<_>>>()?;
    let blocks: Vec<IndicatorBlock> = families
        .iter()
        .filter(|f| indicator_families.contains(f))
        .map(|f| IndicatorBlock {
            family: f,
            columns: indicators
                .iter()
                .zip(&indicator_families)
                .filter(|(_, g)| *g == f)
                .map(|(c, _)| c.clone())
                .collect(),
        })
        .collect();
    let reads = |key| blocks.iter().any(|b| b.family.reads(key));
    let exposure = ind.exposure.as_ref().map(|e| column_ref(e, "[indicators].exposure"));
    if let Some(e) = &exposure {
        if !reads(FamilyKey::Exposure) {
            return Err(Error::input(
                ctx.err(
                    e.span.clone(),
                    "[indicators].exposure is given, but no indicator is a count",
                )
                .help("an exposure (person-time) column belongs to count indicators; remove it"),
            ));
        }
        if indicators.iter().any(|c| c.name == e.name) {
            return Err(Error::input(ctx.err(
                e.span.clone(),
                format!("'{}' is an indicator and cannot also be the exposure", e.name),
            )));
        }
    }
    let smoothing = smoothing(ctx, ind.smoothing.as_ref(), reads(FamilyKey::Smoothing))?;
    Ok(IndicatorKeys {
        family,
        indicators,
        indicator_families,
        blocks,
        exposure,
        smoothing,
    })
}

/// `[indicators].smoothing`: zero or positive, and only for families that read it
/// (`read`).
fn smoothing(ctx: &Ctx, smoothing: Option<&Spanned<f64>>, read: bool) -> Result<f64> {
    Ok(match smoothing {
        None => 0.0,
        Some(v) => {
            let a = *v.get_ref();
            if !(a.is_finite() && a >= 0.0) {
                return Err(Error::input(
                    ctx.err(
                        v.span(),
                        format!("[indicators].smoothing must be zero or positive, not {a}"),
                    )
                    .help("it is a pseudo-count per item and cluster; 1 is a mild value, 0 turns it off"),
                ));
            }
            if a > 0.0 && !read {
                return Err(Error::input(
                    ctx.err(v.span(), "[indicators].smoothing is given, but no indicator is an item")
                        .help("smoothing keeps item probabilities off 0 and 1; remove it"),
                ));
            }
            a
        }
    })
}

/// `[search]`: the default cluster counts (and where they are written) and the settings.
fn search(ctx: &Ctx, raw: &RawSpec, blocks: &[IndicatorBlock]) -> Result<(Vec<usize>, Range<usize>, Search)> {
    let n_gaussian: usize = blocks
        .iter()
        .filter(|b| b.family.reads(FamilyKey::Covariance))
        .map(|b| b.columns.len())
        .sum();
    let default_span = raw
        .search
        .as_ref()
        .map(|s| s.get_ref().clusters.as_ref().map_or(s.span(), |c| c.span()))
        .unwrap_or(raw.indicators.span());
    let (default_clusters, search) = match &raw.search {
        None => (
            vec![1, 2, 3],
            Search {
                starts: DEFAULT_STARTS,
                max_iterations: DEFAULT_MAX_ITERATIONS,
                tolerance: DEFAULT_TOLERANCE,
                warmup_iterations: DEFAULT_WARMUP_ITERATIONS,
                finish_best: DEFAULT_STARTS,
                accelerate: true,
                spurious_guard: true,
                gating_ridge: 0.0,
                structures: vec![CovarianceStructure::UNCONSTRAINED],
                covariance_prior: false,
                variance_floor: 0.0,
            },
        ),
        Some(s) => search_settings(ctx, s.get_ref(), n_gaussian)?,
    };

    // With one continuous indicator only the variance can differ between clusters: the
    // unconstrained structure (the default, or asked for) is then the spherical one.
    let mut search = search;
    if n_gaussian == 1 && search.structures == [CovarianceStructure::UNCONSTRAINED] {
        search.structures = vec![CovarianceStructure::new(
            Volume::Varying,
            Shape::Spherical,
            Orientation::Axes,
        )];
    }
    if n_gaussian == 0 && search.structures.len() > 1 {
        return Err(Error::input(
            ctx.err(
                raw.search.as_ref().map_or(0..0, |s| s.span()),
                "[search].covariance lists structures, but no indicator is continuous",
            )
            .help("remove covariance from [search]: it applies to continuous indicators only"),
        ));
    }

    Ok((default_clusters, default_span, search))
}

/// The grid (placements × cluster counts × covariance structures) within
/// [`limits::MAX_FITS`].
fn grid_size(ctx: &Ctx, span: Range<usize>, placements: &[Placement], search: &Search) -> Result<()> {
    let fits: usize = placements.iter().map(|p| p.clusters.len()).sum::<usize>() * search.structures.len();
    if fits > limits::MAX_FITS {
        return Err(Error::input(
            ctx.err(
                span,
                format!(
                    "the spec asks for {fits} fits (placements × cluster counts × covariance structures); at most {} are supported",
                    limits::MAX_FITS
                ),
            )
            .help("fit fewer cluster counts or structures, or split the study into several specs"),
        ));
    }
    Ok(())
}

/// `[[placement]]`, or the one unadjusted placement when there is none.
fn placements(
    ctx: &Ctx,
    raw: &[Spanned<RawPlacement>],
    default_clusters: &[usize],
    default_span: &Range<usize>,
    ind: &IndicatorKeys,
) -> Result<Vec<Placement>> {
    let mut placements = Vec::new();
    if let Some(extra) = raw.get(MAX_PLACEMENTS) {
        return Err(Error::input(
            ctx.err(
                extra.span(),
                format!(
                    "the spec lists {} placements; at most {MAX_PLACEMENTS} are supported",
                    raw.len()
                ),
            )
            .help("split the study into several specs, each with its own run folder"),
        ));
    }
    if raw.is_empty() {
        placements.push(Placement {
            name: "unadjusted".to_string(),
            gating: Vec::new(),
            components: Vec::new(),
            proportions: Proportions::Free,
            clusters: default_clusters.to_vec(),
            clusters_span: default_span.clone(),
            acts_on: BTreeMap::new(),
            method: Method::OneStep,
            outcomes: Vec::new(),
            outcome_method: OutcomeMethod::Bch,
        });
    }
    for p in raw {
        let placement = placement(ctx, p, default_clusters, default_span, &ind.indicators, &ind.blocks)?;
        if let Some(first) = placements.iter().find(|q: &&Placement| q.name == placement.name) {
            let _ = first;
            return Err(Error::input(
                ctx.err(
                    p.get_ref().name.span(),
                    format!("two placements are named '{}'", placement.name),
                )
                .help("give every [[placement]] a different name"),
            ));
        }
        placements.push(placement);
    }

    Ok(placements)
}

/// The id, weight, strata, sampling-unit and exposure columns are neither covariates nor
/// indicators, and no two of the study's special columns are one column.
fn special_columns(
    ctx: &Ctx,
    specials: &[&Option<ColumnRef>],
    ind: &IndicatorKeys,
    placements: &[Placement],
) -> Result<()> {
    let named: Vec<&ColumnRef> = specials.iter().filter_map(|s| s.as_ref()).collect();
    for special in named.iter().copied().chain(ind.exposure.iter()) {
        for p in placements {
            if let Some(c) = p.gating.iter().chain(&p.components).find(|c| c.name == special.name) {
                return Err(Error::input(
                    ctx.err(
                        c.span.clone(),
                        format!("'{}' is the {} column and cannot be a covariate", c.name, special.key),
                    )
                    .help("remove it from the placement's covariate lists"),
                ));
            }
            if let Some(o) = p.outcomes.iter().find(|o| o.name == special.name) {
                return Err(Error::input(
                    ctx.err(
                        o.span.clone(),
                        format!(
                            "'{}' is the {} column and cannot be a distal outcome",
                            o.name, special.key
                        ),
                    )
                    .help("remove it from the placement's outcomes"),
                ));
            }
        }
        if let Some(c) = ind.indicators.iter().find(|c| c.name == special.name) {
            return Err(Error::input(ctx.err(
                c.span.clone(),
                format!("'{}' is the {} column and cannot be an indicator", c.name, special.key),
            )));
        }
    }
    for (k, later) in named.iter().enumerate() {
        if let Some(earlier) = named[..k].iter().find(|e| e.name == later.name) {
            return Err(Error::input(
                ctx.err(
                    later.span.clone(),
                    format!("{} names the same column as {}", later.key, earlier.key),
                )
                .help("each of id, weights, strata and psu needs a column of its own"),
            ));
        }
    }

    Ok(())
}

/// `[study] strata` and `psu`: a survey design, for design-based standard errors. It
/// goes with sampling weights (or none: equal selection probabilities), not with frequency
/// weights, and not yet with three-step placements, whose step-3 errors treat rows as
/// the sampling units.
fn survey_design(
    ctx: &Ctx,
    study: &raw::RawStudy,
    weight_type: Option<WeightType>,
    placements: &[Placement],
) -> Result<()> {
    let Some(first) = study.strata.as_ref().or(study.psu.as_ref()) else {
        return Ok(());
    };
    if weight_type == Some(WeightType::Frequency) {
        return Err(Error::input(
            ctx.err(
                first.span(),
                "strata and sampling units describe a survey sample, but the weights are declared as frequency weights",
            )
            .help("use weight_type = \"sampling\" for a survey's inverse selection probabilities, or remove strata and psu"),
        ));
    }
    if let Some(p) = placements.iter().find(|p| p.method.is_stepwise()) {
        return Err(Error::input(
            ctx.err(
                first.span(),
                format!(
                    "placement '{}' is estimated in three steps, whose step-3 standard errors do not yet take strata or sampling units",
                    p.name
                ),
            )
            .help("fit that placement in one step (remove its method key), or remove strata and psu from [study]"),
        ));
    }
    Ok(())
}

/// `[study] weight_type`: required with `weights`, refused without.
fn weight_type(ctx: &Ctx, study: &raw::RawStudy) -> Result<Option<WeightType>> {
    match (&study.weights, &study.weight_type) {
        (None, None) => Ok(None),
        (Some(w), None) => Err(Error::input(
            ctx.err(
                w.span(),
                "[study].weights is given without saying what the weights mean",
            )
            .help(
                "add weight_type = \"frequency\" (a row stands for that many identical people) or \
                     weight_type = \"sampling\" (inverse selection probabilities of a survey sample) to [study]",
            ),
        )),
        (None, Some(t)) => Err(Error::input(
            ctx.err(t.span(), "[study].weight_type is given without [study].weights")
                .help("name the column of case weights with weights = \"column\", or remove weight_type"),
        )),
        (Some(_), Some(t)) => choose(
            ctx,
            t.span(),
            t.get_ref(),
            format!("[study].weight_type does not know '{}'", t.get_ref()),
            listed("use one of: "),
        )
        .map(Some),
    }
}

fn inference_settings(
    ctx: &Ctx,
    raw: Option<&Spanned<raw::RawInference>>,
    placements: &[Placement],
    variables: &BTreeMap<String, (VariableType, Range<usize>)>,
    weight_type: Option<WeightType>,
    survey: bool,
) -> Result<Inference> {
    let mut out = Inference::default();
    let design_based = weight_type == Some(WeightType::Sampling) || survey;
    if design_based {
        // Design-based errors: the sandwich (linearisation) is the default under sampling
        // weights or a survey design; the observed information would treat the weights as
        // counts of people and the rows as independent.
        out.method = ErrorMethod::Sandwich;
    }
    let Some(raw) = raw else { return Ok(out) };
    let r = raw.get_ref();
    if let Some(m) = &r.standard_errors {
        out.method = choose(
            ctx,
            m.span(),
            m.get_ref(),
            format!("[inference].standard_errors does not know '{}'", m.get_ref()),
            listed("use one of: "),
        )?;
        if survey && out.method != ErrorMethod::Sandwich {
            return Err(Error::input(
                ctx.err(
                    m.span(),
                    format!(
                        "[inference].standard_errors = \"{}\" treats rows as independent, but [study] names strata or sampling units",
                        m.get_ref()
                    ),
                )
                .help("use \"sandwich\" (design-based, by linearisation over the sampling units within strata; the default with a survey design)"),
            ));
        }
        if weight_type == Some(WeightType::Sampling) && out.method == ErrorMethod::ObservedInformation {
            return Err(Error::input(
                ctx.err(
                    m.span(),
                    "[inference].standard_errors = \"observed-information\" treats sampling weights as counts of people, which makes the errors too small or too large",
                )
                .help("use \"sandwich\" (design-based, by linearisation; the default with sampling weights) or \"bootstrap\""),
            ));
        }
    }
    if let Some(b) = &r.replicates {
        out.replicates = bounded(ctx, b, "[inference].replicates", 2, limits::MAX_REPLICATES)?;
    }
    if let Some(b) = &r.direct_effect_screen {
        out.direct_effect_screen = *b.get_ref();
    }
    if let Some(b) = &r.cluster_count_replicates {
        out.cluster_count_replicates = bounded(
            ctx,
            b,
            "[inference].cluster_count_replicates",
            0,
            limits::MAX_COUNT_REPLICATES,
        )?;
    }
    if let Some(per) = &r.per {
        for (name, units) in per.get_ref() {
            let used = placements
                .iter()
                .any(|p| p.gating.iter().chain(&p.components).any(|c| c.name == *name));
            if !used {
                let names: Vec<&str> = placements
                    .iter()
                    .flat_map(|p| p.gating.iter().chain(&p.components))
                    .map(|c| c.name.as_str())
                    .collect();
                let mut d = ctx.err(
                    per.span(),
                    format!("[inference].per names '{name}', which no placement uses as a covariate"),
                );
                if let Some(s) = did_you_mean(name, names.iter().copied()) {
                    d = d.help(format!("did you mean '{s}'?"));
                }
                return Err(Error::input(d));
            }
            let numeric = matches!(
                variables.get(name).map(|v| &v.0),
                Some(VariableType::Continuous | VariableType::Count) | None
            );
            if !numeric {
                return Err(Error::input(
                    ctx.err(
                        per.span(),
                        format!("[inference].per gives units for '{name}', which is not a numeric covariate"),
                    )
                    .help("units apply to continuous and count covariates; a binary or categorical covariate's effect is always one level against its reference"),
                ));
            }
            let x = *units.get_ref();
            if !(x > 0.0 && x.is_finite()) {
                return Err(Error::input(
                    ctx.err(
                        units.span(),
                        format!("[inference].per.{name} must be a positive number, not {x}"),
                    )
                    .help("e.g. per = { age = 10 } shows age effects per 10 years"),
                ));
            }
            out.per.insert(name.clone(), x);
        }
    }
    Ok(out)
}

fn compare_settings(
    ctx: &Ctx,
    raw: Option<&Spanned<raw::RawCompare>>,
    placements: &[Placement],
) -> Result<CompareSettings> {
    let mut settings = CompareSettings {
        reference: 0,
        clusters: None,
        names: BTreeMap::new(),
    };
    let Some(raw) = raw else { return Ok(settings) };
    let r = raw.get_ref();
    if let Some(name) = &r.reference {
        settings.reference = placements
            .iter()
            .position(|p| p.name == *name.get_ref())
            .ok_or_else(|| {
                let names: Vec<&str> = placements.iter().map(|p| p.name.as_str()).collect();
                let mut d = ctx.err(
                    name.span(),
                    format!("[compare].reference names no placement: '{}'", name.get_ref()),
                );
                if let Some(s) = did_you_mean(name.get_ref(), names.iter().copied()) {
                    d = d.help(format!("did you mean '{s}'?"));
                }
                Error::input(d.help(format!("placements: {}", names.join(", "))))
            })?;
    }
    if let Some(c) = &r.clusters {
        let g = positive(ctx, c, "[compare].clusters", 1)?;
        if let Some(p) = placements.iter().find(|p| !p.clusters.contains(&g)) {
            return Err(Error::input(
                ctx.err(
                    c.span(),
                    format!(
                        "[compare].clusters is {g}, but placement '{}' does not fit {g} clusters",
                        p.name
                    ),
                )
                .help(format!(
                    "add {g} to [search].clusters (or to that placement's clusters)"
                )),
            ));
        }
        settings.clusters = Some(g);
    }
    if let Some(names) = &r.names {
        settings.names = cluster_names(ctx, names, placements)?;
    }
    Ok(settings)
}

/// `[compare] names = { 1 = "preserved function", ... }`: each key a cluster number that
/// some placement can have, each name given once and not empty.
fn cluster_names(
    ctx: &Ctx,
    names: &Spanned<BTreeMap<String, SStr>>,
    placements: &[Placement],
) -> Result<BTreeMap<usize, String>> {
    let most = placements
        .iter()
        .flat_map(|p| p.clusters.iter().copied())
        .max()
        .unwrap_or(1);
    let mut out: BTreeMap<usize, String> = BTreeMap::new();
    for (key, name) in names.get_ref() {
        let k = key.trim().parse::<usize>().ok().filter(|k| (1..=most).contains(k)).ok_or_else(|| {
            Error::input(
                ctx.err(names.span(), format!("[compare].names has the key '{key}', which is not a cluster number"))
                    .help(format!("keys are cluster numbers as the report shows them, 1 to {most}: {{ 1 = \"preserved function\" }}")),
            )
        })?;
        let text = name.get_ref().trim().to_string();
        if text.is_empty() {
            return Err(Error::input(
                ctx.err(name.span(), format!("the name of cluster {k} is empty"))
                    .help("write a name, or leave the cluster out of names"),
            ));
        }
        if let Some((other, _)) = out.iter().find(|(_, n)| **n == text) {
            return Err(Error::input(
                ctx.err(name.span(), format!("clusters {other} and {k} are both named '{text}'"))
                    .help("give each cluster its own name"),
            ));
        }
        out.insert(k, text);
    }
    Ok(out)
}

fn check_unique(ctx: &Ctx, cols: &[ColumnRef]) -> Result<()> {
    for (i, c) in cols.iter().enumerate() {
        if cols[..i].iter().any(|d| d.name == c.name) {
            return Err(Error::input(
                ctx.err(c.span.clone(), format!("'{}' is listed twice in {}", c.name, c.key))
                    .help("list each column once"),
            ));
        }
    }
    Ok(())
}

/// `[search].tolerance`: below a few machine epsilons a relative change cannot be measured.
fn tolerance(ctx: &Ctx, tolerance: Option<&Spanned<f64>>) -> Result<f64> {
    Ok(match tolerance {
        None => DEFAULT_TOLERANCE,
        Some(v) => {
            let t = *v.get_ref();
            // Below a few machine epsilons a relative change cannot be measured.
            if !(4.0 * f64::EPSILON..1.0).contains(&t) {
                return Err(Error::input(
                    ctx.err(
                        v.span(),
                        format!("[search].tolerance must be between 1e-15 and 1, not {t}"),
                    )
                    .help("the default is 1e-8"),
                ));
            }
            t
        }
    })
}

/// `[search].finish_best`: at most the starts, and with a warm-up shorter than the cap when it sets starts aside.
fn finish_best(
    ctx: &Ctx,
    s: &raw::RawSearch,
    starts: usize,
    warmup_iterations: usize,
    max_iterations: usize,
) -> Result<usize> {
    Ok(match &s.finish_best {
        None => starts,
        Some(v) => {
            let f = positive(ctx, v, "[search].finish_best", 1)?;
            if f > starts {
                return Err(Error::input(
                    ctx.err(v.span(), format!("[search].finish_best is {f}, more than the {starts} starts"))
                        .help("finish_best counts starts that run on after the warm-up: at most [search].starts, which runs every start to its end"),
                ));
            }
            if f < starts && warmup_iterations >= max_iterations {
                let at = s.warmup_iterations.as_ref().map_or(v.span(), Spanned::span);
                return Err(Error::input(
                    ctx.err(
                        at,
                        format!("the warm-up ({warmup_iterations} iterations) must be shorter than [search].max_iterations ({max_iterations}) for finish_best to set starts aside"),
                    )
                    .help("lower [search].warmup_iterations or raise [search].max_iterations"),
                ));
            }
            f
        }
    })
}

fn search_settings(ctx: &Ctx, s: &raw::RawSearch, d: usize) -> Result<(Vec<usize>, Search)> {
    let clusters = match &s.clusters {
        None => vec![1, 2, 3],
        Some(c) => cluster_list(ctx, c, "[search].clusters")?,
    };
    let starts = match &s.starts {
        None => DEFAULT_STARTS,
        Some(v) => bounded(ctx, v, "[search].starts", 1, limits::MAX_STARTS)?,
    };
    let max_iterations = match &s.max_iterations {
        None => DEFAULT_MAX_ITERATIONS,
        Some(v) => bounded(ctx, v, "[search].max_iterations", 1, limits::MAX_ITERATIONS)?,
    };
    let tolerance = tolerance(ctx, s.tolerance.as_ref())?;
    let warmup_iterations = match &s.warmup_iterations {
        None => DEFAULT_WARMUP_ITERATIONS,
        Some(v) => bounded(ctx, v, "[search].warmup_iterations", 1, limits::MAX_ITERATIONS)?,
    };
    let finish_best = finish_best(ctx, s, starts, warmup_iterations, max_iterations)?;
    let gating_ridge = match &s.gating_ridge {
        None => 0.0,
        Some(v) => {
            let r = *v.get_ref();
            if !(r.is_finite() && r >= 0.0) {
                return Err(Error::input(
                    ctx.err(v.span(), "[search].gating_ridge must be zero or positive"),
                ));
            }
            r
        }
    };
    let structures = match &s.covariance {
        None => vec![CovarianceStructure::UNCONSTRAINED],
        Some(cov) => covariance_structures(ctx, cov, d)?,
    };
    let covariance_prior = s.covariance_prior.as_ref().is_some_and(|v| *v.get_ref());
    let accelerate = s.accelerate.as_ref().is_none_or(|v| *v.get_ref());
    let spurious_guard = s.spurious_guard.as_ref().is_none_or(|v| *v.get_ref());
    let variance_floor = match &s.variance_floor {
        None => 0.0,
        Some(v) => {
            let f = *v.get_ref();
            if !(0.0..1.0).contains(&f) {
                return Err(Error::input(
                    ctx.err(
                        v.span(),
                        format!("[search].variance_floor must be from 0 up to 1, not {f}"),
                    )
                    .help("it is a share of the smallest indicator variance; 1e-6 is a cautious value, 0 turns it off"),
                ));
            }
            f
        }
    };
    Ok((
        clusters,
        Search {
            starts,
            max_iterations,
            tolerance,
            warmup_iterations,
            finish_best,
            accelerate,
            spurious_guard,
            gating_ridge,
            structures,
            covariance_prior,
            variance_floor,
        },
    ))
}

/// `covariance = "all" | "unconstrained" | [{ volume = ..., shape = ..., orientation = ... }, ...]`.
///
/// With one indicator only the volume can differ: "all" then means the two spherical
/// structures, and a listed structure must be spherical (`validate` maps "unconstrained"
/// to the spherical one).
fn covariance_structures(ctx: &Ctx, cov: &Spanned<toml::Value>, d: usize) -> Result<Vec<CovarianceStructure>> {
    let hint = "write covariance = \"all\", \"unconstrained\", or a list such as \
                [{ volume = \"equal\", shape = \"varying\", orientation = \"axes\" }]";
    match cov.get_ref() {
        toml::Value::String(w) => {
            let message = format!("unknown covariance choice '{w}' in [search].covariance");
            Ok(
                match choose(ctx, cov.span(), w, message, listed("covariance choice: "))? {
                    CovarianceChoice::All => CovarianceStructure::all()
                        .into_iter()
                        .filter(|s| d > 1 || s.fits_one_indicator())
                        .collect(),
                    CovarianceChoice::Unconstrained => vec![CovarianceStructure::UNCONSTRAINED],
                },
            )
        }
        toml::Value::Array(items) => {
            let mut out: Vec<CovarianceStructure> = Vec::new();
            for item in items {
                let Some(t) = item.as_table() else {
                    return Err(Error::input(
                        ctx.err(cov.span(), "each covariance structure must be a table")
                            .help(hint),
                    ));
                };
                let s = structure(ctx, cov, t, d)?;
                if out.contains(&s) {
                    return Err(Error::input(
                        ctx.err(cov.span(), format!("the structure '{}' is listed twice", s.describe())),
                    ));
                }
                out.push(s);
            }
            if out.is_empty() {
                return Err(Error::input(
                    ctx.err(cov.span(), "[search].covariance lists no structure").help(hint),
                ));
            }
            Ok(out)
        }
        _ => Err(Error::input(
            ctx.err(cov.span(), "[search].covariance has the wrong kind of value")
                .help(hint),
        )),
    }
}

/// One structure of a `[search].covariance` list: `{ volume = ..., shape = ...,
/// orientation = ... }`, each part varying when left out.
fn structure(ctx: &Ctx, cov: &Spanned<toml::Value>, t: &toml::Table, d: usize) -> Result<CovarianceStructure> {
    const KEYS: [&str; 3] = ["volume", "shape", "orientation"];
    for k in t.keys() {
        if !KEYS.contains(&k.as_str()) {
            let mut e = ctx.err(cov.span(), format!("unknown key '{k}' in [search].covariance"));
            if let Some(w) = did_you_mean(k, KEYS) {
                e = e.help(format!("did you mean '{w}'?"));
            }
            return Err(Error::input(e.help(format!("key: {}", KEYS.join(", ")))));
        }
    }
    fn part<T: Choice>(
        ctx: &Ctx,
        cov: &Spanned<toml::Value>,
        t: &toml::Table,
        key: &'static str,
        absent: T,
    ) -> Result<T> {
        match t.get(key).and_then(|v| v.as_str()) {
            None => Ok(absent),
            Some(w) => choose(
                ctx,
                cov.span(),
                w,
                format!("unknown {key} '{w}' in [search].covariance"),
                move |words| format!("{key}: {}", words.join(", ")),
            ),
        }
    }
    let volume = part(ctx, cov, t, "volume", Volume::Varying)?;
    let shape = part(ctx, cov, t, "shape", Shape::Varying)?;
    let orientation = part(ctx, cov, t, "orientation", Orientation::Varying)?;
    if shape == Shape::Spherical && t.contains_key("orientation") {
        return Err(Error::input(
            ctx.err(cov.span(), "a spherical shape has no orientation")
                .help("leave out orientation for shape = \"spherical\""),
        ));
    }
    let s = CovarianceStructure::new(volume, shape, orientation);
    if d == 1 && !s.fits_one_indicator() {
        return Err(Error::input(
            ctx.err(
                cov.span(),
                "with one indicator only the volume can differ between clusters",
            )
            .help("use shape = \"spherical\" (with volume = \"equal\" or \"varying\"), or covariance = \"all\""),
        ));
    }
    Ok(s)
}

/// A placement's `proportions`: "free", "equal", or fixed shares (positive, adding up to
/// 1, one per cluster of every count the placement fits).
fn proportions(ctx: &Ctx, proportions: Option<&Spanned<toml::Value>>, clusters: &[usize]) -> Result<Proportions> {
    Ok(match proportions {
        None => Proportions::Free,
        Some(v) => match v.get_ref() {
            toml::Value::String(s) => {
                let choice = choose(ctx, v.span(), s, format!("unknown proportions choice '{s}'"), |_| {
                    "write \"free\", \"equal\", or a list of fixed shares such as [0.5, 0.3, 0.2]".to_string()
                })?;
                match choice {
                    ProportionsChoice::Free => Proportions::Free,
                    ProportionsChoice::Equal => Proportions::Equal,
                }
            }
            toml::Value::Array(a) => {
                let shares: Option<Vec<f64>> = a
                    .iter()
                    .map(|x| x.as_float().or_else(|| x.as_integer().map(|i| i as f64)))
                    .collect();
                let shares =
                    shares.ok_or_else(|| Error::input(ctx.err(v.span(), "fixed proportions must be numbers")))?;
                let sum: f64 = shares.iter().sum();
                if shares.iter().any(|s| !(*s > 0.0)) || (sum - 1.0).abs() > 1e-9 {
                    return Err(Error::input(ctx.err(
                        v.span(),
                        format!("fixed proportions must be positive and add up to 1 (these add up to {sum})"),
                    )));
                }
                if clusters.iter().any(|g| *g != shares.len()) {
                    return Err(Error::input(
                        ctx.err(
                            v.span(),
                            format!(
                                "{} fixed proportions are given, but this placement fits cluster counts {:?}",
                                shares.len(),
                                clusters
                            ),
                        )
                        .help(format!("add clusters = [{}] to this [[placement]]", shares.len())),
                    ));
                }
                Proportions::Fixed(shares)
            }
            _ => {
                return Err(Error::input(
                    ctx.err(v.span(), "proportions must be \"free\", \"equal\" or a list of numbers"),
                ))
            }
        },
    })
}

/// A placement's `method`; a three-step method needs gating covariates.
fn method(ctx: &Ctx, word: Option<&SStr>, no_gating: bool) -> Result<Method> {
    let Some(m) = word else { return Ok(Method::OneStep) };
    let method: Method = choose(
        ctx,
        m.span(),
        m.get_ref(),
        format!("unknown method '{}'", m.get_ref()),
        listed("use one of: "),
    )?;
    if method.is_stepwise() && no_gating {
        return Err(Error::input(
            ctx.err(
                m.span(),
                format!(
                    "method '{}' estimates gating effects, but this placement has no gating covariates",
                    m.get_ref()
                ),
            )
            .help("add a gating list, or remove the method key"),
        ));
    }
    Ok(method)
}

fn placement(
    ctx: &Ctx,
    p: &Spanned<RawPlacement>,
    default_clusters: &[usize],
    default_span: &Range<usize>,
    indicators: &[ColumnRef],
    blocks: &[IndicatorBlock],
) -> Result<Placement> {
    let r = p.get_ref();
    let name = r.name.get_ref().trim().to_string();
    if name.is_empty() {
        return Err(Error::input(
            ctx.err(r.name.span(), "a placement name is empty")
                .help("name every [[placement]]"),
        ));
    }
    let gating = column_list(&r.gating, "[placement].gating");
    let components = column_list(&r.components, "[placement].components");
    check_unique(ctx, &gating)?;
    check_unique(ctx, &components)?;
    for c in gating.iter().chain(&components) {
        if indicators.iter().any(|i| i.name == c.name) {
            return Err(Error::input(
                ctx.err(
                    c.span.clone(),
                    format!(
                        "'{}' is an indicator and cannot also be a covariate ({})",
                        c.name, c.key
                    ),
                )
                .help("a column either defines the clusters or adjusts them, not both"),
            ));
        }
    }
    let (clusters, clusters_span) = match &r.clusters {
        None => (default_clusters.to_vec(), default_span.clone()),
        Some(c) => (cluster_list(ctx, c, "[placement].clusters")?, c.span()),
    };
    let proportions = proportions(ctx, r.proportions.as_ref(), &clusters)?;
    if !matches!(proportions, Proportions::Free) && !gating.is_empty() {
        return Err(Error::input(
            ctx.err(
                r.gating.as_ref().map_or(r.name.span(), |g| g.span()),
                "gating covariates need estimated proportions, but this placement fixes them",
            )
            .help("remove the gating list, or remove the proportions key (default \"free\")"),
        ));
    }
    let acts_on = acts_on(ctx, r, &components, indicators, blocks)?;
    let method = method(ctx, r.method.as_ref(), gating.is_empty())?;
    let (outcomes, outcome_method) = outcomes(ctx, r, &gating, &components, indicators)?;
    Ok(Placement {
        name,
        gating,
        components,
        proportions,
        clusters,
        clusters_span,
        acts_on,
        method,
        outcomes,
        outcome_method,
    })
}

/// `outcomes = [...]` and `outcome_method`: distal outcomes are neither indicators nor
/// covariates of the placement (they are compared across its clusters, not modelled).
fn outcomes(
    ctx: &Ctx,
    r: &RawPlacement,
    gating: &[ColumnRef],
    components: &[ColumnRef],
    indicators: &[ColumnRef],
) -> Result<(Vec<ColumnRef>, OutcomeMethod)> {
    let outcomes = column_list(&r.outcomes, "[placement].outcomes");
    check_unique(ctx, &outcomes)?;
    for o in &outcomes {
        if indicators.iter().any(|i| i.name == o.name) {
            return Err(Error::input(
                ctx.err(
                    o.span.clone(),
                    format!("'{}' is an indicator and cannot also be a distal outcome", o.name),
                )
                .help("an outcome is compared across the clusters the indicators define; list it under outcomes or under the indicators, not both"),
            ));
        }
        if gating.iter().chain(components).any(|c| c.name == o.name) {
            return Err(Error::input(
                ctx.err(
                    o.span.clone(),
                    format!("'{}' is a covariate of this placement and cannot also be its distal outcome", o.name),
                )
                .help("an outcome is what the clusters may predict, a covariate what may predict them; remove it from one list"),
            ));
        }
    }
    let method = match &r.outcome_method {
        None => OutcomeMethod::Bch,
        Some(m) => {
            if outcomes.is_empty() {
                return Err(Error::input(
                    ctx.err(m.span(), "outcome_method is set, but this placement lists no outcomes")
                        .help("add outcomes = [\"column\", ...], or remove outcome_method"),
                ));
            }
            choose(
                ctx,
                m.span(),
                m.get_ref(),
                format!("unknown outcome method '{}'", m.get_ref()),
                listed("use one of: "),
            )?
        }
    };
    Ok((outcomes, method))
}

/// `acts_on = { covariate = ["indicator", ...] }`: each key a component covariate of the
/// placement, each value a non-empty list of indicators. The indicators of a family that
/// shares one regression design (the continuous ones) are acted on all or none.
fn acts_on(
    ctx: &Ctx,
    r: &RawPlacement,
    components: &[ColumnRef],
    indicators: &[ColumnRef],
    blocks: &[IndicatorBlock],
) -> Result<BTreeMap<String, Vec<String>>> {
    let mut out = BTreeMap::new();
    let Some(table) = &r.acts_on else { return Ok(out) };
    for (covariate, list) in table.get_ref() {
        if !components.iter().any(|c| &c.name == covariate) {
            let names: Vec<&str> = components.iter().map(|c| c.name.as_str()).collect();
            let mut d = ctx.err(
                table.span(),
                format!("acts_on names '{covariate}', which is not one of this placement's component covariates"),
            );
            if let Some(s) = did_you_mean(covariate, names.iter().copied()) {
                d = d.help(format!("did you mean '{s}'?"));
            }
            return Err(Error::input(d.help(if names.is_empty() {
                "add it to components = [...] first".to_string()
            } else {
                format!("component covariates here: {}", names.join(", "))
            })));
        }
        let targets = column_list(&Some(list.clone()), "[placement].acts_on");
        if targets.is_empty() {
            return Err(Error::input(
                ctx.err(list.span(), format!("acts_on lists no indicator for '{covariate}'"))
                    .help("name at least one indicator, or leave the covariate out of components"),
            ));
        }
        check_unique(ctx, &targets)?;
        for t in &targets {
            if !indicators.iter().any(|i| i.name == t.name) {
                let mut d = ctx.err(t.span.clone(), format!("'{}' in acts_on is not an indicator", t.name));
                if let Some(s) = did_you_mean(&t.name, indicators.iter().map(|i| i.name.as_str())) {
                    d = d.help(format!("did you mean '{s}'?"));
                }
                return Err(Error::input(d));
            }
        }
        for block in blocks {
            if let Some(adjective) = block.family.shared_design {
                shared_design_all_or_none(ctx, covariate, list, &targets, &block.columns, adjective)?;
            }
        }
        out.insert(covariate.clone(), targets.into_iter().map(|t| t.name).collect());
    }
    Ok(out)
}

/// A component covariate acts on all of a shared-design family's indicators or on none.
fn shared_design_all_or_none(
    ctx: &Ctx,
    covariate: &str,
    list: &SList,
    targets: &[ColumnRef],
    members: &[ColumnRef],
    adjective: &str,
) -> Result<()> {
    let hit = members
        .iter()
        .filter(|g| targets.iter().any(|t| t.name == g.name))
        .count();
    if hit > 0 && hit < members.len() {
        return Err(Error::input(
            ctx.err(
                list.span(),
                format!("'{covariate}' acts on some but not all of the {adjective} indicators"),
            )
            .help(format!(
                "{adjective} indicators share one regression, so list all of them ({}) or none",
                members.iter().map(|g| g.name.as_str()).collect::<Vec<_>>().join(", ")
            )),
        ));
    }
    Ok(())
}

/// `[indicators] family`: a family's word or `mixed`; absent, the first family listed.
fn family_choice(ctx: &Ctx, word: Option<&SStr>, families: &[&'static FamilyInfo]) -> Result<FamilyChoice> {
    let Some(f) = word else {
        let first = families.first().expect("the program offers at least one family");
        return Ok(FamilyChoice::One(first));
    };
    if f.get_ref() == MIXED {
        return Ok(FamilyChoice::Mixed);
    }
    if let Some(found) = families.iter().find(|x| x.word == f.get_ref()) {
        return Ok(FamilyChoice::One(found));
    }
    let words: Vec<&str> = families.iter().map(|x| x.word).chain([MIXED]).collect();
    let mut d = ctx.err(f.span(), format!("unknown family '{}'", f.get_ref()));
    if let Some(s) = did_you_mean(f.get_ref(), words.iter().copied()) {
        d = d.help(format!("did you mean '{s}'?"));
    }
    Err(Error::input(d.help(format!("families: {}", words.join(", ")))))
}

/// The family an indicator belongs to, from the spec's choice and its declared type.
fn indicator_family(
    ctx: &Ctx,
    choice: FamilyChoice,
    families: &[&'static FamilyInfo],
    c: &ColumnRef,
    declared: Option<&VariableType>,
) -> Result<&'static FamilyInfo> {
    match (choice, declared) {
        (FamilyChoice::One(f), None) => Ok(f),
        (FamilyChoice::One(f), Some(t)) if f.accepts(t) => Ok(f),
        (FamilyChoice::One(f), Some(t)) => Err(Error::input(
            ctx.err(
                c.span.clone(),
                format!(
                    "indicator '{}' is declared {}, but the {} family needs {} indicators",
                    c.name,
                    t.word(),
                    f.word,
                    f.wanted
                ),
            )
            .help(format!(
                "declare its type to match, use family = \"{MIXED}\", or drop it from the indicators ({})",
                c.name
            )),
        )),
        (FamilyChoice::Mixed, None) => Err(Error::input(
            ctx.err(c.span.clone(), format!("indicator '{}' has no type in [variables]", c.name))
                .help(format!(
                    "the mixed family forms its blocks by type: add {} = \"continuous\", \"binary\", \"categorical\" or \"count\" under [variables]",
                    c.name
                )),
        )),
        (FamilyChoice::Mixed, Some(t)) => families.iter().copied().find(|f| f.mixed.contains(&t.kind())).ok_or_else(|| {
            Error::input(ctx.err(
                c.span.clone(),
                format!("indicator '{}' is declared {}, and no family takes such indicators", c.name, t.word()),
            ))
        }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A family of continuous indicators, as the program's first family is (the spec
    /// layer's tests cannot see the model layer's families).
    static CONTINUOUS: FamilyInfo = FamilyInfo {
        word: "gaussian",
        indicator_word: "gaussian",
        wanted: "continuous",
        types: &[TypeKind::Continuous],
        default_type: TypeKind::Continuous,
        mixed: &[TypeKind::Continuous],
        layout: Layout::Rows,
        shared_design: Some("continuous"),
        keys: &[FamilyKey::Covariance],
    };

    fn spec(body: &str) -> std::result::Result<Study, String> {
        parse(Path::new("s.toml"), body, &[&CONTINUOUS]).map_err(|e| e.to_string())
    }

    const BASE: &str = "[study]\ntitle = \"t\"\ndata = \"d.csv\"\n[indicators]\ncolumns = [\"a\", \"b\"]\n";

    #[test]
    fn minimal_spec_gets_defaults() {
        let s = spec(BASE).unwrap();
        assert_eq!(s.search.starts, DEFAULT_STARTS);
        assert_eq!(s.placements.len(), 1);
        assert_eq!(s.placements[0].clusters, vec![1, 2, 3]);
        assert_eq!(s.data_path, PathBuf::from("d.csv"));
        assert_eq!(
            resolve(Path::new("configs"), "../demo-data/x.csv"),
            PathBuf::from("demo-data/x.csv")
        );
        assert_eq!(resolve(Path::new(""), "../x.csv"), PathBuf::from("../x.csv"));
        assert_eq!(s.variable_type("a"), Some(VariableType::Continuous));
    }

    #[test]
    fn two_stage_search_is_off_unless_asked_for() {
        let s = spec(BASE).unwrap();
        assert_eq!(s.search.finish_best, s.search.starts);
        assert!(!s.search.two_stages());
        let s = spec(&format!("{BASE}[search]\nstarts = 12\nfinish_best = 4\n")).unwrap();
        assert_eq!(
            (s.search.finish_best, s.search.warmup_iterations),
            (4, DEFAULT_WARMUP_ITERATIONS)
        );
        assert!(s.search.two_stages());
        let s = spec(&format!("{BASE}[search]\nstarts = 12\nfinish_best = 12\n")).unwrap();
        assert!(!s.search.two_stages(), "finishing every start is the full search");
    }

    #[test]
    fn misspelt_key_gets_a_suggestion() {
        let e = spec(&format!("{BASE}[search]\nclustrs = [2]\n")).unwrap_err();
        assert!(
            e.contains("unknown key 'clustrs'") && e.contains("did you mean 'clusters'?"),
            "{e}"
        );
        assert!(e.contains("s.toml:7:1"), "{e}");
    }

    #[test]
    fn fixed_proportions_must_match_cluster_counts() {
        let e = spec(&format!(
            "{BASE}[[placement]]\nname = \"p\"\nproportions = [0.5, 0.5]\n"
        ))
        .unwrap_err();
        assert!(e.contains("add clusters = [2]"), "{e}");
        let ok = spec(&format!(
            "{BASE}[[placement]]\nname = \"p\"\nproportions = [0.5, 0.5]\nclusters = [2]\n"
        ))
        .unwrap();
        assert_eq!(ok.placements[0].proportions, Proportions::Fixed(vec![0.5, 0.5]));
    }

    #[test]
    fn one_continuous_indicator_fits_the_spherical_structure() {
        let one = "[study]\ntitle = \"t\"\ndata = \"d.csv\"\n[indicators]\ncolumns = [\"a\"]\n";
        let spherical = vec![CovarianceStructure::new(
            Volume::Varying,
            Shape::Spherical,
            Orientation::Axes,
        )];
        assert_eq!(spec(one).unwrap().search.structures, spherical);
        let asked = spec(&format!("{one}[search]\ncovariance = \"unconstrained\"\n")).unwrap();
        assert_eq!(asked.search.structures, spherical);
        // Two continuous indicators keep the unconstrained default.
        assert_eq!(
            spec(BASE).unwrap().search.structures,
            vec![CovarianceStructure::UNCONSTRAINED]
        );
    }

    #[test]
    fn indicator_cannot_be_a_covariate() {
        let e = spec(&format!("{BASE}[[placement]]\nname = \"p\"\ncomponents = [\"a\"]\n")).unwrap_err();
        assert!(e.contains("'a' is an indicator"), "{e}");
    }

    #[test]
    fn inference_keys_and_three_step_methods() {
        let s = spec(BASE).unwrap();
        assert_eq!(s.inference, Inference::default());
        assert_eq!(s.placements[0].method, Method::OneStep);
        let text = format!(
            "{BASE}[variables]\nage = \"continuous\"\n[[placement]]\nname = \"p\"\ngating = [\"age\"]\nmethod = \"three-step-bch\"\n[inference]\nstandard_errors = \"bootstrap\"\nreplicates = 50\nper = {{ age = 10 }}\ndirect_effect_screen = false\ncluster_count_replicates = 19\n"
        );
        let s = spec(&text).unwrap();
        assert_eq!(s.placements[0].method, Method::ThreeStepBch);
        assert_eq!(s.inference.method, ErrorMethod::Bootstrap);
        assert_eq!(s.inference.replicates, 50);
        assert_eq!(s.inference.per.get("age"), Some(&10.0));
        assert!(!s.inference.direct_effect_screen);
        assert_eq!(s.inference.cluster_count_replicates, 19);
        let e = spec(&text.replace("age = 10", "agee = 10")).unwrap_err();
        assert!(
            e.contains("no placement uses") && e.contains("did you mean 'age'?"),
            "{e}"
        );
        let e = spec(&text.replace("age = 10", "age = -1")).unwrap_err();
        assert!(e.contains("must be a positive number"), "{e}");
        let e = spec(&text.replace("three-step-bch", "three-step")).unwrap_err();
        assert!(e.contains("unknown method 'three-step'"), "{e}");
    }
}
