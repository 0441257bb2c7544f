//! Modbus RTU on serial lines end to end: the simulator serves a line
//! (`leaktally-sim --serial`), a pair of pseudo-terminals made by Debian's
//! `socat` stands in for the cable, and the agent polls the units on it.
//!
//! A pty carries bytes at once whatever the baud rate, so the simulator
//! holds each reply for the wire time of the request and the reply at the
//! line's rate (sim/src/service.rs); the agent keeps its own silence between
//! requests. The cycle times printed here are those of that emulated line.
//!
//! Without socat the tests say SKIPPED and pass, unless
//! LEAKTALLY_REQUIRE_SOCAT=1 (which `.ci/run` sets once it has installed
//! socat) makes that a failure.

use crate::tracking::{Plant, event_id, event_of, rel, three_leaks_on};
use crate::util::{
    LeakOpen, ScenarioBuilder, ScenarioTank, Scratch, Server, binary, demo_site, now_ms, skipped,
};
use serde_json::Value;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc::RecvTimeoutError;
use std::time::{Duration, Instant};

/// Two linked pseudo-terminals: what one end is sent, the other reads.
/// socat is stopped when this is dropped.
struct Cable {
    socat: Child,
    /// The simulator's end and the agent's.
    sim_end: PathBuf,
    agent_end: PathBuf,
}

impl Cable {
    /// Makes the pair in the scratch folder, or says SKIPPED and returns
    /// `None` when socat is missing (a failure under
    /// LEAKTALLY_REQUIRE_SOCAT=1).
    fn new(test: &str, scratch: &Scratch) -> Option<Self> {
        let present = Command::new("socat")
            .arg("-V")
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status()
            .is_ok_and(|s| s.success());
        if !present {
            let why = "socat is missing ('apt-get install -y socat' as root; .ci/run does)";
            assert!(
                std::env::var("LEAKTALLY_REQUIRE_SOCAT").as_deref() != Ok("1"),
                "{test}: {why}, and LEAKTALLY_REQUIRE_SOCAT=1"
            );
            skipped(test, why);
            return None;
        }
        let (sim_end, agent_end) = (scratch.path("tty-sim"), scratch.path("tty-agent"));
        let socat = Command::new("socat")
            .arg("-d")
            .arg("-d")
            .arg(format!("pty,raw,echo=0,link={}", sim_end.display()))
            .arg(format!("pty,raw,echo=0,link={}", agent_end.display()))
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(scratch.path("socat.stderr")).unwrap())
            .spawn()
            .expect("starting socat");
        let cable = Self {
            socat,
            sim_end,
            agent_end,
        };
        let deadline = Instant::now() + Duration::from_secs(5);
        while !(cable.sim_end.exists() && cable.agent_end.exists()) {
            assert!(Instant::now() < deadline, "socat made no ptys");
            std::thread::sleep(Duration::from_millis(20));
        }
        Some(cable)
    }
}

impl Drop for Cable {
    fn drop(&mut self) {
        let _ = self.socat.kill();
        let _ = self.socat.wait();
    }
}

/// The demo site with both its devices on the serial port `port` at
/// `baud` (8E1, the Modbus serial-line default).
fn serial_demo_site(port: &Path, baud: u32) -> String {
    demo_site("127.0.0.1:1").replace(
        "address = \"127.0.0.1:1\"",
        &format!(
            "serial_port = {}\nbaud_rate = {baud}",
            crate::util::toml_path(port)
        ),
    )
}

/// Starts `leaktally-sim --serial` on the cable's simulator end for
/// `scenario`, writing its truth to the scratch folder.
fn start_serial_sim(scratch: &Scratch, scenario: &Path, cable: &Cable) -> Server {
    let mut sim = Server::start(
        "leaktally-sim",
        Command::new(binary("leaktally-sim"))
            .arg("--scenario")
            .arg(scenario)
            .arg("--serial")
            .arg(&cable.sim_end)
            .arg("--truth")
            .arg(scratch.path("truth.csv")),
        scratch.path("sim.stderr"),
    );
    sim.address();
    sim
}

/// One sample line of `leaktally poll`, with when the test read it.
struct Polled {
    tank: String,
    at_ms: i64,
    arrived_ms: i64,
    good: bool,
}

