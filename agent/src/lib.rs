//! leaktally: running estimates of how much liquid or vapour has escaped from
//! a leaking tank, how fast it is escaping now, and how much more will.
//!
//! Layout:
//!
//! * [`model`]: the physics (orifice flow, tank geometry, draining forecast,
//!   the running total). Pure, clock-free and deterministic.
//! * [`report`]: formatting figures for people, with units and the cautions.
//! * [`demo`]: the invented demo site and what `leaktally demo` prints.
//! * [`cli`]: the command line.
//!
//! Estimates for emergency planning, not measurements.

pub mod cli;
pub mod demo;
pub mod model;
pub mod report;
