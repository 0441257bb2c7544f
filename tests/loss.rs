//! The suspected-loss watch, measured on the simulator: false alarms over
//! simulated days of noisy, pumped, temperature-swinging tanks with no
//! leak, and the time to detect a 5, 10 and 25 mm hole.
//!
//! Each run plays an invented depot of three upright tanks of different
//! sizes on the simulator's plant in simulated time, as `bands.rs` does:
//! the plant's registers are decoded as the agent decodes them
//! (`acquire::poller::flag`) and fed at 1 Hz to the detector the daemon
//! uses (`loss::Detector`, default parameters). The conditions are drawn
//! from seeds: gauge noise, a fixed offset and a slow drift of the gauge,
//! the liquid's daily temperature swing (the level breathing with it),
//! pumped transfers in and out on the metered transfer register, and a
//! meter that reads up to 0.5 % off. The figures print with
//! `--nocapture`; BENCHMARKS.md ("Suspected loss") has them.
//!
//! No processes or sockets, so a simulated day runs in seconds.

use crate::util::{Draw, ScenarioBuilder, ScenarioTank, Scratch};
use leaktally::acquire::poller::flag;
use leaktally::loss::{Change, Detector, LossParams};
use leaktally_sim::plant::Plant;
use leaktally_sim::registers::RegisterImage;
use std::path::Path;

/// An invented depot: a small day tank, a middling and a large storage
/// tank of diesel (expansion 0.00083 per K, common practice for middle
/// distillates), each with a level gauge, a transfer meter and a
/// thermometer in tenths of a degree.
const SITE: &str = r#"[site]
name = "Loss watch check (invented)"
[[device]]
id = "rtu"
address = "127.0.0.1:1"
[[tank]]
id = "LW-1"
device = "rtu"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0, reportable_kg = [500.0], expansion_per_c = 0.00083 }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m", accuracy_mm = 4.0 }
transfer = { register = "input", address = 1, type = "i16", raw = [-10000, 10000], range = [-20.0, 20.0], unit = "m3/h" }
temperature = { register = "input", address = 2, type = "i16", raw = [-400, 800], range = [-40.0, 80.0], unit = "degC", accuracy_c = 0.5 }
[[tank]]
id = "LW-2"
device = "rtu"
geometry = { shape = "vertical_cylinder", diameter_m = 12.0, height_m = 12.0 }
substance = { name = "diesel", density_kg_m3 = 840.0, reportable_kg = [500.0], expansion_per_c = 0.00083 }
level = { register = "holding", address = 10, type = "f32", range = [0.0, 12.0], unit = "m", accuracy_mm = 3.0 }
transfer = { register = "input", address = 11, type = "i16", raw = [-10000, 10000], range = [-200.0, 200.0], unit = "m3/h" }
temperature = { register = "input", address = 12, type = "i16", raw = [-400, 800], range = [-40.0, 80.0], unit = "degC", accuracy_c = 0.5 }
[[tank]]
id = "LW-3"
device = "rtu"
geometry = { shape = "vertical_cylinder", diameter_m = 24.0, height_m = 15.0 }
substance = { name = "diesel", density_kg_m3 = 840.0, reportable_kg = [500.0], expansion_per_c = 0.00083 }
level = { register = "holding", address = 20, type = "f32", range = [0.0, 15.0], unit = "m", accuracy_mm = 3.0 }
transfer = { register = "input", address = 21, type = "i16", raw = [-10000, 10000], range = [-600.0, 600.0], unit = "m3/h" }
temperature = { register = "input", address = 22, type = "i16", raw = [-400, 800], range = [-40.0, 80.0], unit = "degC", accuracy_c = 0.5 }
"#;

const TANKS: [&str; 3] = ["LW-1", "LW-2", "LW-3"];
/// The largest pumping rate of each tank, m³/h (about 0.7 to 1 m of
/// level an hour).
const PUMP_M3_H: [f64; 3] = [6.0, 100.0, 400.0];
const EXPANSION_PER_K: f64 = 0.000_83;

/// A leak in a run: a hole of this diameter opening at this time, 0.3 m
/// above the bottom of every tank at once.
#[derive(Debug, Clone, Copy)]
struct Leak {
    diameter_mm: f64,
    at_s: f64,
    cd: f64,
}

/// One seeded run: the scenario and each tank's meter error.
struct Run {
    scenario: String,
    meter_error: [f64; 3],
}

