//! What a long-running site meets, end to end with real processes: a wall
//! clock stepped back and forward under the daemon (Debian's `faketime`,
//! reading its offset from a file the test rewrites), a database file
//! damaged on disk, and an operator's request made just as the daemon was
//! killed. Totals are checked against the simulator's ground truth (its
//! physics is checked against the analytic Torricelli solution in
//! sim/src/physics.rs).

use crate::tracking::{Plant, event_id, event_of, rel};
use crate::util::{LeakOpen, Scratch, Server, binary, now_ms, run, skipped, wait_for};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

/// libfaketime's multi-threaded library (the daemon runs threads), where
/// Debian's `faketime` package puts it.
fn faketime_library() -> Option<PathBuf> {
    [
        "/usr/lib/x86_64-linux-gnu/faketime/libfaketimeMT.so.1",
        "/usr/lib/aarch64-linux-gnu/faketime/libfaketimeMT.so.1",
        "/usr/lib/faketime/libfaketimeMT.so.1",
    ]
    .iter()
    .map(PathBuf::from)
    .find(|p| p.exists())
}

/// A command whose wall clock is offset by what `offset_file` says
/// (`+0`, `-1h`); the monotonic clock stays true, as an NTP step leaves it.
fn faked(command: &mut Command, library: &Path, offset_file: &Path) {
    command
        .env("LD_PRELOAD", library)
        .env("FAKETIME_TIMESTAMP_FILE", offset_file)
        .env("FAKETIME_DONT_FAKE_MONOTONIC", "1")
        // Re-read the file every second, not every 10 s.
        .env("FAKETIME_CACHE_DURATION", "1");
}

/// The wall clock steps back one hour and then forward one hour in the
/// middle of an event, under the running daemon and the CLI: the daemon
/// sees and records both steps, an operator's note during the stepped hour
/// goes through, every sample is stored in order with no gap, no gap is
/// bridged, and the total matches the simulator's truth (which runs on the
/// true clock) as if nothing had happened.
#[test]
fn a_wall_clock_stepped_back_and_forward_mid_event_changes_nothing() {
    let Some(library) = faketime_library() else {
        // .ci/run installs faketime and sets this, so CI cannot skip.
        assert!(
            std::env::var_os("LEAKTALLY_REQUIRE_FAKETIME").is_none(),
            "the clock-step test needs Debian's faketime (apt-get install faketime)"
        );
        skipped(
            "the clock-step test",
            "it needs Debian's faketime (apt-get install faketime)",
        );
        return;
    };
    let plant = Plant::start("clock-steps");
    let offset = plant.scratch.write("faketime.rc", "+0\n");
    let mut command = Command::new(binary("leaktally"));
    command
        .arg("run")
        .arg("--config")
        .arg(&plant.site)
        .arg("--db")
        .arg(&plant.db);
    faked(&mut command, &library, &offset);
    let mut daemon = Server::start(
        "leaktally run (faked clock)",
        &mut command,
        plant.scratch.path("daemon.stderr"),
    );
    wait_for("the daemon's heartbeat", Duration::from_secs(10), || {
        leaktally::store::open_read_only(&plant.db)
            .ok()
            .and_then(|c| leaktally::store::heartbeat(&c).ok().flatten())
            .is_some()
    });
    let cli = |args: &[&str]| {
        let mut command = Command::new(binary("leaktally"));
        command.args(args).arg("--db").arg(&plant.db);
        faked(&mut command, &library, &offset);
        run("leaktally", &mut command, &plant.scratch)
    };
    plant.wait_until(3.0);
    let since = plant.leak_start("FF-T12");
    let opened = cli(&LeakOpen::tank("FF-T12")
        .hole(40.0, 0.3, 0.61)
        .since(&since)
        .args());
    assert!(opened.status.success(), "{}", opened.stderr);
    let id = event_id(&opened.stdout);

    plant.wait_until(12.0);
    std::fs::write(&offset, "-1h\n").unwrap();
    plant.wait_until(18.0);
    let note = cli(&["leak", "note", &id.to_string(), "an hour back"]);
    assert!(
        note.status.success(),
        "a note while the clock is an hour back: {}",
        note.stderr
    );
    plant.wait_until(26.0);
    std::fs::write(&offset, "+0\n").unwrap();
    plant.wait_until(42.0);

    let status = cli(&["status", &id.to_string(), "--json"]);
    assert!(status.status.success(), "{}", status.stderr);
    let status: serde_json::Value = serde_json::from_str(&status.stdout).unwrap();
    let est = &event_of(&status, id)["estimate"];
    let (at, best) = (
        est["at_ms"].as_i64().unwrap(),
        est["released_best_kg"].as_f64().unwrap(),
    );
    let exact = plant.truth().at("FF-T12", at).released_kg;
    let conn = leaktally::store::open_read_only(&plant.db).unwrap();
    let samples = leaktally::store::samples_between(&conn, "FF-T12", 0, i64::MAX).unwrap();
    let longest = samples
        .windows(2)
        .map(|w| w[1].at_ms - w[0].at_ms)
        .max()
        .unwrap();
    let steps = leaktally::store::clock_steps(&conn).unwrap();
    println!(
        "clock stepped -1 h and +1 h mid-event: {best:.1} kg vs truth {exact:.1} kg ({:.3} %), {} samples, longest gap {longest} ms, steps {steps:?}",
        100.0 * rel(best, exact),
        samples.len()
    );
    assert!(
        samples.windows(2).all(|w| w[0].at_ms < w[1].at_ms),
        "stored out of order"
    );
    assert!(longest < 2500, "a gap of {longest} ms in the samples");
    // The samples' times stayed on the true clock: the last is about now.
    assert!((samples.last().unwrap().at_ms - now_ms()).abs() < 5000);
    let walls: Vec<&leaktally::store::ClockStepRow> =
        steps.iter().filter(|s| s.kind == "wall_step").collect();
    assert_eq!(walls.len(), 2, "{steps:?}");
    assert!((walls[0].step_ms + 3_600_000).abs() < 2_000, "{steps:?}");
    assert!((walls[1].step_ms - 3_600_000).abs() < 2_000, "{steps:?}");
    assert_eq!(est["quality"]["gaps_bridged"], 0, "{est}");
    assert!(rel(best, exact) < 0.02, "{best} vs {exact}");

    let log = daemon.stop_cleanly();
    assert!(log.contains("the wall clock stepped back by 1 h"), "{log}");
    assert!(
        log.contains("the wall clock stepped forward by 1 h"),
        "{log}"
    );
}

