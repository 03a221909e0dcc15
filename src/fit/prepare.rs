//! Preparing a placement: its gating and component designs, and each family's arrays
//! for it ([`crate::model::family::Prepared`]); the arrays every block of a fit shares;
//! a fit's starting model.

use super::FitResult;
use crate::data::{Dataset, Design};
use crate::error::{Error, Result};
use crate::model::family::{BlockDesigns, Components, Families, Prepared};
use crate::model::gating::Gating;
use crate::model::{FitData, Model, ModelOptions};
use crate::spec::{Placement, Proportions, Study};
use std::sync::Arc;

/// A placement with its design matrices and its component blocks' arrays built.
#[derive(Debug, Clone)]
pub struct PreparedPlacement {
    /// The placement as validated.
    pub placement: Placement,
    /// Gating design (intercept alone when the placement has no gating covariates).
    pub gating: Design,
    /// The whole component design: every component covariate (each block uses the
    /// columns that act on its indicators).
    pub components: Design,
    /// Each block's arrays, one per indicator set of the data, in block order.
    pub blocks: Vec<Arc<dyn Prepared>>,
    /// The families the blocks were prepared by (to prepare a changed placement again).
    pub families: Families,
    /// For a three-step placement: the design of its gating covariates, used in step 3
    /// (the mixture itself is fitted with `gating` = intercept alone).
    pub step_three: Option<Design>,
}

impl PreparedPlacement {
    /// The design a gating network's coefficients refer to: the step-3 covariates for
    /// the logit of a three-step placement (its mixture has no gating covariates), else
    /// the gating design.
    pub fn design_of(&self, gating: &Gating) -> &Design {
        match (&self.step_three, gating) {
            (Some(d), Gating::Logit { .. }) => d,
            _ => &self.gating,
        }
    }

    /// The design of a fit's reported gating network (see [`FitResult::reported_gating`]):
    /// the step-3 covariates when step 3 succeeded, else the gating design.
    pub fn reported_design(&self, fit: &FitResult) -> &Design {
        match (&self.step_three, &fit.step_three) {
            (Some(d), Some(Ok(_))) => d,
            _ => &self.gating,
        }
    }

    /// Names of the profile values of a fit of this placement, in block order.
    pub fn profile_columns(&self) -> Vec<String> {
        self.blocks.iter().flat_map(|b| b.profile_columns()).collect()
    }

    /// Whether some block uses the covariance structure.
    pub fn uses_structure(&self) -> bool {
        self.blocks
            .iter()
            .any(|b| b.info().reads(crate::spec::FamilyKey::Covariance))
    }

    /// The indicators as numbers for seeding starts by distance (row-major, with its
    /// column count): with one block that holds them row-major already, those values;
    /// else every block's seeding columns side by side.
    pub fn seeding_matrix(&self) -> (std::borrow::Cow<'_, [f64]>, usize) {
        if let [only] = &self.blocks[..] {
            if let Some((y, d)) = only.seeding_rows() {
                return (std::borrow::Cow::Borrowed(y), d);
            }
        }
        let cols: Vec<Vec<f64>> = self.blocks.iter().flat_map(|b| b.seeding_columns()).collect();
        let m = cols.len();
        let n = cols.first().map_or(0, Vec::len);
        let mut out = vec![0.0; n * m];
        for (j, col) in cols.iter().enumerate() {
            for (i, v) in col.iter().enumerate() {
                out[i * m + j] = *v;
            }
        }
        (std::borrow::Cow::Owned(out), m)
    }
}

/// Check the data for every family (the checks of data that is fitted, not scored), then
/// build the designs and block arrays of every placement; a constant or collinear
/// covariate set is an input error pointing at the placement.
pub fn prepare(study: &Study, data: &Dataset, families: &Families) -> Result<Vec<PreparedPlacement>> {
    for set in &data.indicator_sets {
        families.of(set).check(study, set)?;
    }
    study
        .placements
        .iter()
        .map(|p| prepare_placement(study, data, p, families))
        .collect()
}

