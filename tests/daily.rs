//! Daily use end to end (issue 16): a site whose config names its database
//! and time zone, found through LEAKTALLY_CONFIG alone, so the operator's
//! commands carry no --config or --db; the event history; closed events in
//! `status`; the exit codes; completions and the man page.

use crate::tracking::three_leaks;
use crate::util::{Finished, Scratch, Server, binary, demo_site, run, start_sim, wait_for};
use serde_json::Value;
use std::path::Path;
use std::process::Command;
use std::time::Duration;

/// `leaktally ARGS` with the site found only through LEAKTALLY_CONFIG.
fn site_cli(scratch: &Scratch, site: &Path, args: &[&str]) -> Finished {
    let mut cmd = Command::new(binary("leaktally"));
    cmd.args(args)
        .env("LEAKTALLY_CONFIG", site)
        .env_remove("LEAKTALLY_DB");
    run("leaktally", &mut cmd, scratch)
}

fn json_of(done: &Finished, what: &str) -> Value {
    serde_json::from_str(&done.stdout)
        .unwrap_or_else(|e| panic!("{what}: not JSON ({e}):\n{}\n{}", done.stdout, done.stderr))
}

#[test]
fn an_operator_needs_no_paths_and_closed_events_keep_their_final_figures() {
    let scratch = Scratch::new("daily");
    let (sim, address) = start_sim(&scratch, &three_leaks().write(&scratch), "127.0.0.1:0");
    // The database is named relative to the config's folder.
    let site = scratch.write(
        "site.toml",
        &demo_site(&address).replace(
            "time_zone = \"local\"\n",
            "database = \"records/site.db\"\ntime_zone = \"Europe/Oslo\"\n",
        ),
    );
    std::fs::create_dir_all(scratch.path("records")).unwrap();
    let db = scratch.path("records/site.db");
    let mut daemon = Server::start(
        "leaktally run",
        Command::new(binary("leaktally"))
            .arg("run")
            .env("LEAKTALLY_CONFIG", &site)
            .env_remove("LEAKTALLY_DB"),
        scratch.path("daemon.stderr"),
    );
    wait_for("the daemon's heartbeat", Duration::from_secs(15), || {
        leaktally::store::open_read_only(&db)
            .ok()
            .and_then(|c| leaktally::store::heartbeat(&c).ok().flatten())
            .is_some()
    });

    let opened = site_cli(
        &scratch,
        &site,
        &[
            "leak",
            "open",
            "--tank",
            "FF-T12",
            "--hole-diameter-mm",
            "40",
            "--hole-height-m",
            "0.3",
            "--cd",
            "0.61",
            "--since",
            "1m",
            "--json",
        ],
    );
    assert!(opened.status.success(), "{}", opened.stderr);
    let ack = json_of(&opened, "leak open --json");
    assert_eq!(ack["format"], 1);
    assert_eq!(ack["request"], "open");
    let event = ack["event"].as_i64().expect("the event's id");

    wait_for("a first estimate", Duration::from_secs(20), || {
        let done = site_cli(&scratch, &site, &["status", "--json"]);
        json_of(&done, "status --json")["events"][0]["estimate"].is_object()
    });
    std::thread::sleep(Duration::from_secs(3));
    let closed = site_cli(&scratch, &site, &["leak", "close", &event.to_string()]);
    assert!(closed.status.success(), "{}", closed.stderr);

    // The history: the closed event with its final total and band.
    let listed = site_cli(&scratch, &site, &["events", "--json"]);
    assert_eq!(listed.status.code(), Some(0), "{}", listed.stderr);
    let history = json_of(&listed, "events --json");
    assert_eq!(history["format"], 1);
    assert_eq!(history["time_zone"], "Europe/Oslo");
    let e = &history["events"][0];
    assert_eq!(
        (e["event"].as_i64(), e["state"].as_str()),
        (Some(event), Some("closed"))
    );
    let (low, best, high) = (
        e["released_low_kg"].as_f64().unwrap(),
        e["released_best_kg"].as_f64().unwrap(),
        e["released_high_kg"].as_f64().unwrap(),
    );
    assert!(0.0 < low && low <= best && best <= high, "{e}");
    // Machine times are RFC 3339 in UTC.
    for field in ["start", "end", "last_sample"] {
        let text = e[field].as_str().unwrap();
        assert!(text.ends_with('Z') && text.contains('T'), "{field}: {text}");
        text.parse::<jiff::Timestamp>().unwrap();
    }

    // `status EVENT` shows a closed event, with the same final total.
    let one = site_cli(&scratch, &site, &["status", &event.to_string(), "--json"]);
    let doc = json_of(&one, "status EVENT --json");
    assert_eq!(doc["format"], 2);
    assert_eq!(doc["events"][0]["state"], "closed");
    assert_eq!(
        doc["events"][0]["estimate"]["released_best_kg"].as_f64(),
        Some(best)
    );

    // People read the site's zone, with its offset.
    let table = site_cli(&scratch, &site, &["events", "--closed"]);
    assert!(
        table.stdout.contains("times below in Europe/Oslo"),
        "{}",
        table.stdout
    );
    let text = site_cli(&scratch, &site, &["status", &event.to_string()]);
    assert!(
        text.stdout.contains("(UTC+01:00)") || text.stdout.contains("(UTC+02:00)"),
        "{}",
        text.stdout
    );
    assert!(text.stdout.contains(leaktally::report::CAUTION));

    // Exit codes (README, "Exit codes").
    let bad = site_cli(&scratch, &site, &["events", "--no-such-option"]);
    assert_eq!(bad.status.code(), Some(2), "usage: {}", bad.stderr);
    // A tank's id where an event's belongs: what an event id is, and where.
    let tank_for_event = site_cli(&scratch, &site, &["leak", "close", "FF-T12"]);
    assert_eq!(tank_for_event.status.code(), Some(2));
    assert!(
        tank_for_event
            .stderr
            .contains("`leaktally events` lists them"),
        "{}",
        tank_for_event.stderr
    );
    let missing = site_cli(&scratch, &site, &["status", "999"]);
    assert_eq!(missing.status.code(), Some(1));
    assert!(
        missing
            .stderr
            .contains("`leaktally events` lists every event"),
        "{}",
        missing.stderr
    );

    // Stopped as systemd stops it (SIGTERM): it says it stopped at once.
    daemon.stop_cleanly();
    let no_daemon = site_cli(&scratch, &site, &["status"]);
    assert_eq!(no_daemon.status.code(), Some(4), "{}", no_daemon.stderr);
    assert!(
        no_daemon.stdout.contains("no daemon is running"),
        "{}",
        no_daemon.stdout
    );
    let refused = site_cli(
        &scratch,
        &site,
        &["leak", "note", &event.to_string(), "late"],
    );
    assert_eq!(refused.status.code(), Some(4), "{}", refused.stderr);

    // A device that does not answer: the config is valid, so 3, not 1.
    drop(sim);
    let check = site_cli(&scratch, &site, &["check"]);
    assert_eq!(
        check.status.code(),
        Some(3),
        "{}\n{}",
        check.stdout,
        check.stderr
    );

    // No config anywhere: said, with how to name one.
    let mut bare = Command::new(binary("leaktally"));
    bare.args(["events"])
        .env_remove("LEAKTALLY_CONFIG")
        .env_remove("LEAKTALLY_DB");
    let bare = run("leaktally", &mut bare, &scratch);
    if !Path::new("/etc/leaktally/site.toml").exists() {
        assert_eq!(bare.status.code(), Some(1));
        assert!(bare.stderr.contains("LEAKTALLY_DB"), "{}", bare.stderr);
    }
}