/// A request made in the seconds after the daemon was killed (its
/// heartbeat still fresh) is recorded; the CLI says, once the heartbeat
/// goes stale, that it will be applied with the time it was made; the next
/// daemon applies it so, and the total counts the release from the request
/// on, the outage bridged and marked.
#[test]
fn a_request_made_as_the_daemon_dies_is_applied_with_its_time() {
    let plant = Plant::start("queued");
    let mut daemon = plant.daemon("daemon-1");
    plant.wait_until(6.0);
    daemon.child.kill().expect("SIGKILL the daemon");
    let _ = daemon.child.wait();
    let asked = now_ms();
    let began = Instant::now();
    let open = plant.cli(&LeakOpen::tank("FF-T12").hole(40.0, 0.3, 0.61).args());
    let waited = began.elapsed();
    // Recorded but not acknowledged: exit code 5 (README, "Exit codes").
    assert_eq!(open.status.code(), Some(5), "{}", open.stdout);
    assert!(
        open.stderr
            .contains("the daemon stopped before it took request")
            && open.stderr.contains("with the time it was made"),
        "{}",
        open.stderr
    );
    assert!(waited < Duration::from_secs(8), "the CLI waited {waited:?}");
    println!("the CLI saw the dead daemon after {waited:?}");

    plant.wait_until(20.0);
    let mut daemon = plant.daemon("daemon-2");
    plant.wait_until(50.0);
    let status = plant.status(None);
    let event = &status["events"][0];
    let id = event["event"].as_i64().unwrap();
    let start = event["start_ms"].as_i64().unwrap();
    assert!(
        (start - asked).abs() < 1000,
        "the event starts at {start}, the request was made at {asked}"
    );
    let est = &event_of(&status, id)["estimate"];
    let (at, best) = (
        est["at_ms"].as_i64().unwrap(),
        est["released_best_kg"].as_f64().unwrap(),
    );
    let truth = plant.truth();
    let exact = truth.at("FF-T12", at).released_kg - truth.at("FF-T12", start).released_kg;
    println!(
        "open requested as the daemon died, applied by the next daemon from {} ms after the request: {best:.1} kg vs truth {exact:.1} kg ({:.3} %), quality {}",
        start - asked,
        100.0 * rel(best, exact),
        est["quality"]
    );
    assert!(
        est["quality"]["gaps_bridged"].as_u64().unwrap() >= 1,
        "{est}"
    );
    assert!(rel(best, exact) < 0.02, "{best} vs {exact}");
    let log = std::fs::read_to_string(plant.scratch.path("daemon-2.stderr")).unwrap();
    assert!(log.contains("with the time of the request"), "{log}");
    let _ = daemon.child.kill();
}

