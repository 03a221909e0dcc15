//! Data: reading the study CSV into typed columns, and building design matrices.
//!
//! [`load`] reads the CSV a [`Study`] names, checks every column the spec uses against the
//! header (errors point back at the spec), parses each used column by its declared type,
//! and drops rows that miss a value the fits need (an indicator, a covariate, the weight),
//! counting them by column. A value that cannot be read is an error with its line and
//! column. [`Design`] turns covariate columns into a matrix with an intercept and
//! treatment-coded categoricals, standardising continuous columns for fitting and mapping
//! coefficients back to the original scale.

mod design;
pub mod survey;

pub use design::{Design, DesignError, Term};
pub use survey::SurveyDesign;

use crate::error::{did_you_mean, Diagnostic, Error, Location, Result};
use crate::numerics::{hex, sha256_hex};
use crate::spec::limits::{self, quoted};
use crate::spec::{read_text, ColumnRef, FamilyInfo, Layout, Study, VariableType};
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Text that counts as a missing value (besides an empty cell).
pub const MISSING_WORD: &str = "NA";

/// A used column after parsing, over the rows kept.
#[derive(Debug, Clone, PartialEq)]
pub enum Column {
    /// Continuous, binary (0/1) or count values.
    Numeric {
        /// Declared type.
        kind: VariableType,
        /// Values.
        values: Vec<f64>,
    },
    /// Categorical levels, coded 0..levels.len().
    Categorical {
        /// Levels in order; `levels[reference]` is the reference.
        levels: Vec<String>,
        /// Index of the reference level.
        reference: usize,
        /// Level index per row.
        codes: Vec<u32>,
    },
}

/// The rows a study uses, ready for design matrices.
#[derive(Debug, Clone)]
pub struct Dataset {
    /// Data file as resolved from the spec.
    pub path: PathBuf,
    /// SHA-256 of the file's bytes, in hex.
    pub sha256: String,
    /// Data rows in the file (header excluded).
    pub rows_read: usize,
    /// Rows excluded because a needed value was missing.
    pub rows_excluded: usize,
    /// For each needed column, how many rows missed it (a row can count under several).
    pub missing_by_column: Vec<(String, usize)>,
    /// Row identifiers of the rows kept (the id column, or the 1-based data row number).
    pub ids: RowIds,
    /// Case weights of the rows kept (1 without a weight column). Sampling weights are
    /// rescaled to mean 1 over the rows kept.
    pub weights: Vec<f64>,
    /// The n of BIC and of every count: the sum of frequency weights, else the rows kept.
    pub sample_size: f64,
    /// Strata and sampling units, when the spec names them.
    pub survey: Option<Arc<SurveyDesign>>,
    /// Every indicator name, in spec order.
    pub indicator_names: Vec<String>,
    /// The indicators by family: one set per block of the spec, in the same order.
    pub indicator_sets: Vec<IndicatorSet>,
    /// Exposure (person-time) per row and its log, when the spec names an exposure column.
    pub exposure: Option<Arc<Exposure>>,
    /// Covariate columns by name.
    pub columns: BTreeMap<String, Column>,
    /// Distal outcome columns by name (read only for fitting, never for scoring).
    pub outcomes: BTreeMap<String, OutcomeColumn>,
    /// What the reader noticed and the user should hear of (levels that differ only in
    /// case); the run goes on.
    pub warnings: Vec<String>,
}

/// A distal outcome over the kept rows. A row missing it stays in every fit; it is left out
/// of that outcome's comparison only.
#[derive(Debug, Clone, PartialEq)]
pub struct OutcomeColumn {
    /// Continuous, binary or count.
    pub kind: VariableType,
    /// Values of the kept rows, NaN where missing.
    pub values: Vec<f64>,
    /// Kept rows missing it.
    pub missing: usize,
}

/// The indicators of one family, stored as the family's [`Layout`] says.
#[derive(Debug, Clone, PartialEq)]
pub struct IndicatorSet {
    /// The family.
    pub family: &'static FamilyInfo,
    /// Indicator names, in spec order.
    pub names: Vec<String>,
    /// Their values.
    pub values: IndicatorValues,
}

/// Indicator values in one of the layouts a family can ask for.
#[derive(Debug, Clone, PartialEq)]
pub enum IndicatorValues {
    /// [`Layout::Rows`]: indicator j of row i at `y[i * d + j]`.
    Rows(Arc<Vec<f64>>),
    /// [`Layout::Columns`]: indicator c of row i at `y[c * n + i]`.
    Columns(Arc<Vec<f64>>),
    /// [`Layout::Levels`]: level codes, row-major n×J, [`MISSING_ITEM`] where missing.
    Levels {
        /// The codes.
        codes: Arc<Vec<u16>>,
        /// Levels of each indicator; code l means `levels[j][l]`. Code 0 is the baseline
        /// of a logit on the levels (for a binary indicator, 0).
        levels: Vec<Vec<String>>,
        /// Values missing in the rows used.
        missing: usize,
    },
}

impl IndicatorSet {
    /// Numbers, row-major or by column as the layout says.
    pub fn numbers(&self) -> &Arc<Vec<f64>> {
        match &self.values {
            IndicatorValues::Rows(y) | IndicatorValues::Columns(y) => y,
            IndicatorValues::Levels { .. } => panic!("the indicators of '{}' are level codes", self.family.word),
        }
    }

    /// Level codes and levels.
    pub fn levels(&self) -> (&Arc<Vec<u16>>, &[Vec<String>]) {
        match &self.values {
            IndicatorValues::Levels { codes, levels, .. } => (codes, levels),
            _ => panic!("the indicators of '{}' are numbers", self.family.word),
        }
    }

    /// Values missing (and skipped) in the rows used.
    pub fn missing_values(&self) -> usize {
        match &self.values {
            IndicatorValues::Levels { missing, .. } => *missing,
            _ => 0,
        }
    }
}

/// An exposure column: person-time per row, and its log (the offset of a rate model).
#[derive(Debug, Clone, PartialEq)]
pub struct Exposure {
    /// Exposure per row (positive).
    pub values: Vec<f64>,
    /// Its log.
    pub logs: Vec<f64>,
}

/// Row identifiers end to end in one text, separated by line feeds, with an end offset
/// per row: a string per row would take about 50 bytes at ten million rows.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RowIds {
    text: String,
    ends: Vec<usize>,
}

impl RowIds {
    /// Add the next row's id.
    pub fn push(&mut self, id: &str) {
        if !self.ends.is_empty() {
            self.text.push('\n');
        }
        self.text.push_str(id);
        self.ends.push(self.text.len());
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        self.ends.len()
    }