/// Runs `leaktally poll` on `site` for `seconds` and collects its samples
/// as they arrive (poll flushes each device's cycle as it comes).
fn poll_live(scratch: &Scratch, name: &'static str, site: &Path, seconds: u32) -> Vec<Polled> {
    let mut poll = Server::start(
        name,
        Command::new(binary("leaktally"))
            .arg("poll")
            .arg("--config")
            .arg(site)
            .arg("--seconds")
            .arg(seconds.to_string()),
        scratch.path(&format!("{name}.stderr")),
    );
    let deadline = Instant::now() + Duration::from_secs(u64::from(seconds) + 15);
    let mut out = Vec::new();
    loop {
        let left = deadline.saturating_duration_since(Instant::now());
        match poll.lines.recv_timeout(left) {
            Ok(line) => {
                let arrived_ms = now_ms();
                let v: Value = serde_json::from_str(&line)
                    .unwrap_or_else(|e| panic!("poll printed {line:?}: {e}"));
                out.push(Polled {
                    tank: v["tank"].as_str().unwrap().to_owned(),
                    at_ms: v["at_ms"].as_i64().unwrap(),
                    arrived_ms,
                    good: v["level_m"]["quality"] == "good",
                });
            }
            Err(RecvTimeoutError::Disconnected) => break,
            Err(RecvTimeoutError::Timeout) => panic!("poll did not end; {}", poll.stderr()),
        }
    }
    let exit = poll.child.wait().unwrap();
    // 3: some readings were not answered, which a test may mean to cause.
    assert!(
        matches!(exit.code(), Some(0 | 3)),
        "poll: {exit}\n{}",
        poll.stderr()
    );
    out
}

/// The median of some durations, ms.
fn median(mut values: Vec<i64>) -> i64 {
    values.sort_unstable();
    values[values.len() / 2]
}

/// The same accuracy check as over TCP (tracking.rs): the demo site's
/// three leaks, its two devices on one 19200 baud line; a known hole's
/// total within 2 % of the simulator's truth after 60 s, and a back-dated
/// event's too.
#[test]
fn totals_over_a_serial_line_match_the_truth() {
    let test = "totals_over_a_serial_line_match_the_truth";
    let scratch = Scratch::new("serial-totals");
    let Some(cable) = Cable::new(test, &scratch) else {
        return;
    };
    let sim_site = scratch.write("sim-site.toml", &serial_demo_site(&cable.sim_end, 19_200));
    let scenario = three_leaks_on(ScenarioBuilder::for_site(&sim_site)).write(&scratch);
    let sim = start_serial_sim(&scratch, &scenario, &cable);
    let started_ms = now_ms();
    let site = scratch.write("site.toml", &serial_demo_site(&cable.agent_end, 19_200));
    let db = scratch.path("leaktally.db");
    let plant = Plant {
        scratch,
        sim,
        site,
        db,
        started_ms,
    };
    let daemon = plant.daemon("daemon");
    plant.wait_until(3.0);
    let since = plant.leak_start("FF-T12");
    let known =
        event_id(&plant.open_leak(LeakOpen::tank("FF-T12").hole(40.0, 0.3, 0.61).since(&since)));
    plant.wait_until(36.0);
    let back_dated =
        event_id(&plant.open_leak(LeakOpen::tank("FF-T20").hole(35.0, 0.5, 0.61).since("30s")));
    plant.wait_until(66.0);
    let status = plant.status(None);
    let truth = plant.truth();

    let e = event_of(&status, known);
    let (at, best) = (
        e["estimate"]["at_ms"].as_i64().unwrap(),
        e["estimate"]["released_best_kg"].as_f64().unwrap(),
    );
    let exact = truth.at("FF-T12", at).released_kg;
    println!(
        "serial, known hole: {best:.1} kg vs truth {exact:.1} kg ({:.3} %)",
        100.0 * rel(best, exact)
    );
    assert_eq!(e["estimate"]["method"], "orifice_given_hole");
    assert!(rel(best, exact) < 0.02, "known hole {best} vs {exact}");

    let e = event_of(&status, back_dated);
    let (at, start, best) = (
        e["estimate"]["at_ms"].as_i64().unwrap(),
        e["start_ms"].as_i64().unwrap(),
        e["estimate"]["released_best_kg"].as_f64().unwrap(),
    );
    let exact = truth.at("FF-T20", at).released_kg - truth.at("FF-T20", start).released_kg;
    println!(
        "serial, back-dated 30 s: {best:.1} kg vs truth {exact:.1} kg ({:.3} %)",
        100.0 * rel(best, exact)
    );
    assert!(rel(best, exact) < 0.02, "back-dated {best} vs {exact}");
    // Both devices read all along: no link trouble in the daemon's log.
    let log = daemon.stderr();
    assert!(
        !log.contains("not reachable") && !log.contains("no answer"),
        "{log}"
    );
}

