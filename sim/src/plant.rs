//! The simulated plant: every tank's physics, the event script, and what the
//! sensors show, on one clock counted in physics steps.
//!
//! Time here is an integer number of steps, never the wall clock: the caller
//! says "advance to step n" and the plant applies the events due on the way,
//! integrates each tank, and hands back a truth row per tank every 100 ms of
//! simulated time. An event at `at_s` takes effect at the first step
//! boundary at or after it. Sensor readings are built from the true state
//! with noise keyed by the step, so they repeat exactly from run to run.
//!
//! Left out: sockets, the clock, files and logging (the `run` loop in
//! `lib.rs` does those), and the physics itself (`physics`).

use crate::noise::Noise;
use crate::physics::{self, Hole, Phase};
use crate::registers::{self, RegisterImage};
use crate::scenario::{Event, EventKind, Fault, Refusal, Scenario, SensorRole};
use leaktally::config::{Config, Tank as SiteTank};
use leaktally::model::PressureTap;
use std::time::Duration;

/// Simulated time between truth rows, ms.
pub const TRUTH_PERIOD_MS: u64 = 100;

/// One tank's true state at one moment: a row of the truth file.
#[derive(Debug, Clone, PartialEq)]
pub struct TruthRow {
    pub time_s: f64,
    /// Index into the site's tanks.
    pub tank: usize,
    pub level_m: f64,
    pub headspace_pa: f64,
    pub rate_kg_s: f64,
    pub released_kg: f64,
    pub transfer_m3_s: f64,
    pub leak_open: bool,
    /// Gas released through the hole so far, kg (zero in a held headspace).
    pub gas_released_kg: f64,
    /// The gas's mass flow through the hole now, kg/s.
    pub gas_rate_kg_s: f64,
    /// What the hole is open to: liquid, gas, or none (no hole).
    pub phase: Phase,
}

/// An event as it was applied, for the log.
#[derive(Debug, Clone, PartialEq)]
pub struct Applied {
    pub time_s: f64,
    pub event: Event,
}

struct PlantTank {
    physics: physics::Tank,
    level_noise_m: f64,
    pressure_noise_pa: f64,
    level_bias_m: f64,
    level_drift_m_per_h: f64,
    pressure_bias_pa: f64,
    temperature_k: f64,
    temperature_swing_k: f64,
    expansion_per_k: f64,
    faults: [Fault; 4],
    flag: bool,
}

/// The whole plant.
pub struct Plant {
    site: Config,
    step_ms: u64,
    steps: u64,
    next_row: u64,
    tanks: Vec<PlantTank>,
    /// The script with each event's step, in order; `next_event` is the
    /// first not yet applied.
    events: Vec<(u64, Event)>,
    next_event: usize,
    /// Per device: the step until which its link is down.
    link_down_until: Vec<u64>,
    /// Per device: the step until which it answers late, and how late.
    slow_until: Vec<(u64, Duration)>,
    /// Per device: the refusals in force, each with the step it ends at.
    refusals: Vec<Vec<(u64, Refusal)>>,
    /// Per device: the step until which its replies are miscounted, and by
    /// how many values.
    miscount_until: Vec<(u64, i16)>,
    noise: Noise,
}

impl Plant {
    pub fn new(scenario: &Scenario) -> Self {
        let tanks = scenario
            .site
            .tanks
            .iter()
            .zip(&scenario.tanks)
            .map(|(site, setup)| {
                let held = physics::Tank::new(
                    site.vessel.geometry().clone(),
                    site.vessel.density().si(),
                    setup.initial_level_m,
                    setup.headspace_pa,
                );
                PlantTank {
                    physics: match setup.ullage {
                        Some(spec) => held.with_gas_ullage(spec),
                        None => held,
                    },
                    level_noise_m: setup.level_noise_m,
                    pressure_noise_pa: setup.pressure_noise_pa,
                    level_bias_m: setup.level_bias_m,
                    level_drift_m_per_h: setup.level_drift_m_per_h,
                    pressure_bias_pa: setup.pressure_bias_pa,
                    temperature_k: setup.temperature_k,
                    temperature_swing_k: setup.temperature_swing_k,
                    expansion_per_k: setup.expansion_per_k,
                    faults: [Fault::None; 4],
                    flag: false,
                }
            })
            .collect();
        let step_ms = scenario.step_ms.max(1);
        let events = scenario
            .events
            .iter()
            .map(|e| (step_of(e.at_s, step_ms), e.clone()))
            .collect();
        Self {
            site: scenario.site.clone(),
            step_ms,
            steps: 0,
            next_row: 0,
            tanks,
            events,
            next_event: 0,
            link_down_until: vec![0; scenario.site.devices.len()],
            slow_until: vec![(0, Duration::ZERO); scenario.site.devices.len()],
            refusals: vec![Vec::new(); scenario.site.devices.len()],
            miscount_until: vec![(0, 0); scenario.site.devices.len()],
            noise: Noise::new(scenario.seed),
        }
    }