    /// Whether there is no row.
    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }

    /// Row `i`'s id.
    pub fn get(&self, i: usize) -> &str {
        let start = if i == 0 { 0 } else { self.ends[i - 1] + 1 };
        &self.text[start..self.ends[i]]
    }

    /// Every id in row order.
    pub fn iter(&self) -> impl Iterator<Item = &str> + '_ {
        (0..self.len()).map(|i| self.get(i))
    }

    /// The ids joined by line feeds.
    pub fn joined(&self) -> &str {
        &self.text
    }
}

impl std::ops::Index<usize> for RowIds {
    type Output = str;

    fn index(&self, i: usize) -> &str {
        self.get(i)
    }
}

impl<S: AsRef<str>> FromIterator<S> for RowIds {
    fn from_iter<I: IntoIterator<Item = S>>(iter: I) -> RowIds {
        let mut ids = RowIds::default();
        for id in iter {
            ids.push(id.as_ref());
        }
        ids
    }
}

/// Marks a missing value in the codes of [`IndicatorValues::Levels`].
pub const MISSING_ITEM: u16 = u16::MAX;

impl Dataset {
    /// Rows kept.
    pub fn n(&self) -> usize {
        self.ids.len()
    }

    /// The indicator set of a family.
    pub fn set_of(&self, family: &str) -> Option<&IndicatorSet> {
        self.indicator_sets.iter().find(|s| s.family.word == family)
    }

    /// Design matrix for a list of covariates (intercept first).
    pub fn design(&self, covariates: &[String]) -> std::result::Result<Design, DesignError> {
        Design::build(self, covariates)
    }
}

/// The data file as needed for messages: a line's text is looked up only when an error
/// shows it, in the text given or, when reading streamed, by reading the file again.
struct Raw<'a> {
    path: &'a Path,
    text: std::cell::OnceCell<std::borrow::Cow<'a, str>>,
}

impl<'a> Raw<'a> {
    fn with_text(path: &'a Path, text: &'a str) -> Raw<'a> {
        Raw {
            path,
            text: std::cell::OnceCell::from(std::borrow::Cow::Borrowed(text)),
        }
    }

    fn streamed(path: &'a Path) -> Raw<'a> {
        Raw {
            path,
            text: std::cell::OnceCell::new(),
        }
    }

    fn line_text(&self, line: usize) -> String {
        let text = self.text.get_or_init(|| {
            let text = read_text(self.path, "data").unwrap_or_default();
            std::borrow::Cow::Owned(text.strip_prefix('\u{feff}').map(str::to_string).unwrap_or(text))
        });
        let found = text.split('\n').nth(line.saturating_sub(1)).unwrap_or("");
        found.trim_end_matches('\r').to_string()
    }

    /// Location of field `field` (0-based) on 1-based `line`.
    fn field_location(&self, line: usize, field: usize) -> Location {
        let text = self.line_text(line);
        let (col, width) = field_offset(&text, field);
        let mut loc = Location::at(self.path, line, col, Some(text));
        loc.width = width;
        loc
    }
}

/// 1-based character column and width of a field in a CSV line (quote-aware).
fn field_offset(line: &str, field: usize) -> (usize, usize) {
    let mut idx = 0;
    let mut in_quotes = false;
    let mut start = 0;
    let chars: Vec<char> = line.chars().collect();
    for (pos, &c) in chars.iter().enumerate() {
        if c == '"' {
            in_quotes = !in_quotes;
        } else if c == ',' && !in_quotes {
            if idx == field {
                return (start + 1, (pos - start).max(1));
            }
            idx += 1;
            start = pos + 1;
        }
    }
    if idx == field {
        (start + 1, (chars.len() - start).max(1))
    } else {
        (chars.len() + 1, 1)
    }
}

fn is_missing(s: &str, codes: &[String]) -> bool {
    s.is_empty() || s == MISSING_WORD || codes.iter().any(|c| c == s)
}

/// Role of a needed column.
#[derive(Clone, Copy, PartialEq)]
enum Role {
    /// Indicator `.1` of set `.0`.
    Indicator(usize, usize),
    Covariate,
    Weight,
    Exposure,
    Id,
    /// `[study] strata`.
    Stratum,
    /// `[study] psu`.
    Unit,
    /// A placement's distal outcome.
    Outcome,
}

struct Needed {
    col: ColumnRef,
    index: usize,
    role: Role,
    kind: VariableType,
}

/// What rows are read for, which decides the checks made of the data as a whole.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Purpose {
    /// Fitting: a categorical covariate needs two levels and its reference level, an
    /// item two values, in the rows used.
    Fit,
    /// Scoring rows under saved models (`predict`): each row is checked on its own
    /// (known columns, numbers where numbers are due), never against the others, so one
    /// row, an all-male batch or an outlier is scored as it would be among others.
    Score,
}

/// Read the CSV a study names and keep the rows every fit can use.
pub fn load(study: &Study) -> Result<Dataset> {
    load_for(study, Purpose::Fit)
}

/// [`load`] for a purpose ([`Purpose`]).
pub fn load_for(study: &Study, purpose: Purpose) -> Result<Dataset> {
    let path = study.data_path.as_path();
    if !path.exists() {
        return Err(Error::input(
            study
                .error_at(
                    study.data_span.clone(),
                    format!("the data file {} does not exist", path.display()),
                )
                .help("paths in a spec are relative to the spec file"),
        ));
    }
    let meta = std::fs::metadata(path).map_err(|e| {
        Error::input(
            study
                .error_at(
                    study.data_span.clone(),
                    format!("cannot read the data file {}: {e}", path.display()),
                )
                .help("check the path; paths in a spec are relative to the spec file"),
        )
    })?;
    if !meta.is_file() {
        return Err(Error::input(
            study
                .error_at(
                    study.data_span.clone(),
                    format!(
                        "the data path {} is {}, not a file",
                        path.display(),
                        if meta.is_dir() {
                            "a folder"
                        } else {
                            "a device, a pipe or a socket"
                        }
                    ),
                )
                .help("give the path of a CSV file"),
        ));
    }
    // Read as a stream, so that the file's text is never held whole. A failure while
    // reading falls back to reading the text whole (for a file of up to 256 MiB), which
    // reports it with the line shown.
    let mut streamed_error = None;
    if let Ok(file) = std::fs::File::open(path) {
        if let Ok(mut input) = Hashing::new(file) {
            let raw = Raw::streamed(path);
            let read = read_cells(study, &raw, &mut input, purpose);
            if let Some(line) = input.too_long {
                return Err(Error::input(
                    Diagnostic::new(format!(
                        "line {line} of {} is longer than {} MiB",
                        path.display(),
                        crate::spec::limits::MAX_LINE_BYTES >> 20
                    ))
                    .help("a line of the data file holds one row of comma-separated values; is this the data file?"),
                ));
            }
            match read {
                Ok(cells) => return assemble(study, &raw, input.sha256_hex(), cells, purpose),
                Err(e) => streamed_error = Some(e),
            }
        }
    }
    if let Some(e) = streamed_error.filter(|_| meta.len() > 256 << 20) {
        return Err(e);
    }
    let text = read_text(path, "data")?;
    from_text_for(study, &text, purpose)
}

