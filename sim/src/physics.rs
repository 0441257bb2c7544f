//! The true physics of one tank: its level under a leak and a pump transfer,
//! and the mass the leak has released, advanced in fixed time steps.
//!
//! This is the ground truth the agent's estimator is tested against, so it is
//! written independently of the agent's `model::orifice`, `tally` and
//! `forecast`: only the tank geometry (level, volume, surface area) is
//! shared, because both sides must describe the same tank. The hole follows
//! the orifice equation of the fluid-mechanics handbooks,
//!
//! ```text
//! m_dot = Cd A sqrt(2 rho dP),  dP = p_headspace_gauge + rho g (h - z_hole),
//! ```
//!
//! with no flow when the surface is at or below the hole or dP <= 0. The
//! level obeys dh/dt = (q_transfer - m_dot / rho) / A_s(h), integrated with
//! the classic fourth-order Runge–Kutta method; the released mass is carried
//! as a second state variable through the same stages, so it gets the same
//! accuracy instead of a cruder "rate now x dt".
//!
//! Pure: no I/O, no clock, no noise. Left out: vapour flowing out of a hole
//! above the surface (the simulator models a liquid leak only), a headspace
//! pressure that changes as the level falls (it is held at its set point, as
//! a blanket regulator or an open vent would), temperature, and overflow: a
//! level pushed past the top by a pump is clamped there and the excess is
//! not tracked, as is a pump drawing from an empty tank.

use leaktally::model::{Geometry, Length};

/// Standard gravity, m/s², by definition (3rd CGPM, 1901). Written out here
/// rather than taken from the agent so the ground truth shares nothing with
/// the model it checks but the tank's shape.
pub const STANDARD_GRAVITY: f64 = 9.806_65;

/// The largest level change one RK4 step may make, m. A normal step moves
/// the surface by hundredths of a millimetre; near the bottom of a sphere or
/// horizontal cylinder the surface area tends to zero and the level would
/// move fast, so a step is split until each piece stays under this.
const MAX_DH_M: f64 = 0.5e-3;

/// Cap on the split, so a pathological input costs bounded time.
const MAX_SUBSTEPS: f64 = 4096.0;

/// A hole in the tank wall, SI.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Hole {
    pub diameter_m: f64,
    /// Height above the tank bottom.
    pub height_m: f64,
    pub cd: f64,
}

impl Hole {
    pub fn area_m2(&self) -> f64 {
        std::f64::consts::PI * self.diameter_m * self.diameter_m / 4.0
    }
}

/// One tank's true state.
#[derive(Debug, Clone)]
pub struct Tank {
    geometry: Geometry,
    top_m: f64,
    /// Smallest surface area used in dh/dt, m², so a sphere or horizontal
    /// cylinder at its very bottom or top (area zero) stays finite.
    area_floor_m2: f64,
    density: f64,
    headspace_pa: f64,
    level_m: f64,
    released_kg: f64,
    transferred_m3: f64,
    hole: Option<Hole>,
    transfer_m3_s: f64,
}

impl Tank {
    /// A tank at `level_m` with its headspace held at `headspace_pa` gauge.
    /// The level is clamped into the tank (the scenario checks it).
    pub fn new(geometry: Geometry, density_kg_m3: f64, level_m: f64, headspace_pa: f64) -> Self {
        let top_m = geometry.height().si();
        // A ten-thousandth of the mean cross-section: far below any area the
        // tank has away from its extremes, big enough to keep dh/dt finite.
        let area_floor_m2 = (geometry.capacity().si() / top_m * 1e-4).max(f64::MIN_POSITIVE);
        Self {
            geometry,
            top_m,
            area_floor_m2,
            density: density_kg_m3,
            headspace_pa,
            level_m: level_m.clamp(0.0, top_m),
            released_kg: 0.0,
            transferred_m3: 0.0,
            hole: None,
            transfer_m3_s: 0.0,
        }
    }

    pub fn level_m(&self) -> f64 {
        self.level_m
    }

    pub fn headspace_pa(&self) -> f64 {
        self.headspace_pa
    }

    pub fn density(&self) -> f64 {
        self.density
    }

