//! Tracking leak events: the estimator per open event.
//!
//! * [`estimator`]: the clock-free estimator of one event (orifice model,
//!   inventory balance, fitted hole, forecast, crossings, data quality).

pub mod estimator;
