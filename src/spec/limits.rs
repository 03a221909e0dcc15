//! Upper bounds on what a spec may ask for and what an input may hold. Each keeps a run's
//! time and memory bounded and is far above what a study needs; crossing one is an error
//! that names the limit (listed in `docs/spec.md`).

/// Cluster counts per fit.
pub const MAX_CLUSTERS: usize = 50;
/// Starts per fit (`[search].starts`).
pub const MAX_STARTS: usize = 10_000;
/// EM iterations per start (`[search].max_iterations`).
pub const MAX_ITERATIONS: usize = 1_000_000;
/// Bootstrap replicates for standard errors (`[inference].replicates`).
pub const MAX_REPLICATES: usize = 10_000;
/// Bootstrap replicates per cluster-count test (`[inference].cluster_count_replicates`).
pub const MAX_COUNT_REPLICATES: usize = 1_000;
/// Placements in a spec.
pub const MAX_PLACEMENTS: usize = 100;
/// Fits in a grid: placements × cluster counts × covariance structures.
pub const MAX_FITS: usize = 2_000;
/// Levels of a categorical covariate in the data.
pub const MAX_COVARIATE_LEVELS: usize = 1_000;
/// Levels of a categorical item.
pub const MAX_ITEM_LEVELS: usize = 100;
/// Bytes of a spec file.
pub const MAX_SPEC_BYTES: u64 = 1 << 20;
/// Bytes of one line of a data file.
pub const MAX_LINE_BYTES: usize = 1 << 20;
/// Characters of a cell quoted in a message (longer cells are cut, with "…").
pub const QUOTED_CHARS: usize = 60;

/// A cell's text for a message: cut to [`QUOTED_CHARS`] characters.
pub fn quoted(cell: &str) -> String {
    match cell.char_indices().nth(QUOTED_CHARS) {
        None => cell.to_string(),
        Some((at, _)) => format!("{}…", &cell[..at]),
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn long_cells_are_cut_on_a_character_boundary() {
        assert_eq!(super::quoted("abc"), "abc");
        let long = "é".repeat(100);
        let cut = super::quoted(&long);
        assert_eq!(cut.chars().count(), super::QUOTED_CHARS + 1);
        assert!(cut.ends_with('…'));
    }
}
