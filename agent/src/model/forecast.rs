//! Draining forecast: from the present state, when does the liquid flow
//! stop, how much has left by then, and how much by given horizons?
//!
//! The tank's ODE is dV/dt = -m(h)/rho with dV = A_s(h) dh, where m is the
//! orifice flow and A_s the free-surface area. Integrated forward in time it
//! is awkward exactly where the answer matters: the flow stops with the level
//! touching the stop level tangentially (m ~ sqrt(h - h_stop), so
//! h - h_stop ~ (t_stop - t)²), which defeats sign-change event location, and
//! the surface area of a horizontal cylinder or sphere vanishes at the bottom.
//!
//! With no transfers the level only falls, so we integrate the same ODE with
//! the roles swapped, time as a function of level, in the variable
//! u = sqrt(h - h_stop):
//!
//! ```text
//! dt/du = 2 u rho A_s(h) / m(h),   h = h_stop + u²
//! ```
//!
//! This integrand is smooth and bounded for every shape here (for an open
//! vent it is exactly constant for a vertical cylinder), the flow-stop event
//! becomes the fixed end u = 0 of the integration, and the whole ODE becomes
//! a quadrature done by adaptive Gauss–Kronrod to about 1e-12. Horizon events
//! t = T are located afterwards by Newton's method on the running integral,
//! whose derivative is the integrand itself.
//!
//! Assumptions, stated in every report that uses a forecast: the headspace
//! gauge pressure stays at its present value (an open vent, or a blanketing
//! regulator), no product is pumped in or out, and the hole keeps its size.
//! Left out: vapour venting after the liquid is gone.

use super::error::{ModelResult, finite, non_negative};
use super::orifice::{DischargeCoefficient, Hole};
use super::quadrature::{self, Panel};
use super::units::{Length, Mass, MassRate, STANDARD_GRAVITY, TimeSpan};
use super::vessel::{TankState, Vessel};

/// Relative accuracy asked of the quadrature.
const REL_TOL: f64 = 1e-12;

/// The state of the tank at one future moment.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HorizonPoint {
    /// Time from the start of the forecast.
    pub after: TimeSpan,
    pub level: Length,
    /// Released from the start of the forecast to this moment.
    pub released: Mass,
    /// Liquid flow at this moment.
    pub rate: MassRate,
}

/// The outcome of a draining forecast.
#[derive(Debug, Clone, PartialEq)]
pub struct Forecast {
    /// Time from the start until the liquid stops flowing.
    pub stops_after: TimeSpan,
    /// Level at which it stops: the hole, or above it under a vacuum.
    pub stop_level: Length,
    /// Released from the start until the flow stops.
    pub released_by_stop: Mass,
    /// One point per requested horizon, in the order requested.
    pub horizons: Vec<HorizonPoint>,
}

/// Forecasts liquid draining through `hole` from `start`, with the headspace
/// held at `start.headspace`, and reports the state at each of `horizons`.
pub fn forecast_liquid(
    vessel: &Vessel,
    hole: &Hole,
    cd: DischargeCoefficient,
    start: &TankState,
    horizons: &[TimeSpan],
) -> ModelResult<Forecast> {
    vessel.check_hole(hole)?;
    let h0 = vessel.geometry().check_level(start.level)?;
    finite("headspace pressure", start.headspace.si())?;
    for t in horizons {
        non_negative("forecast horizon", t.si(), "s")?;
    }
    let stop_level = vessel.stop_level(hole, start.headspace);
    let drain = Drain::new(vessel, hole, cd, start, stop_level.si());

    let Some(drain) = drain.filter(|_| h0 > stop_level.si()) else {
        // Nothing flows now, so nothing flows later either.
        let still = HorizonPoint {
            after: TimeSpan::ZERO,
            level: start.level,
            released: Mass::ZERO,
            rate: MassRate::ZERO,
        };
        return Ok(Forecast {
            stops_after: TimeSpan::ZERO,
            stop_level: start.level,
            released_by_stop: Mass::ZERO,
            horizons: horizons
                .iter()
                .map(|&after| HorizonPoint { after, ..still })
                .collect(),
        });
    };

    let panels = drain.panels(drain.h_stop, h0);
    let stops_after: f64 = panels.iter().map(|p| p.integral).sum();

    let horizons = horizons
        .iter()
        .map(|&after| {
            let u = if after.si() >= stops_after {
                0.0
            } else {
                drain.u_at_time(&panels, after.si())
            };
            drain.point(after, u, h0)
        })
        .collect();
    Ok(Forecast {
        stops_after: TimeSpan::seconds(stops_after),
        stop_level,
        released_by_stop: vessel.liquid_above(start.level, hole)
            - vessel.liquid_above(stop_level, hole),
        horizons,
    })
}