/// A reader of the data file that skips a leading byte-order mark and hashes every byte
/// after it (the same bytes [`from_text`] hashes).
struct Hashing {
    inner: std::io::BufReader<std::fs::File>,
    hasher: Sha256,
    /// Line being read (1-based) and its bytes so far.
    line: usize,
    line_bytes: usize,
    /// The first line longer than [`crate::spec::limits::MAX_LINE_BYTES`]: reading stops
    /// there.
    too_long: Option<usize>,
}

impl Hashing {
    fn new(file: std::fs::File) -> std::io::Result<Hashing> {
        use std::io::BufRead;
        let mut inner = std::io::BufReader::with_capacity(1 << 16, file);
        if inner.fill_buf()?.starts_with("\u{feff}".as_bytes()) {
            inner.consume(3);
        }
        Ok(Hashing {
            inner,
            hasher: Sha256::new(),
            line: 1,
            line_bytes: 0,
            too_long: None,
        })
    }

    fn sha256_hex(self) -> String {
        hex(&self.hasher.finalize())
    }
}

impl std::io::Read for Hashing {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.hasher.update(&buf[..n]);
        for b in &buf[..n] {
            if *b == b'\n' {
                self.line += 1;
                self.line_bytes = 0;
            } else {
                self.line_bytes += 1;
            }
        }
        if self.line_bytes > crate::spec::limits::MAX_LINE_BYTES {
            self.too_long = Some(self.line);
            return Err(std::io::Error::other("a line is too long"));
        }
        Ok(n)
    }
}

/// The cells of one needed column as read, stored end to end: one string for the column
/// and an end offset per row, instead of a string per cell (which at ten million rows
/// would take several gigabytes).
#[derive(Default)]
struct Cells {
    text: String,
    /// End of each row's cell in `text`. A missing cell is stored empty: a present cell
    /// never is (see [`is_missing`]).
    ends: Vec<u32>,
}

impl Cells {
    /// Add the next row's cell; false when the column's text would pass 4 GiB.
    fn push(&mut self, v: Option<&str>) -> bool {
        if let Some(v) = v {
            self.text.push_str(v);
        }
        match u32::try_from(self.text.len()) {
            Ok(end) => {
                self.ends.push(end);
                true
            }
            Err(_) => false,
        }
    }

    /// Row `i`'s cell, None when it is missing.
    fn get(&self, i: usize) -> Option<&str> {
        let start = if i == 0 { 0 } else { self.ends[i - 1] as usize };
        let end = self.ends[i] as usize;
        (end > start).then(|| &self.text[start..end])
    }

    fn iter(&self) -> impl Iterator<Item = Option<&str>> + Clone + '_ {
        (0..self.ends.len()).map(|i| self.get(i))
    }
}

/// [`load`] on the text of a data file already read (`study.data_path` names it in
/// messages).
pub fn from_text(study: &Study, text: &str) -> Result<Dataset> {
    from_text_for(study, text, Purpose::Fit)
}

/// [`from_text`] for a purpose.
pub fn from_text_for(study: &Study, text: &str, purpose: Purpose) -> Result<Dataset> {
    let path = study.data_path.as_path();
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let raw = Raw::with_text(path, text);
    let cells = read_cells(study, &raw, text.as_bytes(), purpose)?;
    assemble(study, &raw, sha256_hex(text.as_bytes()), cells, purpose)
}

/// What reading the CSV keeps: the needed columns, each one's cells, and each data row's
/// line in the file.
struct ReadCells {
    needed: Vec<Needed>,
    cells: Vec<Cells>,
    lines: Vec<usize>,
}

/// Read the header and every record, keeping the cells of the columns the spec needs.
fn read_cells(study: &Study, raw: &Raw, input: impl std::io::Read, purpose: Purpose) -> Result<ReadCells> {
    let path = study.data_path.as_path();
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .trim(csv::Trim::All)
        .from_reader(input);
    let header: Vec<String> = reader
        .headers()
        .map_err(|e| csv_error(raw, &e))?
        .iter()
        .map(|h| crate::spec::nfc(h).into_owned())
        .collect();
    if header.iter().all(String::is_empty) {
        return Err(Error::input(
            Diagnostic::new(format!("the data file {} is empty", path.display()))
                .help("the first line must name the columns, e.g. worker_id,age,sex,..."),
        ));
    }
    for (i, h) in header.iter().enumerate() {
        if header[..i].contains(h) {
            return Err(Error::input(
                Diagnostic::new(format!("column name '{h}' appears twice in the header"))
                    .at(raw.field_location(1, i))
                    .help("give every column a different name"),
            ));
        }
    }

    let needed = needed_columns(study, &header, purpose)?;
    let mut cells: Vec<Cells> = (0..needed.len()).map(|_| Cells::default()).collect();
    let mut lines: Vec<usize> = Vec::new();
    let mut record = csv::StringRecord::new();
    loop {
        match reader.read_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => return Err(csv_error(raw, &e)),
        }
        let line = record.position().map_or(0, |p| p.line() as usize);
        if record.len() == 1 && record.get(0) == Some("") && header.len() > 1 {
            continue; // a blank line
        }
        lines.push(line);
        for (k, nd) in needed.iter().enumerate() {
            // Text in Unicode normal form C, as the spec's names are: a precomposed and a
            // decomposed accent are one level.
            let v = crate::spec::nfc(record.get(nd.index).unwrap_or(""));
            let v = v.as_ref();
            if !cells[k].push((!is_missing(v, &study.missing_codes)).then_some(v)) {
                return Err(Error::input(
                    Diagnostic::new(format!(
                        "column '{}' holds more than 4 GiB of text by line {line}",
                        nd.col.name
                    ))
                    .help("split the data file, or drop columns the spec does not use before reading it"),
                ));
            }
        }
    }
    Ok(ReadCells { needed, cells, lines })
}

