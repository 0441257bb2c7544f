//! Honest bands, measured: does the band hold the truth?
//!
//! Each run plays an invented leak on the simulator's plant in simulated
//! time (its physics is checked against the analytic Torricelli solution in
//! sim/src/physics.rs), with gauge noise, a fixed gauge offset and a drift
//! drawn within the level gauge's stated accuracy, a true Cd drawn from the
//! common-practice range 0.61 to 1.0, and a hole size drawn too. The plant's
//! registers are decoded as the agent decodes them (`acquire::poller::flag`)
//! and fed to the event estimator at 1 Hz; the simulator's released mass is
//! the truth. The band must hold the truth in at least 95 % of the runs at
//! every whole minute and at the final sample, for a given hole and for a
//! fitted one. The figures print with `--nocapture`; BENCHMARKS.md has them.
//!
//! No processes or sockets: the Modbus path is tested end to end elsewhere
//! (acquisition, interop), and an hour of simulated time runs in a moment
//! here, where it would take an hour of wall time through the daemon.

use crate::util::{Draw, ScenarioBuilder, ScenarioTank, Scratch};
use leaktally::acquire::poller::flag;
use leaktally::acquire::sample::TankSample;
use leaktally::estimate::{Estimate, LeakParams, Method, Reason, Warning};
use leaktally::estimator::Estimator;
use leaktally_sim::plant::Plant;
use leaktally_sim::registers::RegisterImage;
use std::path::Path;

/// An invented upright tank: 3 m across, 5 m tall, diesel, an open vent, a
/// 4-20 mA level gauge of stated accuracy ±4 mm quantised to 0.3 mm.
const SITE: &str = r#"[site]
name = "Band check (invented)"
[[device]]
id = "rtu"
address = "127.0.0.1:1"
[[tank]]
id = "BC-1"
device = "rtu"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0, reportable_kg = [500.0] }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m", accuracy_mm = 4.0 }
"#;

/// The same tank blanketed (20 kPa gauge of nitrogen, the hole under the
/// liquid feeling it), with a headspace pressure transmitter of stated
/// accuracy ±0.5 kPa: its noise and a fixed offset within that accuracy
/// go into the flow through the hole, so the band must carry them.
const BLANKETED_SITE: &str = r#"[site]
name = "Band check, blanketed (invented)"
[[device]]
id = "rtu"
address = "127.0.0.1:1"
[[tank]]
id = "BC-1"
device = "rtu"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0, reportable_kg = [500.0] }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m", accuracy_mm = 4.0 }
pressure = { register = "holding", address = 10, type = "f32", range = [-10.0, 100.0], unit = "kPa", reference = "gauge", accuracy_kpa = 0.5 }
"#;

/// The blanket's pressure and the transmitter's stated accuracy, Pa.
const BLANKET_PA: f64 = 20_000.0;
const PRESSURE_ACCURACY_PA: f64 = 500.0;

/// The gauge's stated accuracy, m (the site above).
const ACCURACY_M: f64 = 0.004;
/// When the hole opens and the event starts, s of simulated time.
const LEAK_AT_S: f64 = 10.0;

/// One run's invented conditions.
#[derive(Debug, Clone, Copy)]
struct Conditions {
    seed: u64,
    initial_level_m: f64,
    hole_mm: Option<f64>,
    cd: f64,
    noise_m: f64,
    bias_m: f64,
    drift_m_per_h: f64,
    seconds: u32,
    /// The hole the operator gives, as a multiple of the true one (1 for
    /// the right size).
    given_factor: f64,
    /// When the leak stops (plugged, isolated), s after it opened.
    stops_after_s: Option<f64>,
    /// A blanketed tank: the pressure transmitter's noise and fixed
    /// offset, Pa.
    blanket: Option<(f64, f64)>,
}

