//! The running release total over timestamped samples, with its band.
//!
//! Each sample gives a rate from the orifice model; the total is the
//! trapezoid-rule integral of those rates between samples, never "rate now
//! times time elapsed", which overstates a falling rate.
//!
//! The band comes from the discharge coefficient. Every flow equation here is
//! proportional to Cd, so the tally integrates the rate at Cd = 1 once and
//! scales it: the chosen Cd gives the best figure, 0.61 the low end and 1.0
//! the high end (common practice, see [`DischargeCoefficient`]). That keeps
//! the per-sample step to one square root.
//!
//! Left out on purpose: sample quality, gaps and the inventory balance. The
//! tracker decides what a usable sample is; the tally only integrates.

use super::error::ModelResult;
use super::integral::Trapezoid;
use super::orifice::{DischargeCoefficient, Hole};
use super::units::{Mass, MassRate};
use super::vessel::{Outflow, Phase, TankState, Vessel};

/// A best figure with the low and high ends of its band.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Band<T> {
    pub low: T,
    pub best: T,
    pub high: T,
}

/// Where the tally stands after a sample.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TallyFigures {
    /// Released since the first sample.
    pub released: Band<Mass>,
    /// Flow at the latest sample.
    pub rate: Band<MassRate>,
    /// Phase and driving pressure at the latest sample, at the chosen Cd.
    pub phase: Phase,
}

/// Integrates the release from one hole over a stream of samples.
#[derive(Debug, Clone)]
pub struct ReleaseTally {
    vessel: Vessel,
    hole: Hole,
    cd: DischargeCoefficient,
    /// The rate at Cd = 1 (kg/s) integrated since the first sample (kg).
    at_unit_cd: Trapezoid,
}

impl ReleaseTally {
    pub fn new(vessel: Vessel, hole: Hole, cd: DischargeCoefficient) -> ModelResult<Self> {
        vessel.check_hole(&hole)?;
        Ok(Self {
            vessel,
            hole,
            cd,
            at_unit_cd: Trapezoid::new(),
        })
    }

    pub fn vessel(&self) -> &Vessel {
        &self.vessel
    }

    pub fn hole(&self) -> &Hole {
        &self.hole
    }

    pub fn cd(&self) -> DischargeCoefficient {
        self.cd
    }

    /// The flow at `state`, at the chosen Cd.
    pub fn outflow(&self, state: &TankState) -> Outflow {
        self.vessel.outflow(state, &self.hole, self.cd)
    }

    /// Adds a sample taken at `at_ms` (milliseconds, any fixed epoch) and
    /// returns the figures after it. Samples must not go back in time; two
    /// at the same moment add nothing between them.
    pub fn push(&mut self, at_ms: i64, state: &TankState) -> ModelResult<TallyFigures> {
        let unit = self
            .vessel
            .outflow(state, &self.hole, DischargeCoefficient::CONSERVATIVE);
        let rate = unit.rate.si();
        let released = self.at_unit_cd.push(at_ms, rate)?;
        Ok(TallyFigures {
            released: self.scale(released, Mass::kilograms),
            rate: self.scale(rate, MassRate::kg_per_second),
            phase: unit.phase,
        })
    }

    /// The figures so far, without a new sample.
    pub fn figures(&self) -> TallyFigures {
        let rate = self.at_unit_cd.last().map_or(0.0, |(_, r)| r);
        TallyFigures {
            released: self.scale(self.at_unit_cd.total(), Mass::kilograms),
            rate: self.scale(rate, MassRate::kg_per_second),
            phase: Phase::None,
        }
    }

    fn scale<T>(&self, at_unit_cd: f64, make: impl Fn(f64) -> T) -> Band<T> {
        let best = self.cd.get();
        let low = best.min(DischargeCoefficient::SHARP_EDGED.get());
        let high = DischargeCoefficient::CONSERVATIVE.get();
        Band {
            low: make(at_unit_cd * low),
            best: make(at_unit_cd * best),
            high: make(at_unit_cd * high),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::geometry::Geometry;
    use crate::model::units::{AbsolutePressure, Density, Length, Pressure};

    fn tally(cd: f64) -> ReleaseTally {
        let vessel = Vessel::new(
            Geometry::vertical_cylinder(Length::metres(3.0), Length::metres(5.0)).unwrap(),
            Density::kg_per_cubic_metre(1000.0),
            AbsolutePressure::STANDARD_ATMOSPHERE,
            None,
        )
        .unwrap();
        let hole = Hole::new(Length::millimetres(20.0), Length::ZERO).unwrap();
        ReleaseTally::new(vessel, hole, DischargeCoefficient::new(cd).unwrap()).unwrap()
    }

    fn at(level: f64) -> TankState {
        TankState {
            level: Length::metres(level),
            headspace: Pressure::ZERO,
        }
    }

    #[test]
    fn trapezoid_between_samples() {
        let mut t = tally(0.8);
        let r1 = t.push(0, &at(4.0)).unwrap().rate.high.si();
        let r2 = t.push(10_000, &at(3.0)).unwrap().rate.high.si();
        let f = t.push(10_000, &at(3.0)).unwrap();
        let expected_high = 0.5 * (r1 + r2) * 10.0;
        assert!((f.released.high.si() - expected_high).abs() < 1e-12);
        assert!((f.released.best.si() - 0.8 * expected_high).abs() < 1e-12);
        assert!((f.released.low.si() - 0.61 * expected_high).abs() < 1e-12);
    }

    #[test]
    fn a_cd_below_the_band_widens_it_downwards() {
        let mut t = tally(0.5);
        t.push(0, &at(4.0)).unwrap();
        let f = t.push(1000, &at(4.0)).unwrap();
        assert_eq!(f.released.low, f.released.best);
    }

    #[test]
    fn samples_going_back_in_time_are_refused() {
        let mut t = tally(1.0);
        t.push(5000, &at(4.0)).unwrap();
        let err = t.push(4000, &at(4.0)).unwrap_err();
        assert!(err.to_string().contains("time order"), "{err}");
    }
}
