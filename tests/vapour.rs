//! Vapour end to end (issue 17): a hole above the liquid of a blanketed
//! tank, the simulator's gas space venting through it, and the agent's
//! running total of gas, its phase and its forecast of when the headspace
//! reaches ambient, against the simulator's truth. (The simulator's gas
//! physics is checked against the closed-form choked blowdowns, isothermal
//! and adiabatic, in sim/src/physics.rs; the agent's blowdown against
//! scipy in tests/references.rs.)

use crate::tracking::{Plant, event_id, event_of, rel};
use crate::util::{LeakOpen, ScenarioBuilder, ScenarioTank};
use std::path::Path;

/// The truth file's gas columns for one tank: (ms since 1970, headspace
/// gauge Pa, gas released kg, gas rate kg/s).
fn gas_truth(path: &Path, tank: &str) -> Vec<(i64, f64, f64, f64)> {
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let col = |name: &str| header.iter().position(|h| *h == name).unwrap();
    let (utc, t, p, m, r) = (
        col("utc"),
        col("tank"),
        col("headspace_pa"),
        col("gas_released_kg"),
        col("gas_rate_kg_s"),
    );
    lines
        .map(|l| l.split(',').collect::<Vec<_>>())
        .filter(|f| f.len() == header.len() && f[t] == tank)
        .map(|f| {
            (
                f[utc].parse::<jiff::Timestamp>().unwrap().as_millisecond(),
                f[p].parse().unwrap(),
                f[m].parse().unwrap(),
                f[r].parse().unwrap(),
            )
        })
        .collect()
}

/// FF-T14 (methanol under nitrogen, 15 kPa gauge) with a 50 mm hole at
/// 2.3 m, above its liquid at 1.2 m: the nitrogen vents and the headspace
/// falls to ambient within a minute (isothermal: the walls keep it warm).
#[test]
fn a_hole_above_the_liquid_vents_the_blanket_as_the_truth_does() {
    let scenario = ScenarioBuilder::demo()
        .seed(23)
        .tank(ScenarioTank::new("FF-T12", 4.2))
        .tank(ScenarioTank::new("FF-T20", 6.0))
        .tank(
            ScenarioTank::new("FF-T14", 1.2)
                .headspace_kpa(15.0)
                .gas_ullage("isothermal")
                .level_noise_m(0.001)
                .pressure_noise_pa(30.0),
        )
        .leak_opens(2.0, "FF-T14", 50.0, 2.3, 0.61);
    let plant = Plant::start_with("vapour", scenario, |site| site);
    let _daemon = plant.daemon("daemon");
    plant.wait_until(4.0);
    let since = plant.leak_start("FF-T14");
    let reply = plant.open_leak(LeakOpen::tank("FF-T14").hole(50.0, 2.3, 0.61).since(&since));
    let id = event_id(&reply);

    // Early in the blowdown: the phase, the total so far, and the forecast.
    plant.wait_until(12.0);
    let early = plant.status(Some(id));
    let est = &event_of(&early, id)["estimate"];
    assert_eq!(est["phase"], "vapour", "{est}");
    let forecast = &est["forecast"];
    let made_at = forecast["made_at_ms"].as_i64().expect("a vapour forecast");
    let ends_at = made_at + (forecast["stops_after_s"].as_f64().unwrap() * 1000.0) as i64;
    let total_at_end = forecast["total_at_stop_kg"].as_f64().unwrap();

    // The blowdown runs its course; then the truth is complete.
    plant.wait_until(75.0);
    let late = plant.status(Some(id));
    let est = &event_of(&late, id)["estimate"];
    std::thread::sleep(std::time::Duration::from_millis(1500));
    let truth = gas_truth(&plant.scratch.path("truth.csv"), "FF-T14");
    let at = est["at_ms"].as_i64().unwrap();
    let true_now = truth
        .iter()
        .rev()
        .find(|row| row.0 <= at)
        .expect("truth up to the estimate");
    let (best, low, high) = (
        est["released_best_kg"].as_f64().unwrap(),
        est["released_low_kg"].as_f64().unwrap(),
        est["released_high_kg"].as_f64().unwrap(),
    );
    println!(
        "gas released: agent {best:.3} kg ({low:.3} to {high:.3}), truth {:.3} kg",
        true_now.2
    );
    // The same tolerance as a known hole's liquid total (tests/tracking.rs).
    assert!(true_now.2 > 1.0, "the blanket vented: {true_now:?}");
    assert!(rel(best, true_now.2) < 0.02, "{best} vs {}", true_now.2);
    assert!(
        low <= true_now.2 && true_now.2 <= high,
        "band {low}..{high}"
    );

    // When the truth's headspace reached ambient: the first row from which
    // the gas no longer flows.
    let first = truth
        .iter()
        .position(|row| row.3 > 0.0)
        .expect("gas flowed");
    let stopped = truth[first..]
        .iter()
        .find(|row| row.3 <= 0.0 || row.1 <= 0.0)
        .expect("the headspace reached ambient within the run");
    let final_mass = truth.last().unwrap().2;
    let (predicted_s, true_s) = (
        (ends_at - made_at) as f64 / 1000.0,
        (stopped.0 - made_at) as f64 / 1000.0,
    );
    println!(
        "headspace at ambient: forecast {predicted_s:.1} s after {made_at}, truth {true_s:.1} s; total by then: forecast {total_at_end:.3} kg, truth {final_mass:.3} kg"
    );
    assert!(
        rel(total_at_end, final_mass) < 0.02,
        "{total_at_end} vs {final_mass}"
    );
    assert!(
        (predicted_s - true_s).abs() < 0.05 * true_s.max(10.0),
        "forecast {predicted_s} s vs truth {true_s} s"
    );
}
