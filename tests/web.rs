//! The responder page end to end (issue 6): the simulator, the daemon with
//! its web server and the operator CLI as real processes, the page loaded
//! in headless Debian chromium, and /metrics read by the Prometheus
//! project's own Python parser.
//!
//! The figures on the rendered page are checked against `leaktally status
//! --json` twice: live, where the two reads are a moment apart and the
//! total may have grown in between, and after the simulator is stopped,
//! when the latest estimate no longer changes and the two must agree to the
//! page's rounding. The screenshots are kept as
//! target/test-artifacts/web.png (desktop) and web-phone.png.
//!
//! The layout is measured at a phone's size (390 by 844 CSS px) and a
//! desk's (1280 by 800): the released total, the rate, the forecast and the
//! reportable quantities must all be above the fold, the caution said once,
//! and the chart's labels large enough to read. The page's policy refuses
//! inline scripts, so the measuring is done on a copy of the served page in
//! a file, with the served style sheet inlined and a small script that
//! writes what it measured into the DOM for `--dump-dom`.
//!
//! Without chromium the test says SKIPPED (on standard error, which the
//! test runner does not capture) and passes, unless
//! LEAKTALLY_REQUIRE_BROWSER=1 is set, as `.ci/run` does where it installed
//! chromium: then a missing browser fails the test.

use crate::python_env::{python, script, target_dir};
use crate::tracking::{event_id, event_of};
use crate::util::{
    Finished, LeakOpen, Scratch, demo_site, free_port, http, leaktally_ok, run, run_for,
    start_daemon, start_sim, wait_for, with_web,
};
use leaktally::model::{Density, Mass};
use leaktally::report::Presentation;
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

/// The browser's path: `CHROMIUM`, or Debian's.
fn chromium_path() -> PathBuf {
    std::env::var_os("CHROMIUM").map_or_else(|| PathBuf::from(CHROMIUM), PathBuf::from)
}