/// How long until `mass` has left through `hole`, counted from `start`;
/// `None` when the flow stops first (or never starts).
pub fn time_to_release(
    vessel: &Vessel,
    hole: &Hole,
    cd: DischargeCoefficient,
    start: &TankState,
    mass: Mass,
) -> ModelResult<Option<TimeSpan>> {
    vessel.check_hole(hole)?;
    let h0 = vessel.geometry().check_level(start.level)?;
    finite("headspace pressure", start.headspace.si())?;
    non_negative("released mass", mass.si(), "kg")?;
    let stop_level = vessel.stop_level(hole, start.headspace).si();
    let Some(drain) = Drain::new(vessel, hole, cd, start, stop_level).filter(|_| h0 > stop_level)
    else {
        return Ok((mass.si() == 0.0).then_some(TimeSpan::ZERO));
    };
    let geometry = vessel.geometry();
    let volume_left = geometry.volume_si(h0) - mass.si() / drain.rho;
    if volume_left < geometry.volume_si(stop_level) {
        return Ok(None);
    }
    let target = geometry.level_si(volume_left).clamp(stop_level, h0);
    let panels = drain.panels(target, h0);
    Ok(Some(TimeSpan::seconds(
        panels.iter().map(|p| p.integral).sum(),
    )))
}

/// The constants of one draining problem.
struct Drain<'a> {
    vessel: &'a Vessel,
    hole: &'a Hole,
    cd: DischargeCoefficient,
    headspace: f64,
    rho: f64,
    /// Cd times the hole area.
    k: f64,
    h_stop: f64,
}

impl<'a> Drain<'a> {
    fn new(
        vessel: &'a Vessel,
        hole: &'a Hole,
        cd: DischargeCoefficient,
        start: &TankState,
        h_stop: f64,
    ) -> Option<Self> {
        let k = cd.get() * hole.area().si();
        (k > 0.0 && k.is_finite()).then_some(Self {
            vessel,
            hole,
            cd,
            headspace: start.headspace.si(),
            rho: vessel.density().si(),
            k,
            h_stop,
        })
    }

    /// Quadrature panels of dt/du for the level falling from `h_high` to
    /// `h_low`, split at the geometry's breakpoints.
    fn panels(&self, h_low: f64, h_high: f64) -> Vec<Panel> {
        let u = |h: f64| (h - self.h_stop).max(0.0).sqrt();
        let mut breaks = vec![u(h_low)];
        breaks.extend(
            self.vessel
                .geometry()
                .breakpoints()
                .iter()
                .filter(|&&hb| hb > h_low && hb < h_high)
                .map(|&hb| u(hb)),
        );
        breaks.push(u(h_high));
        quadrature::integrate(&mut |u| self.dt_du(u), &breaks, REL_TOL)
    }

    /// The integrand dt/du.
    fn dt_du(&self, u: f64) -> f64 {
        let h = self.h_stop + u * u;
        let area = self.vessel.geometry().area_si(h);
        if self.headspace <= 0.0 {
            // The stop level is where the driving pressure vanishes, so
            // dP = rho g u² exactly and the u cancels: no 0/0 at u = 0.
            2.0 * area / (self.k * (2.0 * STANDARD_GRAVITY).sqrt())
        } else {
            let dp =
                self.headspace + self.rho * STANDARD_GRAVITY * (h - self.hole.elevation().si());
            2.0 * u * self.rho * area / (self.k * (2.0 * self.rho * dp).sqrt())
        }
    }

    /// Finds u where the time from the start reaches `t` (less than the stop
    /// time). Time runs from the top panel down.
    fn u_at_time(&self, panels: &[Panel], t: f64) -> f64 {
        let mut elapsed = 0.0;
        for panel in panels.iter().rev() {
            if t < elapsed + panel.integral || std::ptr::eq(panel, &panels[0]) {
                return self.solve_in_panel(panel, t - elapsed);
            }
            elapsed += panel.integral;
        }
        0.0
    }