    pub fn site(&self) -> &Config {
        &self.site
    }

    /// Steps taken so far.
    pub fn steps(&self) -> u64 {
        self.steps
    }

    pub fn step_ms(&self) -> u64 {
        self.step_ms
    }

    /// Simulated seconds since the start.
    pub fn time_s(&self) -> f64 {
        self.time_of(self.steps)
    }

    fn time_of(&self, steps: u64) -> f64 {
        (steps * self.step_ms) as f64 / 1000.0
    }

    /// The true physics of a tank, for tests and the truth file.
    pub fn tank(&self, tank: usize) -> Option<&physics::Tank> {
        self.tanks.get(tank).map(|t| &t.physics)
    }

    /// Advances to step `target` (no-op if already there), appending the
    /// truth rows and applied events met on the way.
    pub fn advance_to(
        &mut self,
        target: u64,
        rows: &mut Vec<TruthRow>,
        applied: &mut Vec<Applied>,
    ) {
        let dt = self.step_ms as f64 / 1000.0;
        while self.steps < target {
            self.settle(rows, applied);
            for t in &mut self.tanks {
                t.physics.step(dt);
            }
            self.steps += 1;
        }
        self.settle(rows, applied);
    }

    /// Applies the events due at the present step and emits the truth rows
    /// if a row falls here. Calling it twice at one step does nothing more.
    fn settle(&mut self, rows: &mut Vec<TruthRow>, applied: &mut Vec<Applied>) {
        while let Some((at, event)) = self.events.get(self.next_event) {
            if *at > self.steps {
                break;
            }
            let event = event.clone();
            self.next_event += 1;
            self.apply(&event);
            applied.push(Applied {
                time_s: self.time_s(),
                event,
            });
        }
        if self.steps >= self.next_row {
            let time_s = self.time_s();
            for (index, t) in self.tanks.iter().enumerate() {
                let p = &t.physics;
                rows.push(TruthRow {
                    time_s,
                    tank: index,
                    level_m: p.level_m(),
                    headspace_pa: p.headspace_pa(),
                    rate_kg_s: p.leak_rate(),
                    released_kg: p.released_kg(),
                    transfer_m3_s: p.transfer_m3_s(),
                    leak_open: p.hole().is_some(),
                    gas_released_kg: p.gas_released_kg(),
                    gas_rate_kg_s: p.gas_rate(),
                    phase: p.phase(),
                });
            }
            self.next_row = self.steps + TRUTH_PERIOD_MS / self.step_ms;
        }
    }

