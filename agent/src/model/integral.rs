//! The trapezoid rule over timestamped samples, as a running accumulator.
//!
//! Every running total in leaktally (released mass, the hole-free flow
//! integral the fit uses, transferred volume) integrates a rate between
//! samples this way: half the sum of the two rates times the time between
//! them. Never "rate now times elapsed time", which overstates a falling rate.

use super::error::{ModelError, ModelResult};

/// The running integral of a value over time (milliseconds in, seconds out).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Trapezoid {
    last: Option<(i64, f64)>,
    total: f64,
}

impl Trapezoid {
    pub fn new() -> Self {
        Self::default()
    }

    /// Adds the value at `at_ms` and returns the integral so far (value
    /// units times seconds). Times must not go back; equal times add nothing.
    pub fn push(&mut self, at_ms: i64, value: f64) -> ModelResult<f64> {
        if let Some((previous_ms, previous)) = self.last {
            if at_ms < previous_ms {
                return Err(ModelError::SamplesOutOfOrder {
                    previous_ms,
                    next_ms: at_ms,
                });
            }
            self.total += 0.5 * (previous + value) * (at_ms - previous_ms) as f64 / 1000.0;
        }
        self.last = Some((at_ms, value));
        Ok(self.total)
    }

    /// Forgets the last point, so the next one starts a new piece: for a gap
    /// that is bridged some other way.
    pub fn break_here(&mut self) {
        self.last = None;
    }

    /// Adds an amount integrated elsewhere (a bridged gap).
    pub fn add(&mut self, amount: f64) {
        self.total += amount;
    }

    pub fn total(&self) -> f64 {
        self.total
    }

    /// The latest point, if any.
    pub fn last(&self) -> Option<(i64, f64)> {
        self.last
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn integrates_a_line_exactly_and_refuses_time_going_back() {
        // The trapezoid rule is exact for a linear function (analytic:
        // the integral of 2t over [0, 10] s is 100).
        let mut t = Trapezoid::new();
        for ms in (0..=10_000).step_by(250) {
            t.push(ms, 2.0 * ms as f64 / 1000.0).unwrap();
        }
        assert!((t.total() - 100.0).abs() < 1e-12);
        assert!(t.push(9_000, 0.0).is_err());
        t.break_here();
        t.push(20_000, 5.0).unwrap();
        assert!(
            (t.total() - 100.0).abs() < 1e-12,
            "a break adds nothing across the gap"
        );
    }
}
