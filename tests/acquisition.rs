//! Acquisition end to end: the simulator and `leaktally poll` as real
//! processes on loopback. The reference is the simulator's ground truth,
//! whose physics is checked against the analytic Torricelli solution in
//! sim/src/physics.rs.

use crate::util::{Scratch, Server, Truth, binary, demo_site, now_ms, start_sim, toml_path};
use serde_json::Value;
use std::process::Command;
use std::time::{Duration, Instant};

/// A scenario for the demo site: FF-T12 leaking from 1 s, the others still.
pub(crate) fn scenario(scratch: &Scratch, level_noise_m: f64) -> std::path::PathBuf {
    let site = scratch.write("sim-site.toml", &demo_site("127.0.0.1:1"));
    scratch.write(
        "scenario.toml",
        &format!(
            r#"site = {site}
seed = 5
[[tank]]
id = "FF-T12"
initial_level_m = 4.2
level_noise_m = {level_noise_m}
[[tank]]
id = "FF-T14"
initial_level_m = 1.6
headspace_kpa = 15.0
level_noise_m = {level_noise_m}
pressure_noise_pa = 30.0
[[tank]]
id = "FF-T20"
initial_level_m = 5.1
level_noise_m = {level_noise_m}
pressure_noise_pa = 30.0
[[event]]
at_s = 1.0
action = "leak_opens"
tank = "FF-T12"
diameter_mm = 40.0
height_m = 0.3
cd = 0.61
"#,
            site = toml_path(&site)
        ),
    )
}

/// Starts `leaktally poll` against `address`, its JSON lines on a channel.
fn start_poll(scratch: &Scratch, address: &str, seconds: f64) -> Server {
    let site = scratch.write("site.toml", &demo_site(address));
    Server::start(
        "leaktally poll",
        Command::new(binary("leaktally"))
            .args(["poll", "--seconds", &seconds.to_string(), "--config"])
            .arg(site),
        scratch.path("poll.stderr"),
    )
}

/// Collects the poller's samples until it exits or `limit` passes.
fn collect(poll: &mut Server, limit: Duration) -> Vec<Value> {
    let deadline = Instant::now() + limit;
    let mut samples = Vec::new();
    while let Ok(line) = poll
        .lines
        .recv_timeout(deadline.saturating_duration_since(Instant::now()))
    {
        samples.push(
            serde_json::from_str(&line).unwrap_or_else(|e| panic!("poll printed {line:?}: {e}")),
        );
    }
    samples
}

#[test]
fn polled_values_match_the_simulator_truth() {
    let scratch = Scratch::new("acquire");
    let noise = 0.001;
    let (sim, address) = start_sim(&scratch, &scenario(&scratch, noise), "127.0.0.1:0");
    let mut poll = start_poll(&scratch, &address, 11.0);
    let samples = collect(&mut poll, Duration::from_secs(25));
    drop(sim); // kills it; the truth file is flushed every simulated second
    let truth = Truth::load(&scratch.path("truth.csv"));

    // 11 s at 1 Hz, three tanks.
    assert!(
        samples.len() >= 27,
        "only {} samples; poll stderr:\n{}",
        samples.len(),
        poll.stderr()
    );
    let rho_g_t20 = 860.0 * 9.806_65;
    let mut worst = [0.0f64; 3];
    for s in &samples {
        let tank = s["tank_id"].as_str().unwrap();
        let at = s["at_ms"].as_i64().unwrap();
        assert_eq!(s["level"]["quality"], "good", "{s}");
        let level = s["level"]["value"].as_f64().unwrap();
        let t = truth.at(tank, at);
        // Within the sensor noise: 5 sigma plus the register's step, plus
        // what the level moves in the 10 ms between register updates.
        let step = match tank {
            "FF-T12" => 5.0 / 16_000.0,
            "FF-T20" => 0.001,
            _ => 0.0,
        };
        let miss = (level - t.level_m).abs();
        worst[0] = worst[0].max(miss);
        assert!(
            miss <= 5.0 * noise + step + 2e-4,
            "{tank} level {level} vs truth {} at {at}",
            t.level_m
        );
        match tank {
            "FF-T14" => {
                // Gauge transmitter in the headspace: the blanket pressure.
                let p = s["pressure"]["value"].as_f64().unwrap();
                worst[1] = worst[1].max((p - t.headspace_pa).abs());
                assert!(
                    (p - t.headspace_pa).abs() <= 5.0 * 30.0,
                    "FF-T14 pressure {p} vs {}",
                    t.headspace_pa
                );
            }
            "FF-T20" => {
                // Absolute transmitter at 0.2 m: ambient plus the column
                // above it, quantised to 250 kPa / 65535.
                let p = s["pressure"]["value"].as_f64().unwrap();
                let expected = 101_325.0 + t.headspace_pa + rho_g_t20 * (t.level_m - 0.2);
                worst[2] = worst[2].max((p - expected).abs());
                assert!(
                    (p - expected).abs() <= 5.0 * 30.0 + 4.0,
                    "FF-T20 pressure {p} vs {expected}"
                );
            }
            _ => {}
        }
    }
    println!(
        "polled vs truth over {} samples: level within {:.2} mm, FF-T14 pressure within {:.0} Pa, FF-T20 within {:.0} Pa",
        samples.len(),
        worst[0] * 1000.0,
        worst[1],
        worst[2]
    );
}

#[test]
fn the_agent_reconnects_after_the_simulator_restarts_and_marks_the_gap() {
    let scratch = Scratch::new("restart");
    let scenario = scenario(&scratch, 0.0);
    let (sim, address) = start_sim(&scratch, &scenario, "127.0.0.1:0");
    let mut poll = start_poll(&scratch, &address, 22.0);
    std::thread::sleep(Duration::from_secs(5));
    drop(sim);
    let killed_ms = now_ms();
    std::thread::sleep(Duration::from_secs(4));
    let (_sim, again) = start_sim(&scratch, &scenario, &address);
    let restarted_ms = now_ms();
    assert_eq!(again, address);
    let samples = collect(&mut poll, Duration::from_secs(30));

    let t12: Vec<(i64, String)> = samples
        .iter()
        .filter(|s| s["tank_id"] == "FF-T12")
        .map(|s| {
            (
                s["at_ms"].as_i64().unwrap(),
                s["level"]["quality"].as_str().unwrap().to_owned(),
            )
        })
        .collect();
    let lost = t12
        .iter()
        .filter(|(at, q)| *at > killed_ms + 500 && *at < restarted_ms && q == "communication_lost");
    assert!(lost.count() >= 2, "the gap is marked: {t12:?}");
    let back = t12
        .iter()
        .find(|(at, q)| *at >= restarted_ms && q == "good")
        .unwrap_or_else(|| {
            panic!(
                "no good sample after the restart: {t12:?}\n{}",
                poll.stderr()
            )
        });
    let after = back.0 - restarted_ms;
    println!("good samples again {after} ms after the simulator restarted");
    assert!(
        after <= 5000,
        "good again {after} ms after the restart (limit 5000)"
    );
    // A sample every cycle throughout, good or flagged: nothing silently missing.
    for pair in t12.windows(2) {
        assert!(
            pair[1].0 - pair[0].0 <= 2500,
            "a cycle went missing: {pair:?}"
        );
    }
}