/// A site of one tank on a device nobody answers for.
fn lonely_site(scratch: &Scratch) -> PathBuf {
    scratch.write(
        "site.toml",
        r#"[site]
name = "Damaged-file test (invented)"
[[device]]
id = "d1"
address = "127.0.0.1:1"
[[tank]]
id = "FF-T12"
device = "d1"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0 }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }
"#,
    )
}

/// A database damaged on disk (a few pages in its middle overwritten) is
/// refused by the daemon before it writes anything, with the way out, and
/// by `leak`; the file is left exactly as it was.
#[test]
fn a_damaged_database_is_refused_and_left_untouched() {
    use leaktally::acquire::sample::{Reading, TankSample};
    let scratch = Scratch::new("damaged");
    let site = lonely_site(&scratch);
    let db = scratch.path("site.db");
    {
        let conn = leaktally::store::open_read_write(&db).unwrap();
        leaktally::store::register_tanks(&conn, ["FF-T12"]).unwrap();
        let start = now_ms() - 3_600_000;
        let samples: Vec<TankSample> = (0..20_000)
            .map(|i| TankSample {
                tank: 0,
                tank_id: "FF-T12".into(),
                at_ms: start + 100 * i,
                level: Reading::good(4.0 - 1e-5 * i as f64),
                pressure: None,
                transfer: None,
                temperature: None,
                leak_flag: None,
            })
            .collect();
        leaktally::store::insert_samples(&conn, &samples).unwrap();
        let params = leaktally::estimate::LeakParams {
            hole_diameter_m: Some(0.02),
            hole_height_m: 0.3,
            cd: 0.61,
            density_kg_m3: None,
            ..leaktally::estimate::LeakParams::default()
        };
        leaktally::store::create_event(&conn, "FF-T12", start, start, "operator", &params).unwrap();
        leaktally::store::beat(&conn, 1, start, "site.toml").unwrap();
        leaktally::store::mark_stopped(&conn).unwrap();
    }
    // Closing the last connection folded the WAL into the file.
    let mut bytes = std::fs::read(&db).unwrap();
    let pages = bytes.len() / 4096;
    assert!(pages > 40, "{pages} pages");
    for page in [pages / 2, pages / 2 + 1, pages / 3] {
        bytes[page * 4096..(page + 1) * 4096].fill(0xA5);
    }
    std::fs::write(&db, &bytes).unwrap();

    let mut command = Command::new(binary("leaktally"));
    command
        .arg("run")
        .arg("--config")
        .arg(&site)
        .arg("--db")
        .arg(&db);
    let started = run("leaktally run", &mut command, &scratch);
    assert!(
        !started.status.success(),
        "the daemon ran on a damaged file"
    );
    assert!(
        started.stderr.contains("is damaged")
            && started.stderr.contains("will not write to it")
            && started.stderr.contains("A damaged database"),
        "{}",
        started.stderr
    );
    assert_eq!(
        std::fs::read(&db).unwrap(),
        bytes,
        "the damaged file was written to"
    );

    let leak = crate::util::leaktally(&scratch, &db, &LeakOpen::tank("FF-T12").args());
    assert!(!leak.status.success());
    assert!(
        leak.stderr.contains("is damaged") && leak.stderr.contains("A damaged database"),
        "{}",
        leak.stderr
    );
    assert_eq!(
        std::fs::read(&db).unwrap(),
        bytes,
        "the CLI wrote to the damaged file"
    );
    println!("the daemon's refusal: {}", started.stderr.trim());
}
