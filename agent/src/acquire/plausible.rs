//! How fast a tank's level can move, so that a reading that jumps further
//! than that is flagged `implausible_step` instead of passed on as good.
//!
//! The limit comes from physics with a generous margin, so that no real
//! event is ever flagged: the largest flow in or out that any leak or pump
//! could make, turned into volume over the time since the last good
//! reading and compared with the volume between the two levels (through the
//! tank's geometry, so a horizontal tank near its bottom or top, where a
//! little liquid moves the level far, is judged fairly).
//!
//! * Out through a hole: the orifice equation with Cd = 1 (no losses, the
//!   most any hole lets through) for a hole of 16 in (406 mm), the largest
//!   release size of risk-based-inspection practice (API RP 581's
//!   "rupture"; from memory), under the full head of a brim-full tank plus
//!   the highest headspace pressure its transmitter can report (or the
//!   assumed one).
//! * In or out by pumps: the transfer meter's whole range, and at least a
//!   16 in line at 3 m/s, a brisk transfer velocity (common practice), for
//!   pumps the site does not meter.
//! * Both together, times 1.5.
//!
//! For the demo's 3 m upright tank, 5 m tall, that is 2.5 m³/s, or 0.36 m of
//! level a second; a 40 mm hole in it lowers the level about 1 mm a second.
//! A level within 2 cm of the last good one always passes (gauge noise and
//! surface waves). A level flagged this way does not become the reference:
//! the next reading is compared with the last good one over the longer
//! time, so a real change that the limit could not follow (a shell that
//! fails outright) is accepted once the time since fits it, within seconds.
//!
//! A site with larger pumps or openings sets `max_rate_m_s` on the level
//! sensor, which replaces the volume limit with a plain level speed.
//!
//! Left out: what the estimator does with levels (it has its own, tighter
//! spike check during an event); pressure and transfer steps.

use crate::config::Tank;
use crate::model::Length;

/// The hole behind the leak bound, m: 16 in.
pub const RUPTURE_DIAMETER_M: f64 = 16.0 * 0.0254;
/// The velocity of an unmetered transfer through that bore, m/s.
pub const UNMETERED_LINE_VELOCITY_M_S: f64 = 3.0;
/// The margin on the sum of both flows.
pub const MARGIN: f64 = 1.5;
/// A level this close to the last good one always passes, m.
pub const NOISE_ALLOWANCE_M: f64 = 0.02;
/// Standard gravity, m/s² (exact by definition, CGPM 1901).
const G: f64 = 9.806_65;

/// The fastest a tank's level can be believed to move.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum StepLimit {
    /// A volume flow, m³/s, judged through the tank's geometry.
    Flow { max_m3_s: f64 },
    /// A level speed, m/s, from the config's `max_rate_m_s`.
    Rate { max_m_s: f64 },
}

impl StepLimit {
    /// The limit for a tank, from its config.
    pub fn for_tank(tank: &Tank) -> Self {
        if let Some(max_m_s) = tank.max_level_rate {
            return StepLimit::Rate { max_m_s };
        }
        let height = tank.vessel.geometry().height().si();
        let density = tank.vessel.density().si();
        // The highest gauge pressure above the liquid that the config
        // knows of; a submerged tap's top of range includes the column,
        // which only makes the bound larger.
        let headspace_pa = match &tank.pressure {
            Some(p) => {
                let top = p.sensor.valid_si.1;
                if p.absolute {
                    top - tank.vessel.ambient().si()
                } else {
                    top
                }
            }
            None => tank.assumed_headspace.si(),
        }
        .max(0.0);
        let bore = std::f64::consts::PI / 4.0 * RUPTURE_DIAMETER_M * RUPTURE_DIAMETER_M;
        let out_of_hole = bore * (2.0 * (G * height + headspace_pa / density)).sqrt();
        let metered = tank.transfer.as_ref().map_or(0.0, |t| {
            let (lo, hi) = t.valid_si;
            lo.abs().max(hi.abs())
        });
        let pumped = metered.max(bore * UNMETERED_LINE_VELOCITY_M_S);
        StepLimit::Flow {
            max_m3_s: MARGIN * (out_of_hole + pumped),
        }
    }