impl Conditions {
    /// Draws a run: noise 0.5 to 2 mm, an offset within half the accuracy,
    /// and a drift that keeps offset plus drift within the accuracy over
    /// the run.
    fn draw(seed: u64, seconds: u32, leak: bool) -> Self {
        let mut d = Draw(seed.wrapping_mul(0xA076_1D64_78BD_642F));
        let bias = d.uniform(-0.5, 0.5) * ACCURACY_M;
        let room = (ACCURACY_M - bias.abs()) * 0.9;
        let hours = f64::from(seconds) / 3600.0;
        Self {
            seed,
            initial_level_m: d.uniform(3.0, 4.6),
            hole_mm: leak.then(|| d.uniform(15.0, 60.0)),
            cd: d.uniform(0.61, 0.95),
            noise_m: d.uniform(0.0005, 0.002),
            bias_m: bias,
            drift_m_per_h: d.uniform(-1.0, 1.0) * room / hours,
            seconds,
            given_factor: 1.0,
            stops_after_s: None,
            blanket: None,
        }
    }

    /// As [`Conditions::draw`], on the blanketed tank: pressure noise 20 to
    /// 200 Pa and an offset within half the stated accuracy.
    fn draw_blanketed(seed: u64, seconds: u32) -> Self {
        let mut c = Self::draw(seed, seconds, true);
        let mut d = Draw(seed ^ 0x2545_F491_4F6C_DD1D);
        c.blanket = Some((
            d.uniform(20.0, 200.0),
            d.uniform(-0.5, 0.5) * PRESSURE_ACCURACY_PA,
        ));
        c
    }

    fn site(&self) -> &'static str {
        if self.blanket.is_some() {
            BLANKETED_SITE
        } else {
            SITE
        }
    }

    /// As [`Conditions::draw`], with what goes wrong in a real event: the
    /// operator's hole size off by up to 40 % either way, and in about a
    /// third of the runs the leak stopping part-way.
    fn draw_hard(seed: u64, seconds: u32) -> Self {
        let mut c = Self::draw(seed, seconds, true);
        let mut d = Draw(seed ^ 0x5851_F42D_4C95_7F2D);
        c.given_factor = d.uniform(0.7, 1.4);
        if d.uniform(0.0, 1.0) < 0.33 {
            c.stops_after_s = Some(d.uniform(0.2, 0.8) * f64::from(seconds));
        }
        c
    }

    fn scenario(&self) -> String {
        let mut tank = ScenarioTank::new("BC-1", self.initial_level_m)
            .level_noise_m(self.noise_m)
            .level_bias_m(self.bias_m)
            .level_drift_m_per_h(self.drift_m_per_h);
        if let Some((noise, bias)) = self.blanket {
            tank = tank
                .headspace_kpa(BLANKET_PA / 1000.0)
                .pressure_noise_pa(noise)
                .pressure_bias_pa(bias);
        }
        let mut scenario = ScenarioBuilder::for_site(Path::new("site.toml"))
            .step_ms(100)
            .seed(self.seed)
            .tank(tank);
        if let Some(mm) = self.hole_mm {
            scenario = scenario.leak_opens(LEAK_AT_S, "BC-1", mm, 0.3, self.cd);
        }
        if let Some(after) = self.stops_after_s {
            scenario = scenario.leak_closes(LEAK_AT_S + after, "BC-1");
        }
        scenario.text()
    }
}

/// One estimate beside the truth at its sample.
struct Point {
    after_s: f64,
    estimate: Estimate,
    truth_kg: f64,
}

