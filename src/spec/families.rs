//! What the spec and the data layer need to know of a component family: its words, the
//! declared types its indicators may have, how its indicators are stored, and which of
//! the spec's family keys it reads. Each family states this once, in its own module
//! (`model::family`), as a static [`FamilyInfo`]; the spec is validated against the list
//! of families the program was started with.

use super::VariableType;

/// A declared variable type without its levels.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TypeKind {
    /// A real number.
    Continuous,
    /// 0 or 1.
    Binary,
    /// Unordered levels.
    Categorical,
    /// A non-negative whole number.
    Count,
}

super::words!(TypeKind {
    Continuous => "continuous",
    Binary => "binary",
    Categorical => "categorical",
    Count => "count",
});

impl TypeKind {
    /// The declared type of an indicator nobody declared (a categorical one has its
    /// levels from the data).
    pub fn undeclared(self) -> VariableType {
        match self {
            TypeKind::Continuous => VariableType::Continuous,
            TypeKind::Binary => VariableType::Binary,
            TypeKind::Categorical => VariableType::Categorical {
                reference: None,
                levels: None,
            },
            TypeKind::Count => VariableType::Count,
        }
    }
}

/// How the data layer stores a family's indicators.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    /// Numbers, row-major (n × indicators); a row missing any of them is excluded.
    Rows,
    /// Numbers, one column after the other; a row missing any of them is excluded.
    Columns,
    /// Level codes, row-major; a missing value is kept and skipped in that row's
    /// likelihood (missing at random).
    Levels,
}

/// A spec key shared by the families that read it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FamilyKey {
    /// `[indicators].exposure`: a person-time column whose log is an offset.
    Exposure,
    /// `[indicators].smoothing`: a pseudo-count keeping level probabilities off 0 and 1.
    Smoothing,
    /// `[search].covariance`, `covariance_prior` and `variance_floor`.
    Covariance,
}

/// What the spec and the data layer know of one component family.
#[derive(Debug, PartialEq, Eq)]
pub struct FamilyInfo {
    /// The family's word in `[indicators] family` and in saved models.
    pub word: &'static str,
    /// The word for one of its indicators in the outputs (`gaussian`, `item`, `count`).
    pub indicator_word: &'static str,
    /// Its indicators' types in words, for messages ("binary or categorical").
    pub wanted: &'static str,
    /// The declared types its indicators may have.
    pub types: &'static [TypeKind],
    /// The type of an undeclared indicator when the spec names this family.
    pub default_type: TypeKind,
    /// In the `mixed` family, the declared types whose indicators form this family's block.
    pub mixed: &'static [TypeKind],
    /// How the data layer stores its indicators.
    pub layout: Layout,
    /// When its indicators share one regression design (a component covariate then acts
    /// on all of them or none): their adjective in messages ("continuous").
    pub shared_design: Option<&'static str>,
    /// The spec keys it reads.
    pub keys: &'static [FamilyKey],
}

impl FamilyInfo {
    /// Whether the family reads `key`.
    pub fn reads(&self, key: FamilyKey) -> bool {
        self.keys.contains(&key)
    }

    /// Whether its indicators may have the declared type `t`.
    pub fn accepts(&self, t: &VariableType) -> bool {
        self.types.contains(&t.kind())
    }
}