    /// Whether a move from `from_m` to `to_m` over `seconds` is possible.
    pub fn allows(&self, tank: &Tank, from_m: f64, to_m: f64, seconds: f64) -> bool {
        let step = (to_m - from_m).abs();
        if step <= NOISE_ALLOWANCE_M || !step.is_finite() {
            // A non-finite level is the decoder's to flag, not this check's.
            return true;
        }
        let seconds = seconds.max(0.0);
        match *self {
            StepLimit::Rate { max_m_s } => step <= max_m_s * seconds + NOISE_ALLOWANCE_M,
            StepLimit::Flow { max_m3_s } => {
                let geometry = tank.vessel.geometry();
                let height = geometry.height().si();
                // A gauge may be ranged past the tank; above the top or
                // below the bottom no more liquid moves.
                let volume = |h: f64| {
                    geometry
                        .volume(Length::metres(h.clamp(0.0, height)))
                        .map_or(f64::NAN, |v| v.si())
                };
                let moved = (volume(to_m) - volume(from_m)).abs();
                // A geometry that cannot say (it always can inside the
                // tank) lets the reading through rather than flag it.
                moved.is_nan() || moved <= max_m3_s * seconds
            }
        }
    }

    /// The limit in words, for the log.
    pub fn describe(&self) -> String {
        match self {
            StepLimit::Flow { max_m3_s } => format!("{:.2} m³/s in or out", max_m3_s),
            StepLimit::Rate { max_m_s } => format!("{max_m_s} m/s (max_rate_m_s)"),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    fn demo() -> crate::config::Config {
        crate::config::load(&Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"))
            .unwrap()
    }

    #[test]
    fn the_demo_tanks_flag_half_a_metre_in_a_second_and_pass_any_real_leak() {
        let config = demo();
        for tank in &config.tanks {
            let limit = StepLimit::for_tank(tank);
            let h = tank.vessel.geometry().height().si();
            let mid = h / 2.0;
            assert!(
                !limit.allows(tank, mid, mid - 0.5, 1.0),
                "{}: 0.5 m in 1 s passes ({})",
                tank.id,
                limit.describe()
            );
            assert!(!limit.allows(tank, mid, mid + 0.5, 1.0), "{}", tank.id);
            // Noise passes; so does the same step once enough time has gone.
            assert!(limit.allows(tank, mid, mid + 0.015, 0.1), "{}", tank.id);
            assert!(limit.allows(tank, mid, mid - 0.5, 30.0), "{}", tank.id);
            // A 100 mm hole at the bottom with Cd 1, at the level's fastest
            // (full), over a 1 s poll: Torricelli, dh/dt = (a/A) sqrt(2 g h)
            // for the upright tank; for every shape the volume it lets out
            // in a second, sqrt(2 g h) a, must pass from any level.
            let a = std::f64::consts::PI / 4.0 * 0.1 * 0.1;
            let out_per_s = a * (2.0 * G * h).sqrt();
            for i in 1..20 {
                let level = h * f64::from(i) / 20.0;
                let geometry = tank.vessel.geometry();
                let v = geometry.volume(Length::metres(level)).unwrap().si();
                let after = geometry
                    .level(crate::model::Volume::cubic_metres((v - out_per_s).max(0.0)))
                    .unwrap()
                    .si();
                assert!(
                    limit.allows(tank, level, after, 1.0),
                    "{} at {level} m: a 100 mm hole's second ({} m) flagged",
                    tank.id,
                    level - after
                );
            }
        }
        // The figure the module doc quotes for FF-T12.
        let StepLimit::Flow { max_m3_s } = StepLimit::for_tank(&config.tanks[0]) else {
            panic!("FF-T12 has no max_rate_m_s");
        };
        let area = std::f64::consts::PI / 4.0 * 9.0;
        assert!((max_m3_s - 2.5).abs() < 0.05, "{max_m3_s}");
        assert!((max_m3_s / area - 0.36).abs() < 0.01, "{}", max_m3_s / area);
    }

    #[test]
    fn a_configured_rate_replaces_the_flow_limit() {
        let mut config = demo();
        let tank = &mut config.tanks[0];
        tank.max_level_rate = Some(0.01);
        let limit = StepLimit::for_tank(tank);
        assert_eq!(limit, StepLimit::Rate { max_m_s: 0.01 });
        assert!(limit.allows(tank, 2.0, 2.025, 1.0)); // 1 cm/s plus the allowance
        assert!(!limit.allows(tank, 2.0, 2.05, 1.0));
        assert!(limit.allows(tank, 2.0, 2.05, 5.0));
    }
}