/// Plays a run and feeds the estimator; `given` says whether the operator
/// gives the true hole diameter (else it is fitted).
fn simulate(scratch: &Scratch, c: &Conditions, given: bool) -> Vec<Point> {
    scratch.write("site.toml", c.site());
    let path = scratch.write(&format!("run-{}.toml", c.seed), &c.scenario());
    let scenario = leaktally_sim::scenario::parse(&c.scenario(), &path).expect("a valid scenario");
    let tank = scenario.site.tanks[0].clone();
    let mut plant = Plant::new(&scenario);
    let mut image = RegisterImage::new(&scenario.site);
    let params = LeakParams {
        hole_diameter_m: if given {
            c.hole_mm.map(|mm| c.given_factor * mm / 1000.0)
        } else {
            None
        },
        hole_height_m: 0.3,
        hole_height_assumed: false,
        ..LeakParams::default()
    };
    let start_ms = (LEAK_AT_S * 1000.0) as i64;
    let mut estimator = Estimator::new(&tank, params, start_ms, 1000).unwrap();
    let (mut rows, mut applied) = (Vec::new(), Vec::new());
    let mut released_at_start = None;
    let mut out = Vec::new();
    // Samples from 5 s before the start, so the start can be interpolated.
    for second in 5..=(LEAK_AT_S as u32 + c.seconds) {
        let at_ms = i64::from(second) * 1000;
        plant.advance_to(at_ms as u64 / plant.step_ms(), &mut rows, &mut applied);
        rows.clear();
        plant.write_registers(&mut image);
        let words = image
            .read_registers(
                tank.device,
                tank.level.register,
                tank.level.address,
                tank.level.data_type.width(),
            )
            .unwrap();
        let pressure = tank.pressure.as_ref().map(|p| {
            let words = image
                .read_registers(
                    tank.device,
                    p.sensor.register,
                    p.sensor.address,
                    p.sensor.data_type.width(),
                )
                .unwrap();
            flag(&p.sensor, &words, false)
        });
        let sample = TankSample {
            tank: 0,
            tank_id: tank.id.as_str().into(),
            at_ms,
            level: flag(&tank.level, &words, false),
            pressure,
            transfer: None,
            temperature: None,
            leak_flag: None,
        };
        let released = plant.tank(0).unwrap().released_kg();
        if at_ms >= start_ms {
            released_at_start.get_or_insert(released);
        }
        if let Some(estimate) = estimator.push_and_estimate(&sample) {
            out.push(Point {
                after_s: (at_ms - start_ms) as f64 / 1000.0,
                estimate,
                truth_kg: released - released_at_start.unwrap_or(released),
            });
        }
    }
    out
}

fn covers(p: &Point) -> bool {
    let e = &p.estimate;
    let slack = 1e-9 * p.truth_kg.abs().max(1.0);
    e.released_low_kg - slack <= p.truth_kg && p.truth_kg <= e.released_high_kg + slack
}

fn median(mut xs: Vec<f64>) -> f64 {
    xs.sort_by(f64::total_cmp);
    xs[xs.len() / 2]
}

/// Runs `runs` seeded leaks and checks the coverage at every whole minute
/// and at the final sample.
fn coverage(label: &str, given: bool, hard: bool, runs: u64) {
    coverage_of(label, given, hard, runs, |seed, seconds| {
        if hard {
            Conditions::draw_hard(seed, seconds)
        } else {
            Conditions::draw(seed, seconds, true)
        }
    });
}

fn coverage_of(
    label: &str,
    given: bool,
    hard: bool,
    runs: u64,
    draw: impl Fn(u64, u32) -> Conditions,
) {
    let scratch = Scratch::new("bands");
    let seconds = 600;
    let draw = |seed| draw(seed, seconds);
    let results: Vec<Vec<Point>> = (1..=runs)
        .map(|seed| simulate(&scratch, &draw(seed), given))
        .collect();
    let checkpoints: Vec<f64> = (1..=seconds / 60).map(|m| f64::from(m * 60)).collect();
    let mut worst = (f64::INFINITY, 0.0);
    for &t in &checkpoints {
        let covered = results
            .iter()
            .filter(|run| run.iter().find(|p| p.after_s >= t).is_some_and(covers))
            .count();
        let share = covered as f64 / runs as f64;
        if share < worst.0 {
            worst = (share, t);
        }
        assert!(
            share >= 0.95,
            "{label}: the band held the truth in {covered} of {runs} runs at {t} s"
        );
    }
    let finals: Vec<&Point> = results.iter().map(|r| r.last().unwrap()).collect();
    let covered = finals.iter().filter(|p| covers(p)).count();
    assert!(
        covered as f64 >= 0.95 * runs as f64,
        "{label}: the band held the truth at the final sample in {covered} of {runs} runs"
    );
    let width = median(
        finals
            .iter()
            .map(|p| (p.estimate.released_high_kg - p.estimate.released_low_kg) / p.truth_kg)
            .collect(),
    );
    let error = median(
        finals
            .iter()
            .map(|p| (p.estimate.released_best_kg - p.truth_kg).abs() / p.truth_kg)
            .collect(),
    );
    for p in finals.iter().filter(|_| !hard) {
        let method = p.estimate.method;
        assert!(
            if given {
                method == Method::OrificeGivenHole
            } else {
                method == Method::FittedHole
            },
            "{label}: {method:?} at the end"
        );
    }
    println!(
        "bands, {label}: {runs} runs of {seconds} s; covered at the final sample in {covered} of {runs}; \
         lowest coverage at a whole minute {:.0} % (at {} s); median band width {:.2} % of the truth; \
         median error of the best figure {:.3} %",
        100.0 * worst.0,
        worst.1,
        100.0 * width,
        100.0 * error
    );
}