    /// Mass released through the hole so far.
    pub fn released_kg(&self) -> f64 {
        self.released_kg
    }

    /// Net volume moved in by the pump so far (negative out).
    pub fn transferred_m3(&self) -> f64 {
        self.transferred_m3
    }

    pub fn hole(&self) -> Option<Hole> {
        self.hole
    }

    pub fn set_hole(&mut self, hole: Option<Hole>) {
        self.hole = hole;
    }

    /// Net pump flow into the tank, m³/s.
    pub fn transfer_m3_s(&self) -> f64 {
        self.transfer_m3_s
    }

    pub fn set_transfer(&mut self, flow_m3_s: f64) {
        self.transfer_m3_s = flow_m3_s;
    }

    /// The liquid volume at a level, m³ (clamped into the tank).
    pub fn volume_at(&self, level_m: f64) -> f64 {
        let h = level_m.clamp(0.0, self.top_m);
        self.geometry
            .volume(Length::metres(h))
            .map_or(0.0, |v| v.si())
    }

    /// The leak's mass flow now, kg/s.
    pub fn leak_rate(&self) -> f64 {
        self.leak_rate_at(self.level_m)
    }

    /// The orifice equation at level `h`, kg/s.
    pub fn leak_rate_at(&self, h: f64) -> f64 {
        let Some(hole) = self.hole else {
            return 0.0;
        };
        if h <= hole.height_m {
            return 0.0;
        }
        let dp = self.headspace_pa + self.density * STANDARD_GRAVITY * (h - hole.height_m);
        if dp <= 0.0 {
            return 0.0;
        }
        hole.cd * hole.area_m2() * (2.0 * self.density * dp).sqrt()
    }

    /// Advances the tank by `dt` seconds.
    pub fn step(&mut self, dt: f64) {
        if dt.is_nan() || dt <= 0.0 {
            return;
        }
        let (rate, _) = self.derivative(self.level_m);
        let pieces = (rate.abs() * dt / MAX_DH_M).ceil().clamp(1.0, MAX_SUBSTEPS);
        let h = dt / pieces;
        for _ in 0..pieces as u32 {
            self.rk4(h);
        }
    }

    /// (dh/dt, leak mass flow) at level `h`.
    fn derivative(&self, h: f64) -> (f64, f64) {
        let h = h.clamp(0.0, self.top_m);
        let leak = self.leak_rate_at(h);
        let area = self
            .geometry
            .surface_area(Length::metres(h))
            .map_or(0.0, |a| a.si())
            .max(self.area_floor_m2);
        ((self.transfer_m3_s - leak / self.density) / area, leak)
    }