/// Draws a run of `seconds`: per tank a level of 40 to 70 % of its
/// height, gauge noise 0.5 to 2 mm, an offset within ±2 mm and a drift of
/// at most 2 mm a day either way, a daily swing of 1 to 4 K (small tank)
/// or 0.5 to 2 K (storage tanks, whose bulk moves less), and a transfer
/// out and back in every few hours at 30 to 100 % of the pump's rate for
/// 20 to 40 minutes each; the meter off by up to ±0.5 %.
fn draw(seed: u64, seconds: f64, leak: Option<Leak>) -> Run {
    let mut d = Draw(seed.wrapping_mul(0xA076_1D64_78BD_642F));
    let heights = [5.0, 12.0, 15.0];
    let mut scenario = ScenarioBuilder::for_site(Path::new("site.toml"))
        .step_ms(100)
        .seed(seed);
    let mut meter_error = [0.0; 3];
    for (i, id) in TANKS.iter().enumerate() {
        let swing = if i == 0 {
            d.uniform(1.0, 4.0)
        } else {
            d.uniform(0.5, 2.0)
        };
        scenario = scenario.tank(
            ScenarioTank::new(id, heights[i] * d.uniform(0.4, 0.7))
                .level_noise_m(d.uniform(0.0005, 0.002))
                .level_bias_m(d.uniform(-0.002, 0.002))
                .level_drift_m_per_h(d.uniform(-0.002, 0.002) / 24.0)
                .thermal_swing(swing, EXPANSION_PER_K),
        );
        meter_error[i] = d.uniform(-0.005, 0.005);
        let mut at = d.uniform(600.0, 3.0 * 3600.0);
        while at < seconds {
            let flow = PUMP_M3_H[i] * d.uniform(0.3, 1.0);
            let out_s = d.uniform(1200.0, 2400.0);
            let pause = d.uniform(600.0, 3600.0);
            let in_s = d.uniform(1200.0, 2400.0);
            scenario = scenario
                .transfer_starts(at, id, -flow)
                .transfer_stops(at + out_s, id)
                .transfer_starts(at + out_s + pause, id, flow * out_s / in_s)
                .transfer_stops(at + out_s + pause + in_s, id);
            at += out_s + pause + in_s + d.uniform(1.0, 4.0) * 3600.0;
        }
        if let Some(leak) = leak {
            scenario = scenario.leak_opens(leak.at_s, id, leak.diameter_mm, 0.3, leak.cd);
        }
    }
    Run {
        scenario: scenario.text(),
        meter_error,
    }
}

/// What the watch said about one tank in a run.
#[derive(Debug, Default, Clone)]
struct Watched {
    /// Each alert: when it was raised and the start it offered, s.
    raised: Vec<(f64, f64)>,
}

/// Plays a run for `seconds` and feeds every tank's detector at 1 Hz.
fn play(scratch: &Scratch, seed: u64, run: &Run, seconds: u32) -> Vec<Watched> {
    let path = scratch.write(&format!("run-{seed}.toml"), &run.scenario);
    let scenario = leaktally_sim::scenario::parse(&run.scenario, &path).expect("a valid scenario");
    let site = scenario.site.clone();
    let mut plant = Plant::new(&scenario);
    let mut image = RegisterImage::new(&site);
    let mut detectors: Vec<Detector> = site
        .tanks
        .iter()
        .map(|t| {
            Detector::new(
                t.vessel.geometry().clone(),
                t.density.clone(),
                LossParams::default(),
            )
        })
        .collect();
    let mut watched = vec![Watched::default(); site.tanks.len()];
    let (mut rows, mut applied) = (Vec::new(), Vec::new());
    for second in 1..=seconds {
        let at_ms = i64::from(second) * 1000;
        plant.advance_to(at_ms as u64 / plant.step_ms(), &mut rows, &mut applied);
        rows.clear();
        plant.write_registers(&mut image);
        for (i, tank) in site.tanks.iter().enumerate() {
            let read = |sensor: &leaktally::config::Sensor| {
                let words = image
                    .read_registers(
                        tank.device,
                        sensor.register,
                        sensor.address,
                        sensor.data_type.width(),
                    )
                    .unwrap();
                flag(sensor, &words, false).value
            };
            let Some(level) = read(&tank.level) else {
                continue;
            };
            let transfer = tank
                .transfer
                .as_ref()
                .and_then(read)
                .map(|f| f * (1.0 + run.meter_error[i]));
            let temperature = tank.temperature.as_ref().and_then(read);
            if let Some(Change::Raised(a)) = detectors[i].push(at_ms, level, transfer, temperature)
            {
                watched[i]
                    .raised
                    .push((a.raised_ms as f64 / 1000.0, a.since_ms as f64 / 1000.0));
            }
        }
    }
    watched
}

fn median(mut xs: Vec<f64>) -> f64 {
    xs.sort_by(f64::total_cmp);
    xs[xs.len() / 2]
}

