//! Settings types the spec validates and the layers above read: the covariance
//! structures of the Gaussian family, how standard errors are computed, how placements
//! are compared. They sit in the bottom layer so that every layer can name them.

/// Volume across clusters.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Volume {
    /// One volume for all clusters.
    Equal,
    /// A volume per cluster.
    Varying,
}

/// Shape across clusters.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Shape {
    /// Every direction has the same spread (A = I).
    Spherical,
    /// One shape for all clusters.
    Equal,
    /// A shape per cluster.
    Varying,
}

/// Orientation across clusters.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Orientation {
    /// Principal axes along the indicator axes (D = I): no correlations.
    Axes,
    /// One orientation for all clusters.
    Equal,
    /// An orientation per cluster.
    Varying,
}

/// A covariance structure. Spherical shapes carry `Orientation::Axes` (orientation is
/// then meaningless).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, serde::Serialize, serde::Deserialize)]
pub struct CovarianceStructure {
    /// Volume.
    pub volume: Volume,
    /// Shape.
    pub shape: Shape,
    /// Orientation.
    pub orientation: Orientation,
}

impl CovarianceStructure {
    /// Volume, shape and orientation all varying.
    pub const UNCONSTRAINED: CovarianceStructure = CovarianceStructure {
        volume: Volume::Varying,
        shape: Shape::Varying,
        orientation: Orientation::Varying,
    };

    /// A structure; spherical shapes take no orientation.
    pub fn new(volume: Volume, shape: Shape, orientation: Orientation) -> CovarianceStructure {
        let orientation = if shape == Shape::Spherical {
            Orientation::Axes
        } else {
            orientation
        };
        CovarianceStructure {
            volume,
            shape,
            orientation,
        }
    }

    /// All 14 structures, most constrained first.
    pub fn all() -> Vec<CovarianceStructure> {
        let mut out = Vec::new();
        for volume in [Volume::Equal, Volume::Varying] {
            out.push(CovarianceStructure::new(volume, Shape::Spherical, Orientation::Axes));
        }
        for shape in [Shape::Equal, Shape::Varying] {
            for volume in [Volume::Equal, Volume::Varying] {
                out.push(CovarianceStructure::new(volume, shape, Orientation::Axes));
            }
        }
        for orientation in [Orientation::Equal, Orientation::Varying] {
            for shape in [Shape::Equal, Shape::Varying] {
                for volume in [Volume::Equal, Volume::Varying] {
                    out.push(CovarianceStructure::new(volume, shape, orientation));
                }
            }
        }
        out
    }

    /// The words used in every output, e.g. "equal volume, varying shape, axis-aligned".
    pub fn describe(&self) -> String {
        let v = match self.volume {
            Volume::Equal => "equal volume",
            Volume::Varying => "varying volume",
        };
        match (self.shape, self.orientation) {
            (Shape::Spherical, _) => format!("{v}, spherical"),
            (s, o) => {
                let s = if s == Shape::Equal {
                    "equal shape"
                } else {
                    "varying shape"
                };
                let o = match o {
                    Orientation::Axes => "axis-aligned",
                    Orientation::Equal => "equal orientation",
                    Orientation::Varying => "varying orientation",
                };
                format!("{v}, {s}, {o}")
            }
        }
    }

    /// Covariance parameters for d indicators and G clusters (Celeux & Govaert 1995,
    /// Table 1, without the mean parameters).
    pub fn n_params(&self, d: usize, g: usize) -> usize {
        let beta = d * (d + 1) / 2;
        let vol_extra = if self.volume == Volume::Varying { g - 1 } else { 0 };
        match (self.shape, self.orientation) {
            (Shape::Spherical, _) => 1 + vol_extra,
            (Shape::Equal, Orientation::Axes) => d + vol_extra,
            (Shape::Varying, Orientation::Axes) => g * d - g + 1 + vol_extra,
            (Shape::Equal, Orientation::Equal) => beta + vol_extra,
            (Shape::Varying, Orientation::Equal) => beta + (g - 1) * (d - 1) + vol_extra,
            (Shape::Equal, Orientation::Varying) => g * beta - (g - 1) * d + vol_extra,
            (Shape::Varying, Orientation::Varying) => g * beta - (g - 1) + vol_extra,
        }
    }