    fn apply(&mut self, event: &Event) {
        match event.kind {
            EventKind::LeakOpens { tank, hole } => {
                if let Some(t) = self.tanks.get_mut(tank) {
                    t.physics.set_hole(Some(Hole {
                        diameter_m: hole.diameter_m,
                        height_m: hole.height_m,
                        cd: hole.cd,
                    }));
                }
            }
            EventKind::LeakCloses { tank } => {
                if let Some(t) = self.tanks.get_mut(tank) {
                    t.physics.set_hole(None);
                }
            }
            EventKind::TransferStarts { tank, flow_m3_s } => {
                if let Some(t) = self.tanks.get_mut(tank) {
                    t.physics.set_transfer(flow_m3_s);
                }
            }
            EventKind::TransferStops { tank } => {
                if let Some(t) = self.tanks.get_mut(tank) {
                    t.physics.set_transfer(0.0);
                }
            }
            EventKind::SensorFault {
                tank,
                sensor,
                fault,
            } => {
                if let Some(t) = self.tanks.get_mut(tank) {
                    t.faults[sensor.index()] = fault;
                }
            }
            EventKind::LinkDrops { device, duration_s } => {
                let until = self
                    .steps
                    .saturating_add((duration_s * 1000.0 / self.step_ms as f64).ceil() as u64);
                if let Some(d) = self.link_down_until.get_mut(device) {
                    // Overlapping drops extend, never shorten, the outage.
                    *d = (*d).max(until);
                }
            }
            EventKind::DeviceSlows {
                device,
                duration_s,
                reply_delay_ms,
            } => {
                let until = self
                    .steps
                    .saturating_add((duration_s * 1000.0 / self.step_ms as f64).ceil() as u64);
                if let Some(d) = self.slow_until.get_mut(device) {
                    // A later slow spell replaces the earlier one.
                    *d = (until, Duration::from_millis(reply_delay_ms));
                }
            }
            EventKind::Flag { tank, raised } => {
                if let Some(t) = self.tanks.get_mut(tank) {
                    t.flag = raised;
                }
            }
            EventKind::DeviceRefuses {
                device,
                duration_s,
                refusal,
            } => {
                let until = self.until(duration_s);
                if let Some(r) = self.refusals.get_mut(device) {
                    r.push((until, refusal));
                }
            }
            EventKind::DeviceMiscounts {
                device,
                duration_s,
                extra_values,
            } => {
                let until = self.until(duration_s);
                if let Some(d) = self.miscount_until.get_mut(device) {
                    *d = (until, extra_values);
                }
            }
        }
    }

    /// The step a spell of `duration_s` from now ends at; never without one.
    fn until(&self, duration_s: Option<f64>) -> u64 {
        duration_s.map_or(u64::MAX, |d| {
            self.steps
                .saturating_add((d * 1000.0 / self.step_ms as f64).ceil() as u64)
        })
    }

    /// The refusals in force now, per device.
    pub fn refusals(&self) -> Vec<Vec<Refusal>> {
        self.refusals
            .iter()
            .map(|r| {
                r.iter()
                    .filter(|(until, _)| self.steps < *until)
                    .map(|(_, refusal)| *refusal)
                    .collect()
            })
            .collect()
    }

    /// How many values each device's replies are off by now (0: none).
    pub fn miscounts(&self) -> Vec<i16> {
        self.miscount_until
            .iter()
            .map(|&(until, n)| if self.steps < until { n } else { 0 })
            .collect()
    }

    /// Whether each device's link is down now, index-aligned with the
    /// site's devices.
    pub fn links_down(&self) -> Vec<bool> {
        self.link_down_until
            .iter()
            .map(|&until| self.steps < until)
            .collect()
    }

    /// How late each device answers now (zero when it is not slowed),
    /// index-aligned with the site's devices.
    pub fn reply_delays(&self) -> Vec<Duration> {
        self.slow_until
            .iter()
            .map(|&(until, delay)| {
                if self.steps < until {
                    delay
                } else {
                    Duration::ZERO
                }
            })
            .collect()
    }

    /// Writes what every sensor shows now into the image. A stuck sensor's
    /// registers are left alone, so they keep the words they last had.
    pub fn write_registers(&self, image: &mut RegisterImage) {
        for (index, (site, t)) in self.site.tanks.iter().zip(&self.tanks).enumerate() {
            for role in SensorRole::ALL {
                let Some(sensor) = sensor_of(site, role) else {
                    continue;
                };
                let words = match t.faults[role.index()] {
                    Fault::Stuck => continue,
                    Fault::Garbage => registers::garbage(sensor),
                    Fault::Reads(value) => registers::encode(sensor, value),
                    Fault::None => registers::encode(sensor, self.reading(index, site, t, role)),
                };
                image.set_words(site.device, sensor.register, sensor.address, &words);
            }
            if let Some(flag) = site.leak_flag {
                image.set_bit(site.device, flag.kind, flag.address, t.flag);
            }
        }
    }

