//! Integration tests, by layer.

pub mod acceleration;
pub mod bad_inputs;
pub mod cli;
pub mod common;
pub mod comparison;
pub mod docs;
pub mod families;
pub mod family_recovery;
pub mod faults;
pub mod inference;
pub mod layers;
pub mod numbering;
pub mod outcomes;
pub mod properties;
pub mod recovery;
pub mod reference;
pub mod row_pass;
pub mod run_folder;
pub mod schema;
pub mod structures;
pub mod toy_family;
pub mod two_stages;
pub mod untrusted;
pub mod weights;