/// Simulated days of three tanks with no leak: no alert at all.
#[test]
fn no_false_alarm_in_simulated_days_without_a_leak() {
    let scratch = Scratch::new("loss-days");
    scratch.write("site.toml", SITE);
    let days: u64 = std::env::var("LEAKTALLY_LOSS_DAYS")
        .ok()
        .and_then(|d| d.parse().ok())
        .unwrap_or(2);
    let mut alarms = Vec::new();
    for seed in 1..=days {
        let run = draw(seed, 86_400.0, None);
        for (i, w) in play(&scratch, seed, &run, 86_400).iter().enumerate() {
            for &(raised, since) in &w.raised {
                alarms.push(format!(
                    "seed {seed}, {}: raised at {raised} s, since {since} s",
                    TANKS[i]
                ));
            }
        }
    }
    println!(
        "suspected loss, no leak: {} false alarms in {} tank-days ({days} simulated days of {} tanks)",
        alarms.len(),
        days * TANKS.len() as u64,
        TANKS.len()
    );
    assert!(alarms.is_empty(), "{alarms:#?}");
}

/// Holes of 5, 10 and 25 mm, opening an hour or more into a run: each is
/// detected, the time it takes is reported, and the start the alert
/// offers lies within two blocks before the hole opened and the alert.
#[test]
fn holes_are_detected_and_back_dated() {
    let scratch = Scratch::new("loss-holes");
    scratch.write("site.toml", SITE);
    let seeds: u64 = std::env::var("LEAKTALLY_LOSS_SEEDS")
        .ok()
        .and_then(|d| d.parse().ok())
        .unwrap_or(4);
    let block_s = LossParams::default().block_s;
    let slow_block_s = LossParams::default().slow_block_s;
    let horizon_s = 6 * 3600;
    let mut all = Vec::new();
    for diameter_mm in [5.0, 10.0, 25.0] {
        let mut times: Vec<Vec<f64>> = vec![Vec::new(); TANKS.len()];
        let mut misses = [0u32; 3];
        let mut offsets: Vec<Vec<f64>> = vec![Vec::new(); TANKS.len()];
        for seed in 1..=seeds {
            let mut d = Draw(seed ^ 0x2545_F491_4F6C_DD1D);
            let leak = Leak {
                diameter_mm,
                at_s: d.uniform(3600.0, 7200.0),
                cd: d.uniform(0.61, 0.8),
            };
            let run = draw(100 + seed, f64::from(horizon_s), Some(leak));
            for (i, w) in play(&scratch, seed, &run, horizon_s).iter().enumerate() {
                let Some((raised, since)) = w.raised.first().copied() else {
                    misses[i] += 1;
                    continue;
                };
                assert!(
                    raised > leak.at_s,
                    "{diameter_mm} mm on {} (seed {seed}): raised at {raised} s, before the hole opened at {} s",
                    TANKS[i],
                    leak.at_s
                );
                // Never absurdly early; and, where found within an hour,
                // at or before the hole (a marginal leak found later may
                // have its run restarted by the noise, and then be
                // offered late: the README says to look at the trend).
                let early_enough = raised - leak.at_s > 3600.0 || since <= leak.at_s + block_s;
                assert!(
                    since >= leak.at_s - 4.0 * slow_block_s && early_enough,
                    "{diameter_mm} mm on {} (seed {seed}): offered start {since} s for a hole at {} s, raised at {raised} s",
                    TANKS[i],
                    leak.at_s
                );
                offsets[i].push(since - leak.at_s);
                times[i].push(raised - leak.at_s);
            }
        }
        for (i, t) in times.iter().enumerate() {
            let found = if t.is_empty() {
                "never detected".to_string()
            } else {
                format!(
                    "detected after median {:.0} s, at most {:.0} s; start offered {:+.0} to {:+.0} s from the hole's",
                    median(t.clone()),
                    t.iter().copied().fold(0.0, f64::max),
                    offsets[i].iter().copied().fold(f64::INFINITY, f64::min),
                    offsets[i].iter().copied().fold(f64::NEG_INFINITY, f64::max),
                )
            };
            println!(
                "suspected loss, {diameter_mm} mm hole on {}: {found}; {} of {seeds} runs not detected within {horizon_s} s",
                TANKS[i], misses[i]
            );
        }
        all.push((diameter_mm, misses));
    }
    // Every hole of 10 mm or more is found on every tank; 5 mm on the
    // smaller tanks (on the largest its fall may be within the allowance).
    for (diameter_mm, misses) in all {
        let must = if diameter_mm >= 10.0 { 3 } else { 2 };
        assert!(
            misses[..must].iter().all(|&m| m == 0),
            "{diameter_mm} mm: missed {misses:?}"
        );
    }
}
