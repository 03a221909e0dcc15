//! The integration test binary: one crate, one module per layer.

mod suite;
