//! End-to-end and outside-reference tests, one module per topic.
//!
//! * `references`: the physics against outside sources (analytic solutions,
//!   the Python package `fluids`, scipy quadrature), fixtures in tests/fixtures.
//! * `properties`: invariants over random inputs (proptest).
//! * `util`: shared helpers.

mod properties;
mod references;
mod util;