/// Issue 14: the band holds the truth, with the hole given (its Cd not).
#[test]
fn the_band_holds_the_truth_with_a_given_hole() {
    coverage("given hole", true, false, 100);
}

/// Issue 14: the band holds the truth on a blanketed tank, whose flow
/// depends on the headspace pressure: the transmitter's noise and offset
/// within its stated accuracy, the hole given and fitted.
#[test]
fn the_band_holds_the_truth_on_a_blanketed_tank() {
    coverage_of(
        "blanketed, given hole",
        true,
        false,
        100,
        Conditions::draw_blanketed,
    );
    coverage_of(
        "blanketed, fitted hole",
        false,
        false,
        100,
        Conditions::draw_blanketed,
    );
}

/// Issue 14: the band holds the truth, with the hole fitted.
#[test]
fn the_band_holds_the_truth_with_a_fitted_hole() {
    coverage("fitted hole", false, false, 100);
}

/// Issues 11 and 14: the band holds the truth when the operator's hole
/// size is wrong by up to 40 %, and when the leak stops part-way (plugged,
/// isolated) while the model would run on.
#[test]
fn the_band_holds_the_truth_when_the_hole_is_guessed_or_the_leak_stops() {
    coverage("a guessed hole, some leaks stopping", true, true, 100);
    coverage("a fitted hole, some leaks stopping", false, true, 100);
}

/// Issue 14: no leak, no release. An event on a tank that is not leaking,
/// for an hour of simulated time, over a gauge with noise and a slow drift:
/// the best figure stays near zero, the band holds zero throughout, and the
/// estimate says no loss is seen.
#[test]
fn an_hour_on_a_tank_that_is_not_leaking_shows_no_release() {
    let scratch = Scratch::new("bands-no-leak");
    for seed in [7, 8] {
        let c = Conditions::draw(seed, 3600, false);
        let points = simulate(&scratch, &c, false);
        assert!(points.len() > 3500);
        let mut highest: f64 = 0.0;
        for p in &points {
            let e = &p.estimate;
            assert_eq!(p.truth_kg, 0.0);
            assert_eq!(e.released_low_kg, 0.0, "{} s: {e:?}", p.after_s);
            assert!(
                e.released_best_kg <= 0.5 * e.band.inventory_kg,
                "{} s: {e:?}",
                p.after_s
            );
            highest = highest.max(e.released_best_kg);
        }
        let last = &points.last().unwrap().estimate;
        assert_eq!(last.reason, Reason::NoLossSeen, "{last:?}");
        assert!(last.warnings.contains(Warning::NoLossSeen));
        println!(
            "no leak, seed {seed}: drift {:.1} mm over the hour, offset {:.1} mm; the best figure never above {highest:.1} kg, band ±{:.0} kg",
            c.drift_m_per_h * 1000.0,
            c.bias_m * 1000.0,
            last.band.inventory_kg
        );
    }
}