/// Keep the rows every fit can use and parse their cells by the spec's types.
fn assemble(study: &Study, raw: &Raw, sha256: String, read: ReadCells, purpose: Purpose) -> Result<Dataset> {
    let path = study.data_path.as_path();
    let ReadCells {
        needed,
        mut cells,
        lines,
    } = read;
    let rows_read = lines.len();
    if rows_read == 0 {
        return Err(Error::input(
            Diagnostic::new(format!(
                "the data file {} has a header but no data rows",
                path.display()
            ))
            .at(Location::at(path, 2, 1, Some(String::new())))
            .help("add at least one row of data below the header"),
        ));
    }
    let (keep, missing_by_column) = rows_to_keep(study, &needed, &cells, rows_read, purpose)?;
    let rows_used = keep.iter().filter(|k| **k).count();
    if rows_used == 0 {
        return Err(Error::input(
            Diagnostic::new(format!("no row of {} has every value the fits need", path.display()))
                .help(describe_missing(&missing_by_column)),
        ));
    }
    let ids = row_ids(raw, &needed, &mut cells, &lines, &keep)?;
    let mut sets: Vec<SetBuilder> = study
        .blocks
        .iter()
        .map(|b| SetBuilder::new(b.family, rows_used, b.columns.len()))
        .collect();
    let mut parsed = Parsed {
        weights: vec![1.0; rows_used],
        exposure: None,
        columns: BTreeMap::new(),
    };
    let mut outcomes = BTreeMap::new();
    let (mut strata, mut units) = (None, None);
    for (k, nd) in needed.iter().enumerate() {
        match nd.role {
            Role::Id => continue,
            Role::Stratum | Role::Unit => {
                let labels = kept_cells(&lines, &cells[k], &keep).map(|(_, c)| c.unwrap_or(""));
                let coded = Some(survey::codes(labels));
                if nd.role == Role::Stratum {
                    strata = coded;
                } else {
                    units = coded;
                }
            }
            Role::Outcome => {
                let kept = kept_cells(&lines, &cells[k], &keep);
                let present = kept.clone().filter_map(|(l, c)| c.map(|c| (l, c)));
                let count = present.clone().count();
                let Column::Numeric { values, .. } = parse_numbers(raw, nd, &nd.kind, present, count)? else {
                    unreachable!("an outcome is numeric")
                };
                let mut read = values.into_iter();
                let values: Vec<f64> = kept
                    .map(|(_, c)| match c {
                        Some(_) => read.next().expect("a value per present cell"),
                        None => f64::NAN,
                    })
                    .collect();
                let missing = rows_used - count;
                outcomes.insert(
                    nd.col.name.clone(),
                    OutcomeColumn {
                        kind: nd.kind.clone(),
                        values,
                        missing,
                    },
                );
            }
            Role::Indicator(set, j) if study.blocks[set].family.layout == Layout::Levels => {
                let (levels, codes) = parse_item(raw, study, nd, &lines, &cells[k], &keep, purpose)?;
                sets[set].put_levels(j, levels, &codes);
            }
            role => {
                let kept = kept_cells(&lines, &cells[k], &keep).map(|(l, c)| (l, c.unwrap_or("")));
                let column = parse_column(raw, study, nd, kept.clone(), rows_used, purpose)?;
                match role {
                    Role::Indicator(set, j) => sets[set].put_numbers(j, column),
                    other => parsed.put(raw, study, nd, other, kept, column)?,
                }
            }
        }
        cells[k] = Cells::default(); // parsed: free its text
    }
    let mut warnings = Vec::new();
    for (name, column) in &parsed.columns {
        if let Column::Categorical { levels, .. } = column {
            warnings.extend(case_twins(&format!("covariate '{name}'"), levels));
        }
    }
    for (block, set) in study.blocks.iter().zip(&sets) {
        for (column, levels) in block.columns.iter().zip(&set.levels) {
            warnings.extend(case_twins(&format!("item '{}'", column.name), levels));
        }
    }
    let (weights, sample_size) = weigh(study.weight_type, parsed.weights);
    let survey = survey_design(raw, study, &needed, &lines, &keep, strata, units, &weights)?;
    Ok(Dataset {
        path: path.to_path_buf(),
        sha256,
        rows_read,
        rows_excluded: rows_read - rows_used,
        missing_by_column,
        ids,
        weights,
        sample_size,
        survey,
        indicator_names: study.indicators.iter().map(|c| c.name.clone()).collect(),
        indicator_sets: study.blocks.iter().zip(sets).map(|(b, s)| s.finish(b)).collect(),
        exposure: parsed.exposure.map(Arc::new),
        columns: parsed.columns,
        outcomes,
        warnings,
    })
}

/// The survey design of the kept rows, when the spec names strata or sampling units; a
/// stratum without two units of positive weight is an error at one of its rows.
#[allow(clippy::too_many_arguments)] // the reader's state, passed through once
fn survey_design(
    raw: &Raw,
    study: &Study,
    needed: &[Needed],
    lines: &[usize],
    keep: &[bool],
    strata: Option<survey::Coded>,
    units: Option<survey::Coded>,
    weights: &[f64],
) -> Result<Option<Arc<SurveyDesign>>> {
    if strata.is_none() && units.is_none() {
        return Ok(None);
    }
    SurveyDesign::new(weights.len(), strata, units, weights)
        .map(|d| Some(Arc::new(d)))
        .map_err(|lonely| {
            let line = lines.iter().zip(keep).filter(|(_, k)| **k).nth(lonely.row).map_or(2, |(l, _)| *l);
            let (what, role) = match &study.strata {
                Some(_) => (format!("stratum '{}'", quoted(&lonely.stratum)), Role::Stratum),
                None => ("the sample".to_string(), Role::Unit),
            };
            let index = needed.iter().find(|n| n.role == role).map_or(0, |n| n.index);
            Error::input(
                Diagnostic::new(format!(
                    "{what} has {} sampling unit{} of positive weight among the rows used; a variance needs at least two",
                    lonely.units,
                    if lonely.units == 1 { "" } else { "s" }
                ))
                .at(raw.field_location(line, index))
                .help("merge it with a similar stratum (the usual remedy for a stratum with one unit), or check the strata and psu columns"),
            )
        })
}

/// The weights as the likelihood uses them and the sample size, by what the weights mean:
/// frequency weights are used as given and add up to the sample size; sampling weights are
/// rescaled to mean 1 (their scale carries no information, so multiplying them all by a
/// constant changes nothing), and the sample size is the number of rows.
pub fn weigh(kind: Option<crate::spec::WeightType>, weights: Vec<f64>) -> (Vec<f64>, f64) {
    let rows = weights.len() as f64;
    match kind {
        Some(crate::spec::WeightType::Frequency) => {
            let total = crate::numerics::sum(&weights);
            (weights, total)
        }
        Some(crate::spec::WeightType::Sampling) => {
            let scale = rows / crate::numerics::sum(&weights);
            (weights.iter().map(|w| w * scale).collect(), rows)
        }
        None => (weights, rows),
    }
}

/// A warning for each pair of `levels` of `what` that differ only in case ("Male" and
/// "male"): they are kept as two levels, which is seldom what the data mean.
fn case_twins(what: &str, levels: &[String]) -> Vec<String> {
    let mut out = Vec::new();
    for (i, a) in levels.iter().enumerate() {
        for b in &levels[i + 1..] {
            if a != b && a.to_lowercase() == b.to_lowercase() {
                out.push(format!(
                    "the levels '{}' and '{}' of {what} differ only in case and are kept as two levels; \
                     if they are one, write them alike in the data",
                    quoted(a),
                    quoted(b)
                ));
            }
        }
    }
    out
}

