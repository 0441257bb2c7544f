//! The responder page end to end (issue 6): the simulator, the daemon with
//! its web server and the operator CLI as real processes, the page loaded
//! in headless Debian chromium, and /metrics read by the Prometheus
//! project's own Python parser.
//!
//! The figures on the rendered page are checked against `leaktally status
//! --json` twice: live, where the two reads are a moment apart and the
//! total may have grown in between, and after the simulator is stopped,
//! when the latest estimate no longer changes and the two must agree to the
//! page's rounding. The screenshot is kept as target/test-artifacts/web.png.

use crate::python_env::{python, script, target_dir};
use crate::tracking::{event_id, event_of};
use crate::util::{
    Finished, LeakOpen, Scratch, demo_site, free_port, http, leaktally_ok, run, run_for,
    start_daemon, start_sim, wait_for, with_web,
};
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

/// Where Debian's chromium package puts the browser.
const CHROMIUM: &str = "/usr/bin/chromium";
/// How long one chromium run may take (a cold start is a few seconds).
const BROWSER_LIMIT: Duration = Duration::from_secs(90);
/// An operator note with markup in it: it must reach the browser as text.
const NOTE: &str = "<b>east bund</b> drains closed & foam requested";

/// The browser, or a failure that says how to get it.
fn chromium() -> PathBuf {
    let path = std::env::var_os("CHROMIUM").map_or_else(|| PathBuf::from(CHROMIUM), PathBuf::from);
    if path.is_file() {
        return path;
    }
    let how = if std::env::var_os("CI").is_some() {
        ".ci/run installs it before the tests; check that step's output"
    } else {
        "install Debian's package with `apt-get update && apt-get install -y chromium` (as root), \
         or set CHROMIUM to another chromium binary"
    };
    panic!(
        "the browser test needs chromium at {}, and it is not there; {how}",
        path.display()
    );
}

/// Runs headless chromium on `url` with `extra` arguments. The flags keep it
/// off the network (background services, updates, sync) and out of the
/// user's profile. It runs niced: a cold chromium start takes both cores
/// for a second or two, and the timing-sensitive tests that share the
/// machine (daemons polling at 1 Hz) should not wait for it.
fn browser(scratch: &Scratch, name: &str, extra: &[String], url: &str) -> Finished {
    let profile = scratch.path(&format!("chromium-profile-{name}"));
    let mut command = Command::new("nice");
    command
        .args(["-n", "10"])
        .arg(chromium())
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .args(extra)
        .arg(url);
    let done = run_for(name, &mut command, scratch, BROWSER_LIMIT);
    assert!(
        done.status.success(),
        "chromium {name} failed ({}):\n{}",
        done.status,
        done.stderr
    );
    done
}

/// The page as chromium rendered it (after its scripts ran at load).
fn dump_dom(scratch: &Scratch, name: &str, url: &str) -> String {
    let dom = browser(scratch, name, &["--dump-dom".into()], url).stdout;
    assert!(dom.contains("</html>"), "chromium returned no page:\n{dom}");
    dom
}

struct Cli<'a> {
    scratch: &'a Scratch,
    db: &'a Path,
}

impl Cli<'_> {
    fn ok(&self, args: &[&str]) -> String {
        leaktally_ok(self.scratch, self.db, args)
    }

    fn status(&self) -> Value {
        serde_json::from_str(&self.ok(&["status", "--json"])).expect("status --json is JSON")
    }
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