    /// The liquid's temperature less its mean now, K: a 24 h sinusoid of
    /// the tank's swing (peak to peak), rising from zero at the start.
    fn temperature_swing(&self, t: &PlantTank) -> f64 {
        0.5 * t.temperature_swing_k * (std::f64::consts::TAU * self.time_s() / 86_400.0).sin()
    }

    /// What a healthy sensor reads now, SI, noise included.
    fn reading(&self, index: usize, site: &SiteTank, t: &PlantTank, role: SensorRole) -> f64 {
        // One noise stream per (tank, sensor).
        let stream = (index as u64) << 8 | role.index() as u64;
        let p = &t.physics;
        match role {
            SensorRole::Level => {
                // Thermal expansion moves the surface by level * beta * dT
                // (exact for an upright tank, close for the others over the
                // few millimetres it amounts to); the mass, and so the
                // truth and the flow, is untouched.
                p.level_m() * (1.0 + t.expansion_per_k * self.temperature_swing(t))
                    + t.level_bias_m
                    + t.level_drift_m_per_h * self.time_s() / 3600.0
                    + self.noise.gaussian(t.level_noise_m, stream, self.steps)
            }
            SensorRole::Transfer => p.transfer_m3_s(),
            SensorRole::Temperature => t.temperature_k + self.temperature_swing(t),
            SensorRole::Pressure => {
                let Some(ps) = &site.pressure else {
                    return 0.0;
                };
                // A submerged transmitter also carries the liquid column above
                // its tap; a headspace one sees the vapour space only.
                let column = match ps.tap {
                    PressureTap::Headspace => 0.0,
                    PressureTap::Submerged { elevation } => {
                        p.density()
                            * physics::STANDARD_GRAVITY
                            * (p.level_m() - elevation.si()).max(0.0)
                    }
                };
                let gauge = p.headspace_pa()
                    + t.pressure_bias_pa
                    + column
                    + self.noise.gaussian(t.pressure_noise_pa, stream, self.steps);
                if ps.absolute {
                    gauge + self.site.ambient.si()
                } else {
                    gauge
                }
            }
        }
    }
}

fn sensor_of(tank: &SiteTank, role: SensorRole) -> Option<&leaktally::config::Sensor> {
    match role {
        SensorRole::Level => Some(&tank.level),
        SensorRole::Pressure => tank.pressure.as_ref().map(|p| &p.sensor),
        SensorRole::Transfer => tank.transfer.as_ref(),
        SensorRole::Temperature => tank.temperature.as_ref(),
    }
}