/// Rows missing each needed column, by column name.
type Missing = Vec<(String, usize)>;

/// Which rows are complete for every needed column (a missing value of an indicator
/// whose family skips missing values does not exclude its row), and how many rows missed
/// each column. A column with no value at all is an error when fitting; when scoring, its
/// rows are left out like any row that misses a needed value.
fn rows_to_keep(
    study: &Study,
    needed: &[Needed],
    cells: &[Cells],
    rows_read: usize,
    purpose: Purpose,
) -> Result<(Vec<bool>, Missing)> {
    let skips_missing = |nd: &Needed| match nd.role {
        Role::Indicator(set, _) => study.blocks[set].family.layout == Layout::Levels,
        _ => false,
    };
    let mut keep = vec![true; rows_read];
    let mut missing_by_column = Vec::new();
    for (k, nd) in needed.iter().enumerate() {
        let missing = cells[k].iter().filter(Option::is_none).count();
        if missing == rows_read && nd.role != Role::Id && purpose == Purpose::Fit {
            return Err(Error::input(
                study
                    .error_at(
                        nd.col.span.clone(),
                        format!(
                            "column '{}' has no values: every row is empty or {MISSING_WORD}",
                            nd.col.name
                        ),
                    )
                    .help("check the column in the data file, or leave it out of the spec"),
            ));
        }
        if nd.role == Role::Outcome {
            continue; // missing only in its own comparison
        }
        if nd.role != Role::Id {
            missing_by_column.push((nd.col.name.clone(), missing));
            if skips_missing(nd) {
                continue; // skipped in that row's likelihood
            }
            for (i, c) in cells[k].iter().enumerate() {
                if c.is_none() {
                    keep[i] = false;
                }
            }
        }
    }
    // A row with no indicator value at all carries no information about the clusters.
    let skipping: Vec<usize> = (0..needed.len()).filter(|k| skips_missing(&needed[*k])).collect();
    if skipping.len() == study.indicators.len() {
        let mut empty = 0;
        for (i, kp) in keep.iter_mut().enumerate() {
            if *kp && skipping.iter().all(|k| cells[*k].get(i).is_none()) {
                *kp = false;
                empty += 1;
            }
        }
        missing_by_column.push(("(every item missing)".to_string(), empty));
    }
    Ok((keep, missing_by_column))
}

/// The kept rows' ids (the id column, or the 1-based data row number); an id that
/// repeats is an error naming both lines.
fn row_ids(raw: &Raw, needed: &[Needed], cells: &mut [Cells], lines: &[usize], keep: &[bool]) -> Result<RowIds> {
    let mut ids = RowIds::default();
    let id_k = needed.iter().position(|n| n.role == Role::Id);
    let mut id_lines = Vec::new();
    for (i, line) in lines.iter().enumerate() {
        if !keep[i] {
            continue;
        }
        match id_k.map(|k| (k, cells[k].get(i))) {
            Some((k, Some(v))) => {
                if let Some(c) = crate::spec::control_character(v) {
                    return Err(Error::input(
                        Diagnostic::new(format!(
                            "the id '{}' holds the control character U+{:04X}",
                            quoted(&v.escape_debug().to_string()),
                            u32::from(c)
                        ))
                        .at(raw.field_location(*line, needed[k].index))
                        .help("ids are plain text: remove tabs, line breaks and escapes"),
                    ));
                }
                ids.push(v);
            }
            Some((k, None)) => {
                return Err(Error::input(
                    Diagnostic::new(format!(
                        "the row at line {line} has no id: its '{}' is empty or {MISSING_WORD}",
                        needed[k].col.name
                    ))
                    .at(raw.field_location(*line, needed[k].index))
                    .help("give every row its own id (rows are matched to their memberships by it)"),
                ))
            }
            None => ids.push(&(i + 1).to_string()),
        }
        id_lines.push(*line);
    }
    if let Some(k) = id_k {
        cells[k] = Cells::default(); // the ids have their own copy now
    }
    if let Some((first, again)) = first_repeat(&ids) {
        let (id, line) = (&ids[again], id_lines[again]);
        return Err(Error::input(
            Diagnostic::new(format!(
                "id '{}' appears twice (lines {} and {line})",
                quoted(id),
                id_lines[first]
            ))
            .at(raw.field_location(line, needed[id_k.unwrap_or(0)].index))
            .help("every row needs its own id; remove the duplicate row"),
        ));
    }
    Ok(ids)
}

/// One family's indicators while they are parsed.
struct SetBuilder {
    layout: Layout,
    rows: usize,
    width: usize,
    numbers: Vec<f64>,
    codes: Vec<u16>,
    levels: Vec<Vec<String>>,
    missing: usize,
}

impl SetBuilder {
    fn new(family: &FamilyInfo, rows: usize, width: usize) -> SetBuilder {
        let (numbers, codes) = match family.layout {
            Layout::Levels => (Vec::new(), vec![MISSING_ITEM; rows * width]),
            Layout::Rows | Layout::Columns => (vec![0.0; rows * width], Vec::new()),
        };
        SetBuilder {
            layout: family.layout,
            rows,
            width,
            numbers,
            codes,
            levels: vec![Vec::new(); width],
            missing: 0,
        }
    }

    /// Indicator `j`'s numbers.
    fn put_numbers(&mut self, j: usize, column: Column) {
        let Column::Numeric { values, .. } = column else {
            unreachable!("the indicators of a numeric layout are numeric")
        };
        match self.layout {
            Layout::Rows => {
                for (i, v) in values.iter().enumerate() {
                    self.numbers[i * self.width + j] = *v;
                }
            }
            _ => self.numbers[j * self.rows..(j + 1) * self.rows].copy_from_slice(&values),
        }
    }

    /// Indicator `j`'s levels and codes.
    fn put_levels(&mut self, j: usize, levels: Vec<String>, codes: &[u16]) {
        for (i, c) in codes.iter().enumerate() {
            self.codes[i * self.width + j] = *c;
        }
        self.missing += codes.iter().filter(|c| **c == MISSING_ITEM).count();
        self.levels[j] = levels;
    }

    fn finish(self, block: &crate::spec::IndicatorBlock) -> IndicatorSet {
        let values = match self.layout {
            Layout::Rows => IndicatorValues::Rows(Arc::new(self.numbers)),
            Layout::Columns => IndicatorValues::Columns(Arc::new(self.numbers)),
            Layout::Levels => IndicatorValues::Levels {
                codes: Arc::new(self.codes),
                levels: self.levels,
                missing: self.missing,
            },
        };
        IndicatorSet {
            family: block.family,
            names: block.columns.iter().map(|c| c.name.clone()).collect(),
            values,
        }
    }
}

