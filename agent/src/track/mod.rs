//! Tracking leak events: the estimator per open event.
//!
//! * [`estimator`]: the clock-free estimator of one event (orifice model,
//!   inventory balance, fitted hole, forecast, crossings, data quality).
//! * [`tracker`]: open events, operator actions, and the writes to the store.

pub mod estimator;
pub mod tracker;