#[test]
fn completions_and_the_man_page_come_from_the_command_line() {
    let scratch = Scratch::new("docs");
    let mut cmd = Command::new(binary("leaktally"));
    cmd.args(["completions", "bash"]);
    let bash = run("leaktally", &mut cmd, &scratch);
    assert!(bash.status.success(), "{}", bash.stderr);
    for word in ["_leaktally", "events", "--hole-diameter-mm"] {
        assert!(
            bash.stdout.contains(word),
            "{word} not in the bash completions"
        );
    }
    // A reader that goes away (`| head`): the report ends quietly, as
    // other Unix tools do, without a panic or an error line.
    let mut early = Command::new(binary("leaktally"))
        .args(["completions", "bash"])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    drop(early.stdout.take());
    let ended = early.wait_with_output().unwrap();
    assert!(
        ended.stderr.is_empty(),
        "{}",
        String::from_utf8_lossy(&ended.stderr)
    );

    let mut cmd = Command::new(binary("leaktally"));
    cmd.args(["manual", "--dir"]).arg(scratch.path("man"));
    let man = run("leaktally", &mut cmd, &scratch);
    assert!(man.status.success(), "{}", man.stderr);
    let page = std::fs::read_to_string(scratch.path("man/leaktally-events.1")).unwrap();
    assert!(page.starts_with(".ie") || page.contains(".TH"), "{page}");
    assert!(page.contains("LEAKTALLY_DB"), "{page}");
}