/// The parsed columns that are not indicators.
struct Parsed {
    weights: Vec<f64>,
    exposure: Option<Exposure>,
    columns: BTreeMap<String, Column>,
}

impl Parsed {
    /// Keep a parsed weight, exposure or covariate column (`kept`: its kept rows' line and
    /// cell), checking weights and exposure.
    fn put<'c>(
        &mut self,
        raw: &Raw,
        study: &Study,
        nd: &Needed,
        role: Role,
        kept: impl Iterator<Item = (usize, &'c str)>,
        column: Column,
    ) -> Result<()> {
        match role {
            Role::Exposure => {
                let Column::Numeric { values, .. } = column else {
                    unreachable!("exposure is numeric")
                };
                for ((l, _), e) in kept.zip(&values) {
                    if !(*e > 0.0) {
                        return Err(Error::input(
                            Diagnostic::new(format!("exposure {e} in column '{}' is not positive", nd.col.name))
                                .at(raw.field_location(l, nd.index))
                                .help(
                                    "exposure is person-time and must be above 0; leave the cell empty to drop the row",
                                ),
                        ));
                    }
                }
                let logs = values.iter().map(|e| e.ln()).collect();
                self.exposure = Some(Exposure { values, logs });
            }
            Role::Weight => {
                let Column::Numeric { values, .. } = column else {
                    unreachable!("weights are numeric")
                };
                for ((l, _), w) in kept.zip(&values) {
                    if *w < 0.0 {
                        return Err(Error::input(
                            Diagnostic::new(format!("weight {w} in column '{}' is negative", nd.col.name))
                                .at(raw.field_location(l, nd.index))
                                .help("case weights must be zero or positive"),
                        ));
                    }
                }
                if values.iter().all(|w| *w == 0.0) {
                    return Err(Error::input(study.error_at(
                        nd.col.span.clone(),
                        format!("every weight in '{}' is zero", nd.col.name),
                    )));
                }
                self.weights = values;
            }
            Role::Covariate => {
                self.columns.insert(nd.col.name.clone(), column);
            }
            Role::Id | Role::Indicator(..) | Role::Stratum | Role::Unit | Role::Outcome => {
                unreachable!("ids, indicators, outcomes and the survey design are kept elsewhere")
            }
        }
        Ok(())
    }
}

/// The first id (in row order) that an earlier row already has: (that earlier row, this
/// row). Found by sorting row numbers by id, which takes 4 bytes a row where a hash map of
/// the ids would take about 50.
fn first_repeat(ids: &RowIds) -> Option<(usize, usize)> {
    let mut order: Vec<u32> = (0..ids.len() as u32).collect();
    // Stable: equal ids stay in row order, so each run of them starts at its first row.
    order.sort_by(|a, b| ids[*a as usize].cmp(&ids[*b as usize]));
    order
        .windows(2)
        .filter(|w| ids[w[0] as usize] == ids[w[1] as usize])
        .map(|w| (w[0] as usize, w[1] as usize))
        .min_by_key(|(_, again)| *again)
}

fn describe_missing(m: &[(String, usize)]) -> String {
    let parts: Vec<String> = m
        .iter()
        .filter(|(_, n)| *n > 0)
        .map(|(c, n)| format!("{c}: {n} missing"))
        .collect();
    format!("missing values by column: {}", parts.join(", "))
}

fn needed_columns(study: &Study, header: &[String], purpose: Purpose) -> Result<Vec<Needed>> {
    let mut out: Vec<Needed> = Vec::new();
    let find = |c: &ColumnRef| -> Result<usize> {
        header.iter().position(|h| *h == c.name).ok_or_else(|| {
            if purpose == Purpose::Score {
                // The spec is the saved one: the new file lacks what the models need.
                let d = Diagnostic::new(format!(
                    "{} has no column '{}', which the fitted models need",
                    study.data_path.display(),
                    c.name
                ))
                .at(Location::at(&study.data_path, 1, 1, Some(header.join(","))));
                return Error::input(d.help(format!("its columns: {}", list_preview(header))));
            }
            let mut d = study.error_at(c.span.clone(), format!("unknown column '{}' in {}", c.name, c.key));
            if let Some(s) = did_you_mean(&c.name, header.iter().map(String::as_str)) {
                d = d.help(format!("did you mean '{s}'?"));
            }
            Error::input(d.help(format!("the data has: {}", list_preview(header))))
        })
    };
    let mut add = |c: &ColumnRef, role: Role| -> Result<()> {
        if let Some(n) = out.iter().find(|n| n.col.name == c.name) {
            if (role == Role::Outcome) != (n.role == Role::Outcome) {
                return Err(Error::input(
                    study
                        .error_at(
                            c.span.clone(),
                            format!("'{}' is a covariate of one placement and a distal outcome of another", c.name),
                        )
                        .help("a row missing a covariate leaves every fit, a row missing an outcome only that outcome's comparison; copy the column under a second name for the other use"),
                ));
            }
            return Ok(());
        }
        let index = find(c)?;
        let kind = match role {
            Role::Id => VariableType::Categorical { reference: None, levels: None },
            Role::Weight | Role::Exposure => VariableType::Continuous,
            Role::Stratum | Role::Unit => VariableType::Categorical { reference: None, levels: None },
            _ => study.variable_type(&c.name).ok_or_else(|| {
                let what = if role == Role::Outcome { "distal outcome" } else { "covariate" };
                Error::input(
                    study
                        .error_at(c.span.clone(), format!("{what} '{}' has no type in [variables]", c.name))
                        .help(format!(
                            "add {0} = \"continuous\" (or \"binary\", \"count\", {{ type = \"categorical\", reference = \"...\" }}) under [variables]",
                            c.name
                        )),
                )
            })?,
        };
        if role == Role::Outcome && matches!(kind, VariableType::Categorical { .. }) {
            return Err(Error::input(
                study
                    .error_at(c.span.clone(), format!("distal outcome '{}' is categorical", c.name))
                    .help("an outcome is continuous, binary (0/1) or a count; for a categorical one, make a 0/1 column per level and list those"),
            ));
        }
        out.push(Needed {
            col: c.clone(),
            index,
            role,
            kind,
        });
        Ok(())
    };
    if let Some(id) = &study.id {
        add(id, Role::Id)?;
    }
    if let Some(w) = &study.weights {
        add(w, Role::Weight)?;
    }
    if let Some(s) = &study.strata {
        add(s, Role::Stratum)?;
    }
    if let Some(u) = &study.psu {
        add(u, Role::Unit)?;
    }
    for c in &study.indicators {
        let (set, j) = study
            .blocks
            .iter()
            .enumerate()
            .find_map(|(s, b)| b.columns.iter().position(|x| x.name == c.name).map(|j| (s, j)))
            .expect("every indicator is in a block");
        add(c, Role::Indicator(set, j))?;
    }
    if let Some(e) = &study.exposure {
        add(e, Role::Exposure)?;
    }
    for c in study.all_covariates() {
        add(c, Role::Covariate)?;
    }
    if purpose == Purpose::Fit {
        for o in study.all_outcomes() {
            add(o, Role::Outcome)?;
        }
    }
    Ok(out)
}

