//! Acquisition end to end: the simulator and `leaktally poll` as real
//! processes on loopback. The reference is the simulator's ground truth,
//! whose physics is checked against the analytic Torricelli solution in
//! sim/src/physics.rs.

use crate::util::{
    ScenarioBuilder, ScenarioTank, Scratch, Server, Truth, binary, demo_site, now_ms, start_sim,
};
use serde_json::Value;
use std::process::Command;
use std::time::{Duration, Instant};

/// A scenario for the demo site: FF-T12 leaking from 1 s, the others still.
pub(crate) fn one_leak(level_noise_m: f64) -> ScenarioBuilder {
    ScenarioBuilder::demo()
        .seed(5)
        .tank(ScenarioTank::new("FF-T12", 4.2).level_noise_m(level_noise_m))
        .tank(
            ScenarioTank::new("FF-T14", 1.6)
                .headspace_kpa(15.0)
                .level_noise_m(level_noise_m)
                .pressure_noise_pa(30.0),
        )
        .tank(
            ScenarioTank::new("FF-T20", 5.1)
                .level_noise_m(level_noise_m)
                .pressure_noise_pa(30.0),
        )
        .leak_opens(1.0, "FF-T12", 40.0, 0.3, 0.61)
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
    let (sim, address) = start_sim(&scratch, &one_leak(noise).write(&scratch), "127.0.0.1:0");
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
        assert_eq!(s["format"], 2, "{s}");
        let tank = s["tank"].as_str().unwrap();
        let at = s["at_ms"].as_i64().unwrap();
        // The time RFC 3339 UTC, the same instant as at_ms.
        let stamp = s["at"].as_str().unwrap();
        assert!(stamp.ends_with('Z'), "{s}");
        assert_eq!(
            stamp.parse::<jiff::Timestamp>().unwrap().as_millisecond(),
            at
        );
        assert_eq!(s["level_m"]["quality"], "good", "{s}");
        let level = s["level_m"]["value"].as_f64().unwrap();
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
                assert_eq!(s["pressure_pa_absolute"], Value::Null, "{s}");
                assert_eq!(s["pressure_tap"], "headspace", "{s}");
                let p = s["pressure_pa_gauge"]["value"].as_f64().unwrap();
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
                assert_eq!(s["pressure_pa_gauge"], Value::Null, "{s}");
                assert_eq!(s["pressure_tap"], "submerged", "{s}");
                let p = s["pressure_pa_absolute"]["value"].as_f64().unwrap();
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
    let scenario = one_leak(0.0).write(&scratch);
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
        .filter(|s| s["tank"] == "FF-T12")
        .map(|s| {
            (
                s["at_ms"].as_i64().unwrap(),
                s["level_m"]["quality"].as_str().unwrap().to_owned(),
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
    // The log says the outage once per device when it begins, as what it
    // was (not tokio-modbus's leftover "Operation now in progress"), and
    // once when it ends, with its length.
    let log = poll.stderr();
    println!("the outage in the log:\n{log}");
    // Readings the device did not answer: poll says so at the end, and
    // exits 3 as check does (the binary's warning line).
    assert!(
        log.contains("reading(s) not answered properly by their device"),
        "{log}"
    );
    assert!(!log.contains("in progress"), "{log}");
    for device in ["rtu-east", "rtu-west"] {
        let lines: Vec<&str> = log
            .lines()
            .filter(|l| l.contains(&format!("{device} (")))
            .collect();
        let down: Vec<&&str> = lines.iter().filter(|l| l.contains("link down")).collect();
        let up: Vec<&&str> = lines
            .iter()
            .filter(|l| l.contains("link back up after"))
            .collect();
        assert_eq!(
            (down.len(), up.len()),
            (1, 1),
            "{device}:\n{}",
            lines.join("\n")
        );
        assert!(
            down[0].contains("the device closed the connection")
                || down[0].contains("connection refused")
                || down[0].contains("reset"),
            "{}",
            down[0]
        );
        // Down about 4 s, give or take the backoff and the first poll.
        let seconds: f64 = up[0]
            .split("link back up after ")
            .nth(1)
            .and_then(|rest| rest.split(' ').next())
            .and_then(|v| v.parse().ok())
            .unwrap_or_else(|| panic!("{}", up[0]));
        assert!((2.5..=9.0).contains(&seconds), "{}", up[0]);
    }
}

/// `check` reads every planned block once: against the simulator it shows
/// the decoded values and exits 0; with a unit id no device has and a
/// register the device does not have, it names the exception of each read,
/// says what to check and exits 2; `--offline` exits 0 for the same valid
/// config, and an invalid config exits 1.
#[test]
fn check_reads_every_block_and_names_what_a_device_refuses() {
    let scratch = Scratch::new("check");
    // The simulated gateway has nothing at holding register 500 of rtu-east.
    let scenario = one_leak(0.001)
        .device_refuses_span(0.0, "rtu-east", 2, "holding", 500, Some(2))
        .write(&scratch);
    let (_sim, address) = start_sim(&scratch, &scenario, "127.0.0.1:0");
    let check = |name: &str, site: &str, offline: bool| {
        let path = scratch.write(&format!("{name}.toml"), site);
        let mut cmd = Command::new(binary("leaktally"));
        cmd.arg("check").arg("--config").arg(path);
        if offline {
            cmd.arg("--offline");
        }
        crate::util::run(name, &mut cmd, &scratch)
    };

    let good = check("good", &demo_site(&address), false);
    assert_eq!(
        good.status.code(),
        Some(0),
        "{}\n{}",
        good.stdout,
        good.stderr
    );
    assert_eq!(
        good.stdout.matches(": answered in ").count(),
        4,
        "{}",
        good.stdout
    );
    assert!(!good.stdout.contains("warning"), "{}", good.stdout);
    // The decoded level against the scenario's 4.2 m start (the leak has
    // lowered it by millimetres since).
    let level: f64 = good
        .stdout
        .lines()
        .find_map(|l| l.trim().strip_prefix("FF-T12 level: "))
        .and_then(|rest| rest.split_whitespace().next())
        .and_then(|v| v.parse().ok())
        .unwrap_or_else(|| panic!("no FF-T12 level in:\n{}", good.stdout));
    assert!((level - 4.2).abs() < 0.05, "FF-T12 level {level}");
    assert!(good.stdout.contains("FF-T14 pressure: "), "{}", good.stdout);
    assert!(good.stdout.contains("kPa gauge, good"), "{}", good.stdout);
    assert!(
        good.stdout.contains("FF-T12 leak flag: not raised"),
        "{}",
        good.stdout
    );

    // rtu-west as unit 9, which the gateway does not have; FF-T14's
    // pressure at holding 500, which rtu-east does not have.
    let broken = demo_site(&address)
        .replace("unit_id = 2", "unit_id = 9")
        .replace("address = 12,", "address = 500,");
    let bad = check("broken", &broken, false);
    println!(
        "check against a wrong unit id and an unmapped register:\n{}",
        bad.stdout
    );
    assert_eq!(bad.status.code(), Some(3), "{}\n{}", bad.stdout, bad.stderr);
    assert!(
        bad.stderr
            .contains("2 of 2 device(s) failed the check (2 read(s)"),
        "{}",
        bad.stderr
    );
    let wrong_unit = bad
        .stdout
        .lines()
        .find(|l| l.contains("(FF-T20 level, FF-T20 pressure)"))
        .unwrap_or_else(|| panic!("{}", bad.stdout));
    assert!(
        wrong_unit.contains("warning: ")
            && wrong_unit.contains("exception 11 (gateway target device failed to respond)")
            && wrong_unit.contains("check unit_id")
            && wrong_unit.contains("unit_id is 9 for device rtu-west"),
        "{wrong_unit}"
    );
    let unmapped = bad
        .stdout
        .lines()
        .find(|l| l.contains("holding registers 500..501 (FF-T14 pressure)"))
        .unwrap_or_else(|| panic!("{}", bad.stdout));
    assert!(
        unmapped.contains("exception 2 (illegal data address)")
            && unmapped.contains("check the address"),
        "{unmapped}"
    );
    // The rest of rtu-east still answers.
    assert!(bad.stdout.contains("FF-T14 level: "), "{}", bad.stdout);
    assert!(bad.stdout.contains("FF-T12 level: "), "{}", bad.stdout);

    let offline = check("offline", &broken, true);
    assert_eq!(offline.status.code(), Some(0), "{}", offline.stderr);
    assert!(
        !offline.stdout.contains("answered in"),
        "{}",
        offline.stdout
    );
    let invalid = check(
        "invalid",
        &broken.replace("unit_id = 9", "unit_id = 0"),
        true,
    );
    assert_eq!(invalid.status.code(), Some(1), "{}", invalid.stdout);
    assert!(
        invalid.stderr.contains("unit_id 0 is outside 1..247"),
        "{}",
        invalid.stderr
    );
}