/// A site of `tanks` level gauges, each its own unit (1, 2, ...) on one
/// serial port at `baud`, polled every `interval_ms`.
fn gauge_line(port: &Path, baud: u32, tanks: usize, interval_ms: u64) -> String {
    let mut text = String::from("[site]\nname = \"Invented gauge line\"\n");
    for n in 1..=tanks {
        text += &format!(
            "[[device]]\nid = \"gauge-{n:02}\"\nserial_port = {}\nbaud_rate = {baud}\nunit_id = {n}\npoll_interval_ms = {interval_ms}\nrequest_timeout_ms = 350\n",
            crate::util::toml_path(port)
        );
    }
    for n in 1..=tanks {
        text += &format!(
            "[[tank]]\nid = \"GL-{n:02}\"\ndevice = \"gauge-{n:02}\"\ngeometry = {{ shape = \"vertical_cylinder\", diameter_m = 4.0, height_m = 6.0 }}\nheadspace_kpa = 0.0\nsubstance = {{ name = \"diesel\", density_kg_m3 = 840.0 }}\nlevel = {{ register = \"input\", address = 0, type = \"f32\", range = [0.0, 6.0], unit = \"m\" }}\n"
        );
    }
    text
}

/// A slow line: 20 level gauges on one port at 9600 baud. Polled every
/// second, every tank gets a good sample every second; polled as fast as the
/// line allows (every 400 ms, less than a round takes), each tank's samples
/// come one round of the line apart: that round is the cycle time printed.
#[test]
fn twenty_gauges_on_a_9600_baud_line_are_read_in_turn() {
    let test = "twenty_gauges_on_a_9600_baud_line_are_read_in_turn";
    let scratch = Scratch::new("serial-slow");
    let Some(cable) = Cable::new(test, &scratch) else {
        return;
    };
    const TANKS: usize = 20;
    let sim_site = scratch.write(
        "sim-site.toml",
        &gauge_line(&cable.sim_end, 9600, TANKS, 1000),
    );
    let mut scenario = ScenarioBuilder::for_site(&sim_site).seed(3);
    for n in 1..=TANKS {
        scenario = scenario.tank(ScenarioTank::new(
            &format!("GL-{n:02}"),
            2.0 + 0.1 * n as f64,
        ));
    }
    let scenario = scratch.write("scenario.toml", &scenario.text());
    let _sim = start_serial_sim(&scratch, &scenario, &cable);

    let site = scratch.write(
        "site.toml",
        &gauge_line(&cable.agent_end, 9600, TANKS, 1000),
    );
    // `check` reads every gauge's block once, through the same shared bus.
    let checked = crate::util::run(
        "leaktally-check",
        Command::new(binary("leaktally"))
            .arg("check")
            .arg("--config")
            .arg(&site),
        &scratch,
    );
    assert!(
        checked.status.success(),
        "{}\n{}",
        checked.stdout,
        checked.stderr
    );
    assert_eq!(
        checked.stdout.matches("Modbus RTU at 9600 baud").count(),
        TANKS,
        "{}",
        checked.stdout
    );
    assert_eq!(checked.stdout.matches(": answered in ").count(), TANKS);
    assert!(
        checked
            .stdout
            .contains("20 device(s), asked in turn; a round takes at least 470 ms")
            && !checked.stdout.contains("warning"),
        "{}",
        checked.stdout
    );
    let samples = poll_live(&scratch, "poll-1s", &site, 6);
    let mut by_tank: BTreeMap<&str, Vec<&Polled>> = BTreeMap::new();
    for s in &samples {
        by_tank.entry(&s.tank).or_default().push(s);
    }
    assert_eq!(by_tank.len(), TANKS, "every tank sampled");
    for (tank, got) in &by_tank {
        assert!(got.len() >= 4, "{tank}: {} samples in 6 s", got.len());
        assert!(got.iter().all(|s| s.good), "{tank}: a sample not good");
    }
    // How long after its cycle began the last gauge's sample came out: the
    // whole line's round, with every gauge asking at the same tick.
    let mut rounds: BTreeMap<i64, i64> = BTreeMap::new();
    for s in &samples {
        let latest = rounds.entry(s.at_ms / 1000).or_default();
        *latest = (*latest).max(s.arrived_ms - s.at_ms);
    }
    let round_1s = median(rounds.values().copied().collect());

    let site = scratch.write(
        "site-fast.toml",
        &gauge_line(&cable.agent_end, 9600, TANKS, 400),
    );
    // `check` says that a 400 ms poll cannot be kept on this line.
    let offline = crate::util::run(
        "leaktally-check-offline",
        Command::new(binary("leaktally"))
            .args(["check", "--offline", "--config"])
            .arg(&site),
        &scratch,
    );
    assert!(
        offline.stdout.contains(
            "a round takes at least 470 ms, longer than device gauge-01's poll_interval_ms = 400"
        ),
        "{}",
        offline.stdout
    );
    let samples = poll_live(&scratch, "poll-saturated", &site, 8);
    let mut starts: BTreeMap<&str, Vec<i64>> = BTreeMap::new();
    for s in samples.iter().filter(|s| s.good) {
        starts.entry(&s.tank).or_default().push(s.at_ms);
    }
    let spacing: Vec<i64> = starts
        .values()
        .flat_map(|at| at.windows(2).map(|w| w[1] - w[0]).collect::<Vec<_>>())
        .collect();
    let cycle = median(spacing);
    // The wire alone: a request (8 bytes) and a reply of 2 registers (9
    // bytes) of 11 bits at 9600 baud, plus t3.5 (4.01 ms), per gauge.
    let wire_ms = TANKS as f64 * (17.0 * 11.0 / 9600.0 * 1000.0 + 4.01);
    println!(
        "9600 baud, {TANKS} gauges on one port: a round of the line takes {cycle} ms (the wire and the silences alone: {wire_ms:.0} ms); polled every second, the last gauge's sample is out {round_1s} ms after the tick"
    );
    assert!(
        cycle as f64 >= wire_ms * 0.95,
        "a round of {cycle} ms is shorter than the wire allows ({wire_ms:.0} ms): requests overlapped"
    );
    assert!(
        cycle < 1000,
        "a round of {cycle} ms does not fit a 1 s poll"
    );
    // About 530 ms here; the bound leaves room for a loaded machine (the
    // rest of the suite beside it).
    assert!(
        round_1s < 1200,
        "the last gauge's sample out {round_1s} ms after the tick"
    );
}