fn list_preview(header: &[String]) -> String {
    if header.len() <= 12 {
        header.join(", ")
    } else {
        format!("{}, ... ({} columns)", header[..12].join(", "), header.len())
    }
}

/// The kept rows' (line, cell) of one column, walked again as often as needed rather than
/// collected (24 bytes a row).
fn kept_cells<'c>(
    lines: &'c [usize],
    cells: &'c Cells,
    keep: &'c [bool],
) -> impl Iterator<Item = (usize, Option<&'c str>)> + Clone + 'c {
    lines
        .iter()
        .zip(cells.iter())
        .zip(keep)
        .filter(|(_, k)| **k)
        .map(|((l, c), _)| (*l, c))
}

/// Parse a column over the kept rows' (line, cell) pairs `kept` (`rows` of them).
fn parse_column<'c>(
    raw: &Raw,
    study: &Study,
    nd: &Needed,
    kept: impl Iterator<Item = (usize, &'c str)> + Clone,
    rows: usize,
    purpose: Purpose,
) -> Result<Column> {
    let name = &nd.col.name;
    match &nd.kind {
        VariableType::Categorical { reference, levels } => {
            let (order, found) = level_order(raw, nd, levels.as_deref(), kept.clone(), &format!("'{name}'"))?;
            if order.len() > limits::MAX_COVARIATE_LEVELS {
                return Err(Error::input(
                    study
                        .error_at(
                            nd.col.span.clone(),
                            format!(
                                "categorical covariate '{name}' has {} levels; at most {} are supported",
                                order.len(),
                                limits::MAX_COVARIATE_LEVELS
                            ),
                        )
                        .help("group its levels into fewer categories, or use a numeric summary of it"),
                ));
            }
            let used: Vec<&String> = order.iter().filter(|l| found.contains(l)).collect();
            if used.len() < 2 && purpose == Purpose::Fit {
                return Err(Error::input(
                    study
                        .error_at(
                            nd.col.span.clone(),
                            format!(
                                "categorical covariate '{name}' has only one level ('{}') in the rows used",
                                used.first().map_or("", |s| s.as_str())
                            ),
                        )
                        .help("a covariate needs at least two levels; leave it out"),
                ));
            }
            let reference = match reference {
                None => 0,
                // Scoring builds designs from the saved terms: the reference is theirs.
                Some(_) if purpose == Purpose::Score => 0,
                Some(r) => order.iter().position(|l| l == r).ok_or_else(|| {
                    let (_, span) = &study.variables[name];
                    Error::input(
                        study
                            .error_at(
                                span.clone(),
                                format!("reference level '{r}' of '{name}' does not occur in the data"),
                            )
                            .help(format!("levels found: {}", order.join(", "))),
                    )
                })?,
            };
            let codes = kept
                .map(|(_, v)| order.iter().position(|l| l == v).unwrap_or(0) as u32)
                .collect();
            Ok(Column::Categorical {
                levels: order,
                reference,
                codes,
            })
        }
        kind => parse_numbers(raw, nd, kind, kept, rows),
    }
}
/// Parse a numeric column (continuous, binary or count) over its kept rows' (line,
/// cell) pairs; a cell that is not a finite number of its type is an error at its line
/// and column.
fn parse_numbers<'c>(
    raw: &Raw,
    nd: &Needed,
    kind: &VariableType,
    kept: impl Iterator<Item = (usize, &'c str)>,
    rows: usize,
) -> Result<Column> {
    let name = &nd.col.name;
    let bad = |line: usize, msg: String, help: String| -> Error {
        Error::input(Diagnostic::new(msg).at(raw.field_location(line, nd.index)).help(help))
    };
    let mut values = Vec::with_capacity(rows);
    for (line, v) in kept {
        let x: f64 = v.parse().map_err(|_| {
            bad(
                line,
                format!("'{}' in column '{name}' is not a number", quoted(v)),
                format!(
                    "'{name}' is {}; write a number, or leave the cell empty (or {MISSING_WORD}) if it is missing; if '{}' marks missing values in this file, list it in [study] missing_codes",
                    kind.word(),
                    quoted(v)
                ),
            )
        })?;
        if !x.is_finite() {
            return Err(bad(
                line,
                format!("'{}' in column '{name}' is not a finite number", quoted(v)),
                "write a finite number, or leave the cell empty if it is missing".into(),
            ));
        }
        match kind {
            VariableType::Binary if x != 0.0 && x != 1.0 => {
                return Err(bad(
                    line,
                    format!("'{}' in binary column '{name}' is not 0 or 1", quoted(v)),
                    format!("code '{name}' as 0/1, or declare it categorical"),
                ));
            }
            VariableType::Count if x < 0.0 || x.fract() != 0.0 => {
                return Err(bad(
                    line,
                    format!(
                        "'{}' in count column '{name}' is not a whole number of zero or more",
                        quoted(v)
                    ),
                    "counts are 0, 1, 2, ...".into(),
                ));
            }
            _ => {}
        }
        values.push(x);
    }
    Ok(Column::Numeric {
        kind: kind.clone(),
        values,
    })
}

/// Parse an item column over the rows kept: its levels and a code per kept row
/// ([`MISSING_ITEM`] where missing). Binary items have levels "0" and "1"; categorical
/// ones the levels declared in `[variables]`, else those found, in natural order.
fn parse_item(
    raw: &Raw,
    study: &Study,
    nd: &Needed,
    lines: &[usize],
    cells: &Cells,
    keep: &[bool],
    purpose: Purpose,
) -> Result<(Vec<String>, Vec<u16>)> {
    let name = &nd.col.name;
    let present = kept_cells(lines, cells, keep).filter_map(|(l, c)| c.map(|v| (l, v)));
    let levels: Vec<String> = match &nd.kind {
        VariableType::Binary => {
            for (line, v) in present.clone() {
                let ok = v.parse::<f64>().is_ok_and(|x| x == 0.0 || x == 1.0);
                if !ok {
                    return Err(Error::input(
                        Diagnostic::new(format!("'{}' in binary item '{name}' is not 0 or 1", quoted(v)))
                            .at(raw.field_location(line, nd.index))
                            .help(format!("code '{name}' as 0/1, or declare it categorical")),
                    ));
                }
            }
            vec!["0".to_string(), "1".to_string()]
        }
        VariableType::Categorical { levels, reference } => {
            let (mut order, _) = level_order(raw, nd, levels.as_deref(), present.clone(), &format!("item '{name}'"))?;
            if let Some(r) = reference {
                // The reference level is the logits' baseline: put it first.
                if let Some(pos) = order.iter().position(|l| l == r) {
                    let lv = order.remove(pos);
                    order.insert(0, lv);
                }
            }
            order
        }
        other => unreachable!("an item is binary or categorical, not {}", other.word()),
    };
    if levels.len() > limits::MAX_ITEM_LEVELS {
        return Err(Error::input(
            study
                .error_at(
                    nd.col.span.clone(),
                    format!(
                        "item '{name}' has {} levels; at most {} are supported",
                        levels.len(),
                        limits::MAX_ITEM_LEVELS
                    ),
                )
                .help("group its levels into fewer categories"),
        ));
    }
    let seen: std::collections::BTreeSet<&str> = present.map(|(_, v)| v).collect();
    if seen.len() < 2 && purpose == Purpose::Fit {
        return Err(Error::input(
            study
                .error_at(
                    nd.col.span.clone(),
                    format!(
                        "item '{name}' takes only one value ('{}') in the rows used, so it cannot tell clusters apart",
                        seen.iter().next().copied().unwrap_or("")
                    ),
                )
                .help("leave it out of [indicators].columns"),
        ));
    }
    let codes = kept_cells(lines, cells, keep)
        .map(|(_, c)| match c {
            None => MISSING_ITEM,
            Some(v) => match &nd.kind {
                VariableType::Binary => u16::from(v.parse::<f64>().is_ok_and(|x| x == 1.0)),
                _ => levels.iter().position(|l| l == v).map_or(MISSING_ITEM, |p| p as u16),
            },
        })
        .collect();
    Ok((levels, codes))
}

/// The levels of a categorical column over its present values `kept`, and the levels
/// found there (in order of appearance): the declared `levels` when given (a value outside
/// them is an error naming its line and column; `what` names the column in it), else the
/// levels found in natural order.
fn level_order<'c>(
    raw: &Raw,
    nd: &Needed,
    levels: Option<&[String]>,
    kept: impl Iterator<Item = (usize, &'c str)> + Clone,
    what: &str,
) -> Result<(Vec<String>, Vec<String>)> {
    // Levels in order of appearance; past the largest number any column may have, the
    // caller refuses the column, so reading stops there.
    let mut found: Vec<String> = Vec::new();
    let mut seen = std::collections::HashSet::new();
    for (line, v) in kept.clone() {
        if seen.insert(v) {
            if let Some(c) = crate::spec::control_character(v) {
                return Err(Error::input(
                    Diagnostic::new(format!(
                        "the value '{}' of {what} holds the control character U+{:04X}",
                        quoted(&v.escape_debug().to_string()),
                        u32::from(c)
                    ))
                    .at(raw.field_location(line, nd.index))
                    .help("levels are plain text: remove tabs, line breaks and escapes"),
                ));
            }
            found.push(v.to_string());
            if found.len() > limits::MAX_COVARIATE_LEVELS.max(limits::MAX_ITEM_LEVELS) {
                break;
            }
        }
    }
    let order = match levels {
        Some(ls) => {
            if let Some((l, v)) = kept.clone().find(|(_, v)| !ls.iter().any(|x| x == v)) {
                let mut h = format!("the levels declared in [variables] are: {}", ls.join(", "));
                if let Some(s) = did_you_mean(v, ls.iter().map(String::as_str)) {
                    h = format!("did you mean '{s}'? {h}");
                }
                return Err(Error::input(
                    Diagnostic::new(format!("'{}' is not a level of {what}", quoted(v)))
                        .at(raw.field_location(l, nd.index))
                        .help(h),
                ));
            }
            ls.to_vec()
        }
        None => sort_levels(found.clone()),
    };
    Ok((order, found))
}

/// Levels in natural order: numerically when every level is a number, else by text.
fn sort_levels(mut levels: Vec<String>) -> Vec<String> {
    if levels.iter().all(|l| l.parse::<f64>().is_ok()) {
        levels.sort_by(|a, b| {
            a.parse::<f64>()
                .unwrap_or(0.0)
                .total_cmp(&b.parse::<f64>().unwrap_or(0.0))
        });
    } else {
        levels.sort();
    }
    levels
}

fn csv_error(raw: &Raw, e: &csv::Error) -> Error {
    match e.kind() {
        csv::ErrorKind::UnequalLengths { pos, expected_len, len } => {
            let line = pos.as_ref().map_or(0, |p| p.line() as usize);
            Error::input(
                Diagnostic::new(format!(
                    "line {line} has {len} fields, but the header has {expected_len}"
                ))
                .at(Location::at(raw.path, line, 1, Some(raw.line_text(line.max(1)))))
                .help("every row needs one value per column; quote values that contain commas"),
            )
        }
        _ => Error::input(Diagnostic::new(format!(
            "cannot read {} as CSV: {e}",
            raw.path.display()
        ))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cells_give_back_each_row_and_its_missing_values() {
        let mut c = Cells::default();
        for v in [Some("w01"), None, Some("3.5"), None, Some("x")] {
            assert!(c.push(v));
        }
        let back: Vec<Option<&str>> = c.iter().collect();
        assert_eq!(back, vec![Some("w01"), None, Some("3.5"), None, Some("x")]);
        assert_eq!(c.get(0), Some("w01"));
        assert_eq!(c.get(3), None);
    }

    #[test]
    fn row_ids_give_back_each_id_and_their_join() {
        let ids: RowIds = ["w01", "", "a,b", "w\n2"].iter().collect();
        assert_eq!(ids.len(), 4);
        assert_eq!(ids.iter().collect::<Vec<_>>(), ["w01", "", "a,b", "w\n2"]);
        assert_eq!(&ids[2], "a,b");
        assert_eq!(ids.joined(), ["w01", "", "a,b", "w\n2"].join("\n"));
        assert!(RowIds::default().is_empty());
    }

    #[test]
    fn the_first_repeated_id_in_row_order_is_found() {
        let ids = |v: &[&str]| v.iter().collect::<RowIds>();
        assert_eq!(first_repeat(&ids(&["a", "b", "c"])), None);
        // "b" repeats at row 3 before "a" does at row 4; a third "b" is not the first repeat.
        assert_eq!(first_repeat(&ids(&["b", "a", "z", "b", "a", "b"])), Some((0, 3)));
        assert_eq!(first_repeat(&ids(&["x", "y", "y", "x"])), Some((1, 2)));
    }

    #[test]
    fn field_offsets_respect_quotes() {
        assert_eq!(field_offset("a,bb,c", 1), (3, 2));
        assert_eq!(field_offset("\"x,y\",z", 1), (7, 1));
        assert_eq!(field_offset("a,b", 0), (1, 1));
    }

    #[test]
    fn numeric_levels_sort_as_numbers() {
        let v = sort_levels(vec!["10".into(), "9".into(), "2".into()]);
        assert_eq!(v, vec!["2", "9", "10"]);
    }
}