/// The text of the element marked `data-field="FIELD" data-event="ID"`, and
/// its `data-unit` when it has one.
fn field(dom: &str, name: &str, event: i64) -> (String, Option<String>) {
    let mark = format!(r#"data-field="{name}" data-event="{event}""#);
    let at = dom
        .find(&mark)
        .unwrap_or_else(|| panic!("no {mark} on the page"));
    let tag_end = at + dom[at..].find('>').expect("the tag ends");
    let attributes = &dom[at + mark.len()..tag_end];
    let unit = attributes
        .split_once(r#"data-unit=""#)
        .and_then(|(_, rest)| rest.split_once('"'))
        .map(|(unit, _)| unit.to_owned());
    let text_end = tag_end + dom[tag_end..].find('<').expect("the text ends");
    (dom[tag_end + 1..text_end].trim().to_owned(), unit)
}

/// A figure as displayed ("1,234", "0.0123") and the rounding it implies:
/// half a unit of its last digit, or of its third significant figure where
/// thousands are grouped into round numbers (report::grouped).
fn shown(text: &str) -> (f64, f64) {
    let plain = text.replace(',', "");
    let value: f64 = plain
        .parse()
        .unwrap_or_else(|_| panic!("{text:?} is not a number"));
    let half_unit = match plain.split_once('.') {
        Some((_, decimals)) => 0.5 * 10f64.powi(-(decimals.len() as i32)),
        None if value.abs() >= 10_000.0 => 0.5 * 10f64.powi(value.abs().log10().floor() as i32 - 2),
        None => 0.5,
    };
    (value, half_unit)
}

/// Asserts a displayed figure is `expected` to within its rounding, plus
/// `slack` (for figures read a moment apart).
fn assert_shown(what: &str, text: &str, expected: f64, slack: f64) {
    let (value, half_unit) = shown(text);
    assert!(
        (value - expected).abs() <= half_unit * 1.000_001 + slack,
        "{what}: the page shows {text:?}, status --json says {expected} (slack {slack})"
    );
}

/// A displayed rate in kg/s, from its number and unit.
fn rate_kg_s(text: &str, unit: Option<&str>) -> (f64, f64) {
    let (value, half) = shown(text);
    match unit {
        Some("kg/s") => (value, half),
        Some("kg/h") => (value / 3600.0, half / 3600.0),
        other => panic!("unexpected rate unit {other:?}"),
    }
}

/// The page's estimate time for an event, from its section's attribute.
fn estimate_at_ms(dom: &str, event: i64) -> i64 {
    let mark = format!(r#"id="event-{event}""#);
    let at = dom.find(&mark).expect("the event's section");
    let tag = &dom[at..at + dom[at..].find('>').expect("the tag ends")];
    tag.split_once(r#"data-estimate-at-ms=""#)
        .and_then(|(_, rest)| rest.split_once('"'))
        .and_then(|(ms, _)| ms.parse().ok())
        .unwrap_or_else(|| panic!("no estimate time in {tag}"))
}

/// Checks every headline figure of `event` on the page against `status`;
/// `elapsed_s` is how much later the status was read (0 when frozen).
fn check_figures(dom: &str, status: &Value, event: i64, elapsed_s: f64) {
    let e = event_of(status, event);
    let est = &e["estimate"];
    assert_eq!(field(dom, "tank", event).0, e["tank"].as_str().unwrap());
    assert_eq!(field(dom, "event", event).0, event.to_string());
    assert_eq!(field(dom, "since", event).0, e["start"].as_str().unwrap());
    // The band's ends follow the level's band, which moves with the level's
    // noise between two reads a moment apart (and so does the best figure
    // where it is the level's own).
    let noise = if elapsed_s > 0.0 {
        2.0 * num(&est["band"]["level_noise_kg"])
    } else {
        0.0
    };
    // What may have flowed between the two reads, at the band's top rate.
    let slack = num(&est["rate_high_kg_s"]) * elapsed_s + noise;
    let rho = num(&est["density_kg_m3"]);
    for (name, key) in [
        ("released-best-kg", "released_best_kg"),
        ("released-high-kg", "released_high_kg"),
    ] {
        assert_shown(name, &field(dom, name, event).0, num(&est[key]), slack);
    }
    assert_shown(
        "released-low-kg",
        &field(dom, "released-low-kg", event).0,
        num(&est["released_low_kg"]),
        slack,
    );
    let volume = &e["released_volume"];
    assert_shown(
        "released-best-m3",
        &field(dom, "released-best-m3", event).0,
        num(&volume["m3"]),
        slack / rho,
    );
    assert_shown(
        "released-best-l",
        &field(dom, "released-best-l", event).0,
        num(&volume["litres"]),
        1000.0 * slack / rho,
    );
    let (text, unit) = field(dom, "rate-best", event);
    let (rate, half) = rate_kg_s(&text, unit.as_deref());
    let expected = num(&est["rate_best_kg_s"]);
    // The rate falls as the tank drains: a few per cent in a few seconds.
    let rate_slack = if elapsed_s > 0.0 {
        0.05 * expected
    } else {
        0.0
    };
    assert!(
        (rate - expected).abs() <= half * 1.000_001 + rate_slack,
        "rate: the page shows {text} {unit:?}, status --json {expected} kg/s"
    );
    let crossed_json = est["crossings"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|c| !c["at_ms"].is_null())
        .count();
    let crossed_page = dom
        .matches(&format!(r#"data-field="reportable" data-event="{event}""#))
        .count();
    assert_eq!(
        crossed_page,
        est["crossings"].as_array().unwrap().len(),
        "one line per reportable quantity"
    );
    if elapsed_s == 0.0 {
        let crossed_on_page = dom.matches("data-crossed-at-ms=").count();
        assert_eq!(crossed_on_page, crossed_json, "crossings");
        assert_eq!(
            field(dom, "samples-used", event).0,
            est["quality"]["samples_used"].to_string()
        );
        let forecast = &est["forecast"];
        if !forecast.is_null() {
            assert_shown(
                "forecast-total-kg",
                &field(dom, "forecast-total-kg", event).0,
                num(&forecast["total_at_stop_kg"]),
                0.0,
            );
        }
    }
}

/// The value of the sample called `name` with all of `labels`.
fn sample(metrics: &Value, name: &str, labels: &[(&str, &str)]) -> f64 {
    let families = metrics["families"].as_object().expect("families");
    for family in families.values() {
        for s in family["samples"].as_array().unwrap() {
            let matches = s["name"] == name
                && labels
                    .iter()
                    .all(|(k, v)| s["labels"][*k].as_str() == Some(*v));
            if matches {
                return num(&s["value"]);
            }
        }
    }
    panic!("no sample {name} {labels:?} in the metrics");
}

fn family_type<'a>(metrics: &'a Value, name: &str) -> &'a str {
    metrics["families"][name]["type"]
        .as_str()
        .unwrap_or_else(|| panic!("no family {name}"))
}

#[test]
fn the_page_in_chromium_matches_status_json_and_metrics_parse() {
    let started = Instant::now();
    chromium();
    let scratch = Scratch::new("web");
    // FF-T12 leaking from 1 s into the run, the other tanks steady, 1 mm of
    // level noise: the acquisition tests' scenario.
    let scenario = crate::acquisition::one_leak(0.001).write(&scratch);
    let (sim, address) = start_sim(&scratch, &scenario, "127.0.0.1:0");
    let web = format!("127.0.0.1:{}", free_port());
    let site = scratch.write("site.toml", &with_web(&demo_site(&address), &web));
    let db = scratch.path("leaktally.db");
    let daemon = start_daemon(&scratch, "daemon", &site, &db);
    let cli = Cli {
        scratch: &scratch,
        db: &db,
    };
    wait_for("the web server", Duration::from_secs(10), || {
        http(&web, "GET", "/api/status").is_ok_and(|r| r.status == 200)
    });
    let url = format!("http://{web}/");

    let reply = cli.ok(&LeakOpen::tank("FF-T12")
        .hole(40.0, 0.3, 0.61)
        .note(NOTE)
        .args());
    let id = event_id(&reply);
    // About 20 s of the leak on record.
    wait_for(
        "20 samples in the estimate",
        Duration::from_secs(60),
        || {
            let status = cli.status();
            status["events"].as_array().is_some_and(|events| {
                events.iter().any(|e| {
                    e["event"] == id
                        && e["estimate"]["quality"]["samples_used"].as_u64() >= Some(20)
                })
            })
        },
    );

    // The screenshot, kept for people to look at.
    let artifacts = target_dir().join("test-artifacts");
    std::fs::create_dir_all(&artifacts).expect("creating target/test-artifacts");
    let shot = artifacts.join("web.png");
    let _ = std::fs::remove_file(&shot);
    browser(
        &scratch,
        "screenshot",
        &[
            format!("--screenshot={}", shot.display()),
            "--window-size=1200,1600".into(),
        ],
        &url,
    );
    let png = std::fs::read(&shot).expect("chromium wrote the screenshot");
    assert!(png.starts_with(b"\x89PNG\r\n\x1a\n") && png.len() > 20_000);
    println!("screenshot: {} ({} KB)", shot.display(), png.len() / 1024);

    // Live: the page first, then status a moment later.
    let dom = dump_dom(&scratch, "live", &url);
    let page_at = estimate_at_ms(&dom, id);
    let status = cli.status();
    let status_at = event_of(&status, id)["estimate"]["at_ms"].as_i64().unwrap();
    assert!(
        page_at <= status_at,
        "the page cannot be ahead of the database"
    );
    check_figures(&dom, &status, id, (status_at - page_at) as f64 / 1000.0);
    // The note reached the browser as text, not as markup.
    assert!(
        dom.contains("&lt;b&gt;east bund&lt;/b&gt; drains closed &amp; foam requested"),
        "the note, escaped"
    );
    assert!(!dom.contains("<b>east bund</b>"), "markup from a note");
    assert!(dom.contains("not measurements"), "the caution");

    // Frozen: without the simulator no new sample is good, so the latest
    // estimate stays, and page and status must agree to the rounding.
    drop(sim);
    let mut last = -1;
    wait_for("the estimates to stop", Duration::from_secs(20), || {
        let at = event_of(&cli.status(), id)["estimate"]["at_ms"]
            .as_i64()
            .unwrap();
        let settled = at == last;
        last = at;
        if !settled {
            std::thread::sleep(Duration::from_millis(2500));
        }
        settled
    });
    let frozen = cli.status();
    let dom = dump_dom(&scratch, "frozen", &url);
    assert_eq!(
        estimate_at_ms(&dom, id),
        event_of(&frozen, id)["estimate"]["at_ms"].as_i64().unwrap(),
        "the page shows the same estimate"
    );
    check_figures(&dom, &frozen, id, 0.0);

    // The JSON endpoints carry the same document.
    let api = http(&web, "GET", "/api/status").unwrap();
    assert_eq!(api.status, 200);
    assert_eq!(api.header("content-type"), Some("application/json"));
    let api: Value = serde_json::from_str(&api.body).unwrap();
    assert_eq!(
        event_of(&api, id)["estimate"],
        event_of(&frozen, id)["estimate"]
    );
    let one: Value = serde_json::from_str(
        &http(&web, "GET", &format!("/api/events/{id}"))
            .unwrap()
            .body,
    )
    .unwrap();
    assert_eq!(
        event_of(&one, id)["estimate"],
        event_of(&frozen, id)["estimate"]
    );
    let series: Value = serde_json::from_str(
        &http(&web, "GET", &format!("/api/events/{id}/series"))
            .unwrap()
            .body,
    )
    .unwrap();
    let points = series["points"].as_array().unwrap();
    assert!(
        points.len() >= 20 && points.len() <= 500,
        "{} points",
        points.len()
    );
    assert_eq!(
        points.last().unwrap()["best_kg"],
        event_of(&frozen, id)["estimate"]["released_best_kg"]
    );

    // Metrics, parsed by prometheus-client.
    let metrics = http(&web, "GET", "/metrics").unwrap();
    assert_eq!(metrics.status, 200);
    let content_type = metrics.header("content-type").unwrap_or("");
    assert!(
        content_type.starts_with("text/plain; version=0.0.4"),
        "{content_type}"
    );
    let text = scratch.write("metrics.txt", &metrics.body);
    let mut parse = Command::new(python());
    parse.arg(script("metrics_check.py")).arg(&text);
    let parsed = run("metrics_check", &mut parse, &scratch);
    assert!(
        parsed.status.success(),
        "prometheus-client refused /metrics: {}\n{}",
        parsed.stderr,
        metrics.body
    );
    let parsed: Value = serde_json::from_str(&parsed.stdout).unwrap();
    assert_eq!(parsed["version"], "0.26.0");
    assert_eq!(sample(&parsed, "leaktally_up", &[]), 1.0);
    let east = [("device", "rtu-east")];
    assert!(sample(&parsed, "leaktally_poll_successes_total", &east) >= 20.0);
    assert!(
        sample(&parsed, "leaktally_poll_failures_total", &east) >= 1.0,
        "the simulator is gone"
    );
    assert_eq!(
        family_type(&parsed, "leaktally_poll_duration_seconds"),
        "histogram"
    );
    assert!(sample(&parsed, "leaktally_poll_duration_seconds_count", &east) >= 20.0);
    let est = &event_of(&frozen, id)["estimate"];
    let level = sample(
        &parsed,
        "leaktally_tank_level_meters",
        &[("tank", "FF-T12")],
    );
    assert!((level - num(&est["level_m"])).abs() < 1e-9, "level {level}");
    sample(
        &parsed,
        "leaktally_tank_pressure_pascals",
        &[("tank", "FF-T14"), ("reference", "gauge")],
    );
    let event = id.to_string();
    for (which, key) in [
        ("best", "released_best_kg"),
        ("low", "released_low_kg"),
        ("high", "released_high_kg"),
    ] {
        let v = sample(
            &parsed,
            "leaktally_event_released_kilograms",
            &[("event", &event), ("tank", "FF-T12"), ("estimate", which)],
        );
        assert_eq!(v, num(&est[key]), "{which}");
    }
    let rate = sample(
        &parsed,
        "leaktally_event_rate_kilograms_per_second",
        &[("event", &event), ("estimate", "best")],
    );
    assert_eq!(rate, num(&est["rate_best_kg_s"]));
    // Both ends of each reportable quantity's crossing (issue 14): the
    // band's high end crosses no later than the best figure, and the
    // metrics say each as the JSON does.
    let crossings = est["crossings"].as_array().expect("crossings");
    assert!(!crossings.is_empty());
    for c in crossings {
        let q = c["quantity_kg"].as_f64().unwrap();
        let labels = |which| {
            [
                ("event", event.clone()),
                ("tank", "FF-T12".to_owned()),
                ("quantity_kg", format!("{q}")),
                ("estimate", which),
            ]
        };
        for (which, key) in [("best", "at_ms"), ("high", "high_at_ms")] {
            let l = labels(which.to_owned());
            let l: Vec<(&str, &str)> = l.iter().map(|(k, v)| (*k, v.as_str())).collect();
            let crossed = sample(&parsed, "leaktally_event_reportable_crossed", &l);
            assert_eq!(
                crossed,
                if c[key].is_null() { 0.0 } else { 1.0 },
                "{which} {c}"
            );
            if let Some(at) = c[key].as_i64() {
                let t = sample(
                    &parsed,
                    "leaktally_event_reportable_crossed_timestamp_seconds",
                    &l,
                );
                assert!((t - at as f64 / 1000.0).abs() < 1e-6, "{which} {c}");
            }
        }
        if let (Some(high), Some(best)) = (c["high_at_ms"].as_i64(), c["at_ms"].as_i64()) {
            assert!(high <= best, "{c}");
        }
    }

    // Read-only: other methods are refused, unknown paths are not there.
    for (method, path) in [
        ("POST", "/".to_owned()),
        ("PUT", "/api/status".to_owned()),
        ("DELETE", format!("/api/events/{id}")),
    ] {
        let r = http(&web, method, &path).unwrap();
        assert_eq!(r.status, 405, "{method} {path}");
        assert_eq!(r.header("allow"), Some("GET, HEAD"));
    }
    assert_eq!(http(&web, "GET", "/no/such/page").unwrap().status, 404);
    assert_eq!(
        event_of(&cli.status(), id)["state"],
        "open",
        "nothing changed"
    );

    drop(daemon);
    println!("web test: {:.1} s", started.elapsed().as_secs_f64());
}