    fn rk4(&mut self, dt: f64) {
        let h0 = self.level_m;
        let (d1, m1) = self.derivative(h0);
        let (d2, m2) = self.derivative(h0 + 0.5 * dt * d1);
        let (d3, m3) = self.derivative(h0 + 0.5 * dt * d2);
        let (d4, m4) = self.derivative(h0 + dt * d3);
        let mut h1 = h0 + dt / 6.0 * (d1 + 2.0 * d2 + 2.0 * d3 + d4);
        let mut released = dt / 6.0 * (m1 + 2.0 * m2 + 2.0 * m3 + m4);

        // The leak alone cannot take the surface below the hole: the true
        // solution stops there (in finite time, with an infinite slope of the
        // square root). A step that overshoots is cut back to the hole, and
        // the mass of the overshoot, which never left, is taken off again, so
        // mass stays conserved. With a pump drawing out the surface may
        // legitimately pass the hole, and the step stands.
        if let Some(hole) = self.hole
            && self.transfer_m3_s >= 0.0
            && h0 >= hole.height_m
            && h1 < hole.height_m
        {
            let overshoot = self.density * (self.volume_at(hole.height_m) - self.volume_at(h1));
            released = (released - overshoot).max(0.0);
            h1 = hole.height_m;
        }

        self.level_m = h1.clamp(0.0, self.top_m);
        self.released_kg += released.max(0.0);
        self.transferred_m3 += self.transfer_m3_s * dt;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use leaktally::model::Heads;

    fn cylinder(diameter: f64, height: f64) -> Geometry {
        Geometry::vertical_cylinder(Length::metres(diameter), Length::metres(height)).unwrap()
    }

    /// Runs `tank` for `seconds` in steps of `dt`.
    fn run(tank: &mut Tank, seconds: f64, dt: f64) {
        for _ in 0..(seconds / dt).round() as u64 {
            tank.step(dt);
        }
    }

    /// Torricelli draining of a vertical cylinder with an open vent, the
    /// analytic solution of dh/dt = -(Cd a / A) sqrt(2 g (h - z)):
    ///
    ///   sqrt(h - z) = sqrt(h0 - z) - (Cd a / A) sqrt(g / 2) t,
    ///
    /// until the surface reaches the hole. Source: Torricelli's law
    /// integrated for a draining tank, the check value named in the design
    /// brief (DESIGN.md section 2) and the quasi-steady draining-tank example
    /// of the fluid-mechanics textbooks (recalled from memory; it follows
    /// from separating variables in the ODE above). The released mass is
    /// rho A (h0 - h).
    fn torricelli_released(d_tank: f64, h0: f64, hole: Hole, rho: f64, t: f64) -> f64 {
        let area = std::f64::consts::PI * d_tank * d_tank / 4.0;
        let k = hole.cd * hole.area_m2() / area * (STANDARD_GRAVITY / 2.0).sqrt();
        let root = ((h0 - hole.height_m).sqrt() - k * t).max(0.0);
        let h = hole.height_m + root * root;
        rho * area * (h0 - h)
    }

    /// One Torricelli check: a vertical cylinder with an open vent.
    struct Draining {
        tank_diameter_m: f64,
        tank_height_m: f64,
        start_level_m: f64,
        hole: Hole,
        density: f64,
        checked_at_s: &'static [f64],
    }

    #[test]
    fn draining_matches_torricelli_to_a_millionth() {
        // The second tank reaches its hole after about 214 s, so its last
        // checks sit just before and well past the stop.
        let cases = [
            Draining {
                tank_diameter_m: 3.0,
                tank_height_m: 5.0,
                start_level_m: 4.2,
                hole: Hole {
                    diameter_m: 0.040,
                    height_m: 0.3,
                    cd: 0.61,
                },
                density: 840.0,
                checked_at_s: &[10.0, 60.0, 300.0],
            },
            Draining {
                tank_diameter_m: 1.0,
                tank_height_m: 2.0,
                start_level_m: 1.5,
                hole: Hole {
                    diameter_m: 0.050,
                    height_m: 0.1,
                    cd: 1.0,
                },
                density: 1000.0,
                checked_at_s: &[30.0, 120.0, 200.0, 400.0],
            },
        ];
        let dt = 0.010;
        let mut worst: f64 = 0.0;
        for c in &cases {
            let (d, h0, hole, rho) = (c.tank_diameter_m, c.start_level_m, c.hole, c.density);
            let mut tank = Tank::new(cylinder(d, c.tank_height_m), rho, h0, 0.0);
            tank.set_hole(Some(hole));
            let mut now = 0.0;
            for &t in c.checked_at_s {
                run(&mut tank, t - now, dt);
                now = t;
                let expected = torricelli_released(d, h0, hole, rho, t);
                let rel = (tank.released_kg() - expected).abs() / expected;
                worst = worst.max(rel);
                assert!(
                    rel < 1e-6,
                    "d={d} t={t}: {} kg vs {expected} kg ({rel:e})",
                    tank.released_kg()
                );
            }
        }
        eprintln!("worst relative error against Torricelli: {worst:e}");
    }

    #[test]
    fn mass_is_conserved_with_a_transfer_and_odd_geometry() {
        // Level, volume and released mass must balance: rho (V0 - V1) plus the
        // mass pumped in equals the mass out of the hole. A horizontal
        // cylinder and a sphere exercise a surface area that changes with
        // level; the strapping table one with jumps.
        let geometries = [
            Geometry::horizontal_cylinder(
                Length::metres(2.5),
                Length::metres(8.0),
                Heads::Ellipsoidal {
                    depth: Length::metres(0.625),
                },
            )
            .unwrap(),
            Geometry::sphere(Length::metres(4.0)).unwrap(),
            Geometry::calibration_table(&[
                (
                    Length::metres(0.0),
                    leaktally::model::Volume::cubic_metres(0.4),
                ),
                (
                    Length::metres(1.0),
                    leaktally::model::Volume::cubic_metres(29.6),
                ),
                (
                    Length::metres(4.0),
                    leaktally::model::Volume::cubic_metres(118.9),
                ),
            ])
            .unwrap(),
        ];
        for geometry in geometries {
            let rho = 792.0;
            let mut tank = Tank::new(geometry, rho, 1.6, 15_000.0);
            let v0 = tank.volume_at(1.6);
            tank.set_hole(Some(Hole {
                diameter_m: 0.030,
                height_m: 0.2,
                cd: 0.61,
            }));
            tank.set_transfer(5.0 / 3600.0);
            run(&mut tank, 120.0, 0.01);
            tank.set_transfer(-20.0 / 3600.0);
            run(&mut tank, 60.0, 0.01);
            let v1 = tank.volume_at(tank.level_m());
            let balance = rho * (v0 - v1 + tank.transferred_m3());
            let rel = (tank.released_kg() - balance).abs() / tank.released_kg();
            assert!(tank.released_kg() > 100.0, "{}", tank.released_kg());
            assert!(
                rel < 1e-6,
                "released {} kg, balance {balance} kg ({rel:e})",
                tank.released_kg()
            );
        }
    }

    #[test]
    fn no_flow_at_or_below_the_hole_or_under_vacuum() {
        let mut tank = Tank::new(cylinder(2.0, 3.0), 1000.0, 0.5, 0.0);
        assert_eq!(tank.leak_rate(), 0.0, "no hole, no flow");
        tank.set_hole(Some(Hole {
            diameter_m: 0.02,
            height_m: 0.5,
            cd: 0.61,
        }));
        assert_eq!(tank.leak_rate(), 0.0, "surface at the hole");
        run(&mut tank, 10.0, 0.01);
        assert_eq!((tank.level_m(), tank.released_kg()), (0.5, 0.0));
        // A headspace 5 kPa under ambient holds up about 0.5 m of water.
        let mut tank = Tank::new(cylinder(2.0, 3.0), 1000.0, 1.5, -5_000.0);
        tank.set_hole(Some(Hole {
            diameter_m: 0.05,
            height_m: 0.5,
            cd: 0.61,
        }));
        assert!(tank.leak_rate() > 0.0);
        run(&mut tank, 2000.0, 0.01);
        let stop = 0.5 + 5_000.0 / (1000.0 * STANDARD_GRAVITY);
        assert!(
            (tank.level_m() - stop).abs() < 1e-4,
            "{} vs {stop}",
            tank.level_m()
        );
    }

    #[test]
    fn a_sphere_drains_to_its_bottom_and_fills_from_it_without_blowing_up() {
        let sphere = Geometry::sphere(Length::metres(2.0)).unwrap();
        let mut tank = Tank::new(sphere.clone(), 1000.0, 0.3, 0.0);
        tank.set_hole(Some(Hole {
            diameter_m: 0.05,
            height_m: 0.0,
            cd: 0.61,
        }));
        run(&mut tank, 600.0, 0.01);
        assert!(
            tank.level_m() >= 0.0 && tank.level_m() < 1e-3,
            "{}",
            tank.level_m()
        );
        let v0 = tank.volume_at(0.3);
        assert!((tank.released_kg() - 1000.0 * v0).abs() / (1000.0 * v0) < 1e-3);

        let mut tank = Tank::new(sphere, 1000.0, 0.0, 0.0);
        tank.set_transfer(36.0 / 3600.0);
        run(&mut tank, 10.0, 0.01);
        let v = tank.volume_at(tank.level_m());
        assert!(
            tank.level_m().is_finite() && (v - 0.1).abs() < 1e-4,
            "{} m, {v} m³",
            tank.level_m()
        );
    }
}