    /// With one indicator only the volume can differ between structures.
    pub fn fits_one_indicator(&self) -> bool {
        self.shape == Shape::Spherical
    }
}

/// What case weights mean (`[study] weight_type`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum WeightType {
    /// A row stands for w identical people: the sample size is the sum of the weights.
    Frequency,
    /// Inverse selection probabilities: rescaled to mean 1 over the rows used, so that the
    /// likelihood and the criteria do not depend on their scale; the sample size is the
    /// number of rows, and standard errors are design-based.
    Sampling,
}

crate::spec::words!(WeightType {
    Frequency => "frequency",
    Sampling => "sampling",
});

/// How standard errors are computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum ErrorMethod {
    /// Inverse observed information.
    ObservedInformation,
    /// Robust sandwich.
    Sandwich,
    /// Nonparametric bootstrap.
    Bootstrap,
}

crate::spec::words!(ErrorMethod {
    ObservedInformation => "observed-information",
    Sandwich => "sandwich",
    Bootstrap => "bootstrap",
});
crate::spec::words!(Volume {
    Equal => "equal",
    Varying => "varying",
});
crate::spec::words!(Shape {
    Equal => "equal",
    Varying => "varying",
    Spherical => "spherical",
});
crate::spec::words!(Orientation {
    Equal => "equal",
    Varying => "varying",
    Axes => "axes",
});

/// `[search].covariance` as one word.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CovarianceChoice {
    /// Every structure (those that fit one indicator, with one).
    All,
    /// Volume, shape and orientation all varying.
    Unconstrained,
}

crate::spec::words!(CovarianceChoice {
    All => "all",
    Unconstrained => "unconstrained",
});

/// `proportions` as one word.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ProportionsChoice {
    /// Estimated.
    Free,
    /// All 1/G.
    Equal,
}

crate::spec::words!(ProportionsChoice {
    Free => "free",
    Equal => "equal",
});

/// What the spec's `[compare]` table says.
#[derive(Debug, Clone, PartialEq)]
pub struct CompareSettings {
    /// Index of the reference placement.
    pub reference: usize,
    /// Cluster count fixed for the comparison, if any.
    pub clusters: Option<usize>,
    /// Names of aligned clusters, by number (`[compare] names`).
    pub names: std::collections::BTreeMap<usize, String>,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fourteen_distinct_structures_with_words() {
        let all = CovarianceStructure::all();
        assert_eq!(all.len(), 14);
        let mut words: Vec<String> = all.iter().map(|s| s.describe()).collect();
        words.sort();
        words.dedup();
        assert_eq!(words.len(), 14);
        assert!(words.contains(&"equal volume, varying shape, axis-aligned".to_string()));
    }

    /// Parameter counts against the formulas of Celeux & Govaert (1995, Table 1), written
    /// out here for d = 3, G = 4 by hand: β = d(d+1)/2 = 6.
    #[test]
    fn parameter_counts_follow_the_published_table() {
        let (d, g) = (3, 4);
        let count = |v, s, o| CovarianceStructure::new(v, s, o).n_params(d, g);
        use Orientation as O;
        use Shape as S;
        use Volume as V;
        assert_eq!(count(V::Equal, S::Spherical, O::Axes), 1);
        assert_eq!(count(V::Varying, S::Spherical, O::Axes), 4);
        assert_eq!(count(V::Equal, S::Equal, O::Axes), 3);
        assert_eq!(count(V::Varying, S::Equal, O::Axes), 6);
        assert_eq!(count(V::Equal, S::Varying, O::Axes), 9);
        assert_eq!(count(V::Varying, S::Varying, O::Axes), 12);
        assert_eq!(count(V::Equal, S::Equal, O::Equal), 6);
        assert_eq!(count(V::Varying, S::Equal, O::Equal), 9);
        assert_eq!(count(V::Equal, S::Varying, O::Equal), 12);
        assert_eq!(count(V::Varying, S::Varying, O::Equal), 15);
        assert_eq!(count(V::Equal, S::Equal, O::Varying), 15);
        assert_eq!(count(V::Varying, S::Equal, O::Varying), 18);
        assert_eq!(count(V::Equal, S::Varying, O::Varying), 21);
        assert_eq!(count(V::Varying, S::Varying, O::Varying), 24);
    }
}