/// The browser; `None` (after saying SKIPPED where the test runner shows
/// it) when it is missing and LEAKTALLY_REQUIRE_BROWSER is not set; a
/// failure that says how to get it when it is missing and required.
fn chromium() -> Option<PathBuf> {
    let path = chromium_path();
    if path.is_file() {
        return Some(path);
    }
    let how = "install Debian's package with `apt-get update && apt-get install -y chromium` \
         (as root; `bash .ci/run` does it), or set CHROMIUM to another chromium binary";
    if std::env::var("LEAKTALLY_REQUIRE_BROWSER").is_ok_and(|v| v == "1") {
        panic!(
            "the browser test needs chromium at {}, and it is not there \
             (LEAKTALLY_REQUIRE_BROWSER=1 says it must run); {how}",
            path.display()
        );
    }
    crate::util::skipped(
        "the browser test (tests/web.rs)",
        &format!("it needs chromium at {}; {how}", path.display()),
    );
    None
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
        .arg(chromium_path())
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

/// A displayed rate in kg/s, from its number and unit (always per second:
/// one unit for a rate, whatever its size).
fn rate_kg_s(text: &str, unit: Option<&str>) -> (f64, f64) {
    let (value, half) = shown(text);
    match unit {
        Some("kg/s") => (value, half),
        other => panic!("unexpected rate unit {other:?}"),
    }
}

/// What the measuring script found on the page at one window size.
struct Layout {
    width: f64,
    /// The bottom of each headline tile (released, rate, forecast,
    /// reportable) of the first event, CSS px from the top of the page.
    bottoms: Vec<(String, f64)>,
    tops: Vec<(String, f64)>,
    /// How many times the caution is shown.
    cautions: u64,
    /// The rendered height of a chart's tick label, px.
    tick_px: f64,
    chart_width: f64,
    scroll_width: f64,
}

/// The served page at `width` by `height` CSS px, measured in chromium.
/// The page's policy allows no inline script, so the measuring runs on a
/// copy in a file: the served markup, the served style sheet inlined, the
/// refresh script left out, and a script that writes what it measured into
/// the DOM, which `--dump-dom` returns.
fn layout(scratch: &Scratch, web: &str, name: &str, width: u32, height: u32) -> Layout {
    let page = http(web, "GET", "/").expect("the page").body;
    let css = http(web, "GET", "/assets/leaktally.css")
        .expect("the style sheet")
        .body;
    let link = r#"<link rel="stylesheet" href="/assets/leaktally.css">"#;
    let script = r#"<script src="/assets/refresh.js" defer></script>"#;
    assert!(page.contains(link) && page.contains(script), "{page}");
    let measure = r#"<script>
(function () {
  var out = { width: window.innerWidth, boxes: {} };
  var card = document.querySelector("section.event");
  ["released", "rate", "forecast", "reportable"].forEach(function (k) {
    var el = card && card.querySelector(".figure." + k);
    if (el) {
      var r = el.getBoundingClientRect();
      out.boxes[k] = [r.top + window.scrollY, r.bottom + window.scrollY];
    }
  });
  out.cautions = document.body.innerText.split("not measurements").length - 1;
  var tick = document.querySelector("svg.chart text.tick");
  out.tick_px = tick ? tick.getBoundingClientRect().height : 0;
  var chart = document.querySelector("svg.chart");
  out.chart_width = chart ? chart.getBoundingClientRect().width : 0;
  out.scroll_width = document.documentElement.scrollWidth;
  var pre = document.createElement("pre");
  pre.id = "layout";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
})();
</script>
</body>"#;
    let copy = page
        .replace(link, &format!("<style>\n{css}\n</style>"))
        .replace(script, "")
        .replace("</body>", measure);
    // Headless chromium makes no window narrower than 500 px, so the copy
    // is shown in a frame of the size asked for; a srcdoc frame has its
    // parent's origin, so the parent can read what the frame measured.
    let frame = copy.replace('&', "&amp;").replace('"', "&quot;");
    let wrapper = format!(
        r#"<!doctype html>
<html><head><meta charset="utf-8"></head><body style="margin:0">
<iframe id="frame" style="border:0;width:{width}px;height:{height}px" srcdoc="{frame}"></iframe>
<script>
document.getElementById("frame").addEventListener("load", function () {{
  var measured = this.contentDocument.getElementById("layout");
  var out = document.createElement("pre");
  out.id = "layout";
  out.textContent = measured ? measured.textContent : "nothing measured";
  document.body.appendChild(out);
}});
</script>
</body></html>
"#
    );
    let file = scratch.write(&format!("{name}.html"), &wrapper);
    let dom = browser(
        scratch,
        name,
        &[
            "--dump-dom".into(),
            format!("--window-size={},{}", width.max(500) + 20, height + 20),
        ],
        &format!("file://{}", file.display()),
    )
    .stdout;
    let json = dom
        .split_once(r#"<pre id="layout">"#)
        .and_then(|(_, rest)| rest.split_once("</pre>"))
        .unwrap_or_else(|| panic!("no measurements in the page at {width}x{height}:\n{dom}"))
        .0
        .replace("&quot;", "\"")
        .replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&amp;", "&");
    let v: Value = serde_json::from_str(&json).unwrap_or_else(|e| panic!("{e}: {json}"));
    let boxes = v["boxes"].as_object().expect("the tiles");
    let edge = |i: usize| -> Vec<(String, f64)> {
        boxes.iter().map(|(k, b)| (k.clone(), num(&b[i]))).collect()
    };
    Layout {
        width: num(&v["width"]),
        tops: edge(0),
        bottoms: edge(1),
        cautions: v["cautions"].as_u64().expect("cautions"),
        tick_px: num(&v["tick_px"]),
        chart_width: num(&v["chart_width"]),
        scroll_width: num(&v["scroll_width"]),
    }
}

/// The page at a phone's size and at a desk's: the headline figures above
/// the fold at both, the caution once, the chart's labels readable, and
/// nothing wider than the screen.
fn check_layout(scratch: &Scratch, web: &str) {
    let phone = layout(scratch, web, "phone", 390, 844);
    assert_eq!(phone.width, 390.0, "the phone's viewport");
    let tiles = ["released", "rate", "forecast", "reportable"];
    assert_eq!(
        phone.bottoms.len(),
        tiles.len(),
        "every tile: {:?}",
        phone.bottoms
    );
    for (tile, bottom) in &phone.bottoms {
        assert!(
            *bottom <= 844.0,
            "on a phone, {tile} ends at {bottom} px, below the fold (844 px): {:?}",
            phone.bottoms
        );
    }
    assert_eq!(phone.cautions, 1, "the caution, once, on a phone");
    // 11 px type or more (a line box of about 13 px): the chart is drawn
    // 640 units wide and shown about 340 px wide on a phone.
    assert!(
        phone.tick_px >= 13.0,
        "the chart's labels are {} px high on a phone",
        phone.tick_px
    );
    assert!(
        phone.scroll_width <= 390.0,
        "the page is {} px wide on a 390 px phone",
        phone.scroll_width
    );
    println!(
        "phone 390x844: tiles end at {:?}; chart labels {:.1} px",
        phone.bottoms, phone.tick_px
    );

    let desk = layout(scratch, web, "desktop", 1280, 800);
    assert_eq!(desk.width, 1280.0, "the desk's viewport");
    assert_eq!(desk.bottoms.len(), tiles.len());
    for (tile, bottom) in &desk.bottoms {
        assert!(*bottom <= 800.0, "on a desk, {tile} ends at {bottom} px");
    }
    // Side by side in one row on a desk.
    let top = desk.tops[0].1;
    assert!(
        desk.tops.iter().all(|(_, t)| (t - top).abs() < 1.0),
        "the tiles in one row: {:?}",
        desk.tops
    );
    assert_eq!(desk.cautions, 1, "the caution, once, on a desk");
    assert!(desk.tick_px >= 13.0, "chart labels {} px", desk.tick_px);
    assert!(
        desk.chart_width >= 600.0,
        "chart {} px wide",
        desk.chart_width
    );
    assert!(
        desk.scroll_width <= 1280.0,
        "page {} px wide",
        desk.scroll_width
    );
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
    // People's times in the site's zone: the demo site names none, so UTC.
    let people = Presentation::default();
    assert_eq!(
        field(dom, "since", event).0,
        people.time(e["start_ms"].as_i64().unwrap())
    );
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
    if elapsed_s == 0.0 {
        assert_eq!(
            field(dom, "released-best-volume", event).0,
            people.volume(
                Mass::kilograms(num(&est["released_best_kg"])),
                Density::kg_per_cubic_metre(rho)
            ),
        );
    }
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
    if chromium().is_none() {
        return;
    }
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
    check_layout(&scratch, &web);
    let phone_shot = artifacts.join("web-phone.png");
    let _ = std::fs::remove_file(&phone_shot);
    browser(
        &scratch,
        "screenshot-phone",
        &[
            format!("--screenshot={}", phone_shot.display()),
            "--window-size=390,844".into(),
        ],
        &url,
    );
    assert!(std::fs::read(&phone_shot).is_ok_and(|png| png.starts_with(b"\x89PNG")));

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

    // Closed, the event leaves the open ones and is listed with its final
    // total, on the page and in /api/events.
    cli.ok(&["leak", "close", &id.to_string()]);
    let history = http(&web, "GET", "/api/events?state=closed").unwrap();
    assert_eq!(history.status, 200, "{}", history.body);
    let history: Value = serde_json::from_str(&history.body).unwrap();
    assert_eq!(history["format"], 1);
    let closed = history["events"]
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["event"] == id)
        .expect("the closed event in /api/events");
    let final_kg = num(&closed["released_best_kg"]);
    let frozen_kg = num(&event_of(&frozen, id)["estimate"]["released_best_kg"]);
    assert!(final_kg >= frozen_kg * 0.999, "{final_kg} < {frozen_kg}");
    let page = http(&web, "GET", "/").unwrap().body;
    let listed = format!(r#"data-field="closed-total" data-event="{id}""#);
    assert!(
        page.contains(&listed),
        "the closed event on the page:\n{page}"
    );
    assert!(
        !page.contains(&format!(r#"id="event-{id}""#)),
        "no longer open"
    );

    drop(daemon);
    println!("web test: {:.1} s", started.elapsed().as_secs_f64());
}