/// The first step at or after `at_s`. The small allowance keeps a time
/// such as 0.3 s, which is a hair above 300 ms in binary, on its step.
fn step_of(at_s: f64, step_ms: u64) -> u64 {
    (at_s * 1000.0 / step_ms as f64 - 1e-6).ceil().max(0.0) as u64
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario;
    use leaktally::registers::RegisterKind;
    use std::path::Path;

    fn scenario_with(events: &str) -> Scenario {
        let text = format!(
            r#"
site = "../../config/demo.toml"
seed = 7
[[tank]]
id = "FF-T12"
initial_level_m = 4.2
[[tank]]
id = "FF-T14"
initial_level_m = 1.6
headspace_kpa = 15.0
[[tank]]
id = "FF-T20"
initial_level_m = 5.1
{events}"#
        );
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/test.toml");
        scenario::parse(&text, &path).unwrap_or_else(|e| panic!("{e}"))
    }

    fn registers(
        plant: &Plant,
        device: usize,
        kind: RegisterKind,
        address: u16,
        count: u16,
    ) -> Vec<u16> {
        let mut image = RegisterImage::new(plant.site());
        plant.write_registers(&mut image);
        image.read_registers(device, kind, address, count).unwrap()
    }

    #[test]
    fn events_land_on_their_step_and_rows_every_100_ms() {
        let mut plant = Plant::new(&scenario_with(
            r#"
[[event]]
at_s = 0.3
action = "leak_opens"
tank = "FF-T12"
diameter_mm = 40
height_m = 0.3
[[event]]
at_s = 0.25
action = "link_drops"
device = "rtu-west"
duration_s = 0.5
"#,
        ));
        let (mut rows, mut applied) = (Vec::new(), Vec::new());
        plant.advance_to(50, &mut rows, &mut applied);
        let times: Vec<f64> = applied.iter().map(|a| a.time_s).collect();
        assert_eq!(times, [0.25, 0.3]);
        // Rows at 0.0, 0.1, ... 0.5 s for three tanks.
        assert_eq!(rows.len(), 18);
        let t12: Vec<&TruthRow> = rows.iter().filter(|r| r.tank == 0).collect();
        assert!(!t12[2].leak_open && t12[3].leak_open && t12[3].released_kg == 0.0);
        assert!(t12[4].released_kg > 0.0 && t12[4].level_m < 4.2);
        assert_eq!(plant.links_down(), [false, true]);
        plant.advance_to(75, &mut rows, &mut applied);
        assert_eq!(plant.links_down(), [false, false]);
        // Advancing to where it already is adds nothing.
        let n = rows.len();
        plant.advance_to(75, &mut rows, &mut applied);
        assert_eq!(rows.len(), n);
    }

    #[test]
    fn sensors_show_the_true_state_and_their_faults() {
        let mut plant = Plant::new(&scenario_with(
            r#"
[[event]]
at_s = 0.0
action = "transfer_starts"
tank = "FF-T12"
flow_m3_h = 36.0
[[event]]
at_s = 1.0
action = "sensor_sticks"
tank = "FF-T12"
sensor = "level"
[[event]]
at_s = 1.0
action = "sensor_garbage"
tank = "FF-T14"
sensor = "pressure"
[[event]]
at_s = 1.0
action = "raise_flag"
tank = "FF-T12"
"#,
        ));
        let (mut rows, mut applied) = (Vec::new(), Vec::new());
        plant.advance_to(1, &mut rows, &mut applied);
        // FF-T12 level: 4.2 m is 17440 counts; the transfer 36 m³/h is 3600 counts.
        let before = registers(&plant, 0, RegisterKind::Input, 0, 2);
        assert_eq!(before, [17_440, 3600]);
        // FF-T14: f32 gauge kPa in holding 12..13, low word first: 15 kPa.
        let words = registers(&plant, 0, RegisterKind::Holding, 12, 2);
        let kpa = f64::from(f32::from_bits(
            u32::from(words[1]) << 16 | u32::from(words[0]),
        ));
        assert!((kpa - 15.0).abs() < 1e-6, "{kpa}");
        // FF-T20: absolute kPa at a tap 0.2 m up under 4.9 m of gasoil.
        let t20 = registers(&plant, 1, RegisterKind::Holding, 2, 1)[0];
        let expected_kpa = (101_325.0 + 860.0 * physics::STANDARD_GRAVITY * 4.9) / 1000.0;
        let got_kpa = plant.site().tanks[2]
            .pressure
            .as_ref()
            .unwrap()
            .sensor
            .to_si(f64::from(t20))
            / 1000.0;
        assert!(
            (got_kpa - expected_kpa).abs() < 250.0 / 65_535.0,
            "{got_kpa} vs {expected_kpa}"
        );

        let mut image = RegisterImage::new(plant.site());
        plant.write_registers(&mut image);
        plant.advance_to(300, &mut rows, &mut applied);
        plant.write_registers(&mut image);
        // 36 m³/h into 7.07 m² raised the level 1.4 mm/s, but the register is stuck.
        assert!(plant.tank(0).unwrap().level_m() > 4.2 + 0.004);
        assert_eq!(
            image.read_registers(0, RegisterKind::Input, 0, 1).unwrap(),
            [17_440]
        );
        let words = image
            .read_registers(0, RegisterKind::Holding, 12, 2)
            .unwrap();
        assert!(f32::from_bits(u32::from(words[1]) << 16 | u32::from(words[0])).is_nan());
        assert_eq!(
            image
                .read_bits(0, leaktally::registers::BitKind::Coil, 0, 1)
                .unwrap(),
            [true]
        );
    }

    #[test]
    fn a_sensor_that_fails_to_a_value_shows_it_until_it_recovers() {
        let mut plant = Plant::new(&scenario_with(
            r#"
[[event]]
at_s = 0.5
action = "sensor_reads"
tank = "FF-T12"
sensor = "level"
value_si = 9.5
[[event]]
at_s = 1.0
action = "sensor_recovers"
tank = "FF-T12"
sensor = "level"
[[event]]
at_s = 0.2
action = "device_slows"
device = "rtu-east"
duration_s = 0.5
reply_delay_ms = 1500
"#,
        ));
        let (mut rows, mut applied) = (Vec::new(), Vec::new());
        let level_counts = |plant: &Plant| {
            let mut image = RegisterImage::new(plant.site());
            plant.write_registers(&mut image);
            image.read_registers(0, RegisterKind::Input, 0, 1).unwrap()[0]
        };
        plant.advance_to(60, &mut rows, &mut applied);
        // FF-T12's level is 4000..20000 counts for 0..5 m: 9.5 m is 34400
        // counts, past the transmitter's span.
        assert_eq!(level_counts(&plant), 34_400);
        assert_eq!(
            plant.reply_delays(),
            [Duration::from_millis(1500), Duration::ZERO]
        );
        plant.advance_to(100, &mut rows, &mut applied);
        assert_eq!(level_counts(&plant), 17_440);
        assert_eq!(plant.reply_delays(), [Duration::ZERO; 2]);
    }

    /// FF-T14 (1.6 m of methanol in a 2.5 m horizontal cylinder, nitrogen at
    /// 15 kPa) with a 25 mm hole at 2.2 m, above the surface: with a gas
    /// space it vents, the pressure falls and the transmitter shows it; held,
    /// as by default, nothing leaves.
    #[test]
    fn a_hole_above_the_surface_of_a_gas_space_releases_gas() {
        let run = |ullage: &str| {
            let text = format!(
                r#"
site = "../../config/demo.toml"
[[tank]]
id = "FF-T12"
initial_level_m = 4.2
[[tank]]
id = "FF-T14"
initial_level_m = 1.6
headspace_kpa = 15.0
{ullage}
[[tank]]
id = "FF-T20"
initial_level_m = 5.1
[[event]]
at_s = 0.5
action = "leak_opens"
tank = "FF-T14"
diameter_mm = 25
height_m = 2.2
"#
            );
            let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/test.toml");
            let mut plant =
                Plant::new(&scenario::parse(&text, &path).unwrap_or_else(|e| panic!("{e}")));
            let (mut rows, mut applied) = (Vec::new(), Vec::new());
            plant.advance_to(3000, &mut rows, &mut applied);
            let words = registers(&plant, 0, RegisterKind::Holding, 12, 2);
            let kpa = f64::from(f32::from_bits(
                u32::from(words[1]) << 16 | u32::from(words[0]),
            ));
            let t14: Vec<TruthRow> = rows.into_iter().filter(|r| r.tank == 1).collect();
            (t14, kpa, plant.tank(1).unwrap().ullage_m3())
        };

        let (rows, kpa, ullage) = run("ullage = \"gas\"");
        assert_eq!(rows.len(), 301);
        assert_eq!((rows[4].phase, rows[5].phase), (Phase::None, Phase::Gas));
        let last = rows.last().unwrap();
        assert!(
            last.gas_released_kg > 0.1 && last.gas_rate_kg_s > 0.0,
            "{last:?}"
        );
        assert!(
            rows.windows(2)
                .all(|w| w[1].gas_released_kg >= w[0].gas_released_kg)
        );
        assert!(last.headspace_pa < 14_000.0, "{}", last.headspace_pa);
        assert!((kpa - last.headspace_pa / 1000.0).abs() < 1e-3, "{kpa}");
        assert_eq!(
            (last.released_kg, last.rate_kg_s, last.level_m),
            (0.0, 0.0, 1.6)
        );
        // The gas that left is what the ullage lost by the gas law, at the
        // site's 28.01 g/mol and 15 °C (no blanket, isothermal).
        let lost = (rows[0].headspace_pa - last.headspace_pa) * ullage * 0.028_01
            / (physics::GAS_CONSTANT * 288.15);
        assert!(
            (last.gas_released_kg - lost).abs() < 1e-9 * lost,
            "{} vs {lost}",
            last.gas_released_kg
        );

        let (rows, kpa, _) = run("");
        let last = rows.last().unwrap();
        assert_eq!(last.phase, Phase::Gas);
        assert_eq!((last.gas_released_kg, last.gas_rate_kg_s), (0.0, 0.0));
        assert_eq!(last.headspace_pa, 15_000.0);
        assert!((kpa - 15.0).abs() < 1e-6);
    }

    /// The shipped vapour scenario: FF-T14's nitrogen vents through a hole
    /// above the liquid faster than its blanket can feed, and the pressure
    /// settles where the outflow equals the supply.
    #[test]
    fn the_vapour_scenario_vents_until_the_outflow_meets_the_blanket() {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/vapour.toml");
        let s = scenario::load(&path).unwrap_or_else(|e| panic!("{e}"));
        let supply = s.tanks[1].ullage.expect("a gas space").blanket_max_kg_s;
        let mut plant = Plant::new(&s);
        let (mut rows, mut applied) = (Vec::new(), Vec::new());
        plant.advance_to(100_000, &mut rows, &mut applied);
        let t14: Vec<&TruthRow> = rows.iter().filter(|r| r.tank == 1).collect();
        let opened = t14.iter().find(|r| r.phase == Phase::Gas).unwrap();
        assert!(
            opened.gas_rate_kg_s > 0.05 && opened.gas_rate_kg_s < 0.06,
            "{opened:?}"
        );
        let last = t14.last().unwrap();
        assert!(
            (last.gas_rate_kg_s - supply).abs() < 1e-3 * supply,
            "{} vs {supply}",
            last.gas_rate_kg_s
        );
        assert!(
            last.headspace_pa > 100.0 && last.headspace_pa < 300.0,
            "{last:?}"
        );
        assert_eq!((last.level_m, last.released_kg), (1.6, 0.0));
        let tank = plant.tank(1).unwrap();
        assert!(
            tank.gas_released_kg() > tank.gas_supplied_kg(),
            "the ullage lost gas"
        );

        assert!(
            rows.iter()
                .filter(|r| r.tank != 1)
                .all(|r| r.phase == Phase::None)
        );
    }

    #[test]
    fn the_level_breathes_with_the_temperature() {
        // 4.2 m of diesel (expansion 0.00083 per K) swinging 4 K peak to
        // peak: at 6 h the liquid is 2 K warm and the level 4.2 * 0.00083
        // * 2 = 6.97 mm up; at 18 h as far down; the temperature follows.
        let mut s = scenario_with("");
        s.tanks[0].temperature_swing_k = 4.0;
        s.tanks[0].expansion_per_k = 0.000_83;
        let mut plant = Plant::new(&s);
        let site = plant.site.tanks[0].clone();
        let mut at = |hours: f64| {
            let steps = (hours * 3_600_000.0 / plant.step_ms as f64) as u64;
            plant.advance_to(steps, &mut Vec::new(), &mut Vec::new());
            let t = &plant.tanks[0];
            (
                plant.reading(0, &site, t, SensorRole::Level),
                plant.reading(0, &site, t, SensorRole::Temperature) - t.temperature_k,
            )
        };
        let (up, warm) = at(6.0);
        let (down, cold) = at(18.0);
        assert!((up - 4.2 - 0.006_972).abs() < 1e-9, "{up}");
        assert!((down - 4.2 + 0.006_972).abs() < 1e-9, "{down}");
        assert!((warm - 2.0).abs() < 1e-9 && (cold + 2.0).abs() < 1e-9);
    }

    #[test]
    fn noise_repeats_with_the_seed_and_the_step() {
        let mut s = scenario_with("");
        s.tanks[0].level_noise_m = 0.01;
        let read = |steps: u64| {
            let mut plant = Plant::new(&s);
            plant.advance_to(steps, &mut Vec::new(), &mut Vec::new());
            registers(&plant, 0, RegisterKind::Input, 0, 1)[0]
        };
        assert_eq!(read(17), read(17));
        let spread: std::collections::HashSet<u16> = (0..20).map(read).collect();
        assert!(spread.len() > 5, "{spread:?}");
    }
}
