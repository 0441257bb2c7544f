//! Tracking leak events: the estimator per open event.
//!
//! * [`estimate`]: what an estimate holds, as numbers and enums; the store
//!   and every report read it.
//! * [`estimator`]: the clock-free estimator of one event (orifice model,
//!   inventory balance, fitted hole, band, forecast, crossings, data
//!   quality).
//! * [`fit`]: the least-squares lines the estimator keeps.
//! * [`tracker`]: open events, operator actions, and the writes to the store.

pub mod estimate;
pub mod estimator;
pub mod fit;
pub mod tracker;