/// The designs and arrays of one placement (see [`prepare`]).
pub fn prepare_placement(
    study: &Study,
    data: &Dataset,
    p: &Placement,
    families: &Families,
) -> Result<PreparedPlacement> {
    let design = |cols: &[&crate::spec::ColumnRef]| -> Result<Design> {
        let names: Vec<String> = cols.iter().map(|c| c.name.clone()).collect();
        data.design(&names).map_err(|e| {
            let at = cols
                .iter()
                .find(|c| Some(&c.name) == e.covariate.as_ref())
                .or(cols.first());
            let span = at.map_or(0..0, |c| c.span.clone());
            Error::input(
                study
                    .error_at(span, format!("in placement '{}': {}", p.name, e.message))
                    .help("take the covariate out of the placement (or out of its acts_on), or recode it"),
            )
        })
    };
    let components = design(&p.components.iter().collect::<Vec<_>>())?;
    // A design on the component design's covariates shares its values rather than
    // holding a copy (at 10^7 rows an intercept column alone is 80 MB).
    let design_on = |cols: Vec<&crate::spec::ColumnRef>| -> Result<Design> {
        if cols.iter().map(|c| &c.name).eq(p.components.iter().map(|c| &c.name)) {
            Ok(components.clone())
        } else {
            design(&cols)
        }
    };
    let covariates = design_on(p.gating.iter().collect())?;
    if p.method.is_stepwise() {
        let gating = design_on(Vec::new())?;
        let mut pp = assemble(data, p, gating, components, families);
        pp.step_three = Some(covariates);
        return Ok(pp);
    }
    Ok(assemble(data, p, covariates, components, families))
}

/// A placement's prepared arrays from its gating design and whole component design: each
/// family prepares its block of the data's indicators.
pub fn assemble(
    data: &Dataset,
    p: &Placement,
    gating: Design,
    components: Design,
    families: &Families,
) -> PreparedPlacement {
    let designs = BlockDesigns {
        placement: p,
        components: &components,
    };
    let blocks = data
        .indicator_sets
        .iter()
        .map(|set| families.of(set).prepare(set, data, &designs))
        .collect();
    PreparedPlacement {
        placement: p.clone(),
        gating,
        components,
        blocks,
        families: families.clone(),
        step_three: None,
    }
}

/// What every block of a placement's fits shares: the case weights and gating design.
pub fn fit_data<'a>(data: &'a Dataset, prepared: &'a PreparedPlacement) -> FitData<'a> {
    FitData {
        n: data.n(),
        weights: &data.weights,
        w: &prepared.gating.x,
        p: prepared.gating.p(),
    }
}

/// A model with the placement's gating network, a block per prepared block, and empty
/// parameters.
pub fn initial_model(
    fd: &FitData,
    blocks: &[Arc<dyn Prepared>],
    placement: &Placement,
    g: usize,
    options: ModelOptions,
) -> Model {
    let ridge = options.gating_ridge;
    let gating = if g == 1 {
        Gating::Equal { g: 1 }
    } else {
        match &placement.proportions {
            Proportions::Free if fd.p > 1 => Gating::Logit {
                bound_inverse: None,
                g,
                p: fd.p,
                gamma: vec![0.0; (g - 1) * fd.p],
                ridge,
            },
            Proportions::Free => Gating::Free {
                log_pi: vec![-(g as f64).ln(); g],
            },
            Proportions::Equal => Gating::Equal { g },
            Proportions::Fixed(v) => Gating::Fixed {
                log_pi: v.iter().map(|x| x.ln()).collect(),
            },
        }
    };
    let blocks = blocks.iter().map(|b| Arc::clone(b).block(fd, g, &options)).collect();
    Model {
        gating,
        components: Components { blocks },
    }
}

/// Every fit of the grid must have fewer free parameters than rows: an input error
/// pointing at the placement's cluster counts otherwise.
pub fn check_rows(study: &Study, data: &Dataset, prepared: &[PreparedPlacement]) -> Result<()> {
    for (pp, p) in prepared.iter().zip(&study.placements) {
        let fd = fit_data(data, pp);
        for &g in &p.clusters {
            for &structure in &study.search.structures {
                let options = ModelOptions::for_study(study, structure);
                let k = initial_model(&fd, &pp.blocks, &pp.placement, g, options).n_params();
                if data.n() <= k {
                    return Err(Error::input(
                        study
                            .error_at(
                                pp.placement.clusters_span.clone(),
                                format!(
                                    "too few rows: {} rows are used, but placement '{}' with {g} clusters ({}) has {k} parameters",
                                    data.n(),
                                    pp.placement.name,
                                    super::covariance_label(&structure, pp.uses_structure())
                                ),
                            )
                            .help("fit fewer clusters, use fewer covariates, or use more data (the rows must outnumber the parameters)"),
                    ));
                }
            }
        }
    }
    Ok(())
}