    /// Solves g(u) = (integral of dt/du from u to the panel top) - target = 0
    /// by Newton's method inside the panel; g falls as u rises, g' = -dt/du.
    fn solve_in_panel(&self, panel: &Panel, target: f64) -> f64 {
        let (mut lo, mut hi) = (panel.from, panel.to);
        let mut f = |u: f64| self.dt_du(u);
        let fraction = if panel.integral > 0.0 {
            target / panel.integral
        } else {
            0.0
        };
        let mut u = hi - fraction.clamp(0.0, 1.0) * (hi - lo);
        for _ in 0..100 {
            let g = quadrature::kronrod15(&mut f, u, panel.to).0 - target;
            if g > 0.0 {
                lo = u;
            } else {
                hi = u;
            }
            let slope = f(u);
            let newton = u + g / slope;
            let next = if slope > 0.0 && newton > lo && newton < hi {
                newton
            } else {
                0.5 * (lo + hi)
            };
            if (next - u).abs() <= 4.0 * f64::EPSILON * panel.to.max(1e-300) {
                return next;
            }
            u = next;
        }
        u
    }

    fn point(&self, after: TimeSpan, u: f64, h0: f64) -> HorizonPoint {
        let level = Length::metres(self.h_stop + u * u);
        let geometry = self.vessel.geometry();
        let released =
            (geometry.volume_si(h0) - geometry.volume_si(level.si())).max(0.0) * self.rho;
        let state = TankState {
            level,
            headspace: crate::model::units::Pressure::pascals(self.headspace),
        };
        HorizonPoint {
            after,
            level,
            released: Mass::kilograms(released),
            rate: self.vessel.outflow(&state, self.hole, self.cd).rate,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::geometry::Geometry;
    use crate::model::units::{AbsolutePressure, Density, Pressure};

    fn vertical(d: f64, h: f64) -> Vessel {
        Vessel::new(
            Geometry::vertical_cylinder(Length::metres(d), Length::metres(h)).unwrap(),
            Density::kg_per_cubic_metre(850.0),
            AbsolutePressure::STANDARD_ATMOSPHERE,
            None,
        )
        .unwrap()
    }

    #[test]
    fn nothing_flows_from_a_surface_below_the_hole() {
        let v = vertical(3.0, 5.0);
        let hole = Hole::new(Length::millimetres(25.0), Length::metres(2.0)).unwrap();
        let start = TankState {
            level: Length::metres(1.5),
            headspace: Pressure::ZERO,
        };
        let f = forecast_liquid(
            &v,
            &hole,
            DischargeCoefficient::CONSERVATIVE,
            &start,
            &[TimeSpan::hours(1.0)],
        )
        .unwrap();
        assert_eq!(f.stops_after, TimeSpan::ZERO);
        assert_eq!(f.released_by_stop, Mass::ZERO);
        assert_eq!(f.horizons[0].level, start.level);
    }

    #[test]
    fn a_pressurised_tank_drains_to_the_hole_faster_than_a_vented_one() {
        let v = vertical(3.0, 5.0);
        let hole = Hole::new(Length::millimetres(25.0), Length::metres(0.5)).unwrap();
        let run = |kpa: f64| {
            let start = TankState {
                level: Length::metres(4.0),
                headspace: Pressure::kilopascals(kpa),
            };
            forecast_liquid(&v, &hole, DischargeCoefficient::SHARP_EDGED, &start, &[]).unwrap()
        };
        let (vented, blanketed) = (run(0.0), run(20.0));
        assert!(blanketed.stops_after < vented.stops_after);
        // Both drain to the hole: the same mass.
        assert!((blanketed.released_by_stop.si() - vented.released_by_stop.si()).abs() < 1e-9);
        assert_eq!(blanketed.stop_level, hole.elevation());
    }

    #[test]
    fn bad_inputs_are_refused() {
        let v = vertical(3.0, 5.0);
        let hole = Hole::new(Length::millimetres(25.0), Length::metres(0.5)).unwrap();
        let cd = DischargeCoefficient::CONSERVATIVE;
        let ok = TankState {
            level: Length::metres(4.0),
            headspace: Pressure::ZERO,
        };
        let high = TankState {
            level: Length::metres(6.0),
            ..ok
        };
        assert!(forecast_liquid(&v, &hole, cd, &high, &[]).is_err());
        assert!(forecast_liquid(&v, &hole, cd, &ok, &[TimeSpan::seconds(-1.0)]).is_err());
        let nan = TankState {
            headspace: Pressure::pascals(f64::NAN),
            ..ok
        };
        assert!(forecast_liquid(&v, &hole, cd, &nan, &[]).is_err());
        let above = Hole::new(Length::millimetres(25.0), Length::metres(5.5)).unwrap();
        assert!(forecast_liquid(&v, &above, cd, &ok, &[]).is_err());
    }
}