/// A unit that stops answering on a shared line: while the demo site's
/// rtu-west is silent for 10 s, rtu-east on the same line is read every
/// second, never waiting more than rtu-west's request timeout (400 ms) on
/// top of its own exchanges; rtu-west's samples are flagged meanwhile and
/// good again after.
#[test]
fn a_silent_unit_does_not_stall_the_line_beyond_its_timeout() {
    let test = "a_silent_unit_does_not_stall_the_line_beyond_its_timeout";
    let scratch = Scratch::new("serial-silent");
    let Some(cable) = Cable::new(test, &scratch) else {
        return;
    };
    let sim_site = scratch.write("sim-site.toml", &serial_demo_site(&cable.sim_end, 19_200));
    let scenario = three_leaks_on(ScenarioBuilder::for_site(&sim_site))
        .link_drops(5.0, "rtu-west", 10.0)
        .write(&scratch);
    let _sim = start_serial_sim(&scratch, &scenario, &cable);
    let sim_started = now_ms();
    let site = scratch.write("site.toml", &serial_demo_site(&cable.agent_end, 19_200));
    let samples = poll_live(&scratch, "poll", &site, 22);

    let (drop_from, drop_to) = (sim_started + 5_000, sim_started + 15_000);
    let east: Vec<&Polled> = samples.iter().filter(|s| s.tank == "FF-T12").collect();
    let west: Vec<&Polled> = samples.iter().filter(|s| s.tank == "FF-T20").collect();
    assert!(east.iter().all(|s| s.good), "rtu-east lost a sample");
    let gaps: Vec<i64> = east.windows(2).map(|w| w[1].at_ms - w[0].at_ms).collect();
    assert!(
        gaps.iter().all(|&g| g <= 1300),
        "rtu-east missed a cycle: {gaps:?}"
    );
    // How long rtu-east's samples took to come out after their tick: while
    // rtu-west is silent (and retried), and while both answer (before the
    // drop, and once rtu-west's backoff has ended after it).
    let waited = |window: &dyn Fn(i64) -> bool| {
        east.iter()
            .filter(|s| window(s.at_ms))
            .map(|s| s.arrived_ms - s.at_ms)
            .max()
            .unwrap_or(0)
    };
    let during = waited(&|at| (drop_from..drop_to + 500).contains(&at));
    let before = waited(&|at| at < drop_from - 500 || at > drop_to + 4000);
    println!(
        "19200 baud, rtu-west silent for 10 s: rtu-east's samples out at most {during} ms after their tick while it was silent ({before} ms otherwise); rtu-west's timeout is 400 ms"
    );
    assert!(
        // The 400 ms timeout, and room for a loaded machine's scheduling.
        during <= before.max(50) + 400 + 250,
        "rtu-east waited {during} ms (otherwise {before} ms)"
    );
    let silent = west
        .iter()
        .filter(|s| (drop_from + 1500..drop_to - 500).contains(&s.at_ms))
        .collect::<Vec<_>>();
    assert!(
        !silent.is_empty() && silent.iter().all(|s| !s.good),
        "rtu-west's samples while silent should be flagged"
    );
    assert!(
        west.iter().any(|s| s.at_ms > drop_to + 1000 && s.good),
        "rtu-west was not read again after the drop"
    );
}
