//! `leaktally demo`: the whole loop on an invented site, in about a minute.
//!
//! It starts the simulator (`leaktally-sim`, found next to this binary) with
//! the demo scenario and the agent daemon in a temporary folder, flags the
//! leak as an operator would, shows the running total live, then closes the
//! event and prints the summary beside the simulator's ground truth and a
//! what-if table. Ctrl-C stops everything cleanly.
//!
//! Fennick Flats is a fictional fuel depot; its tanks, sizes and the leak
//! are made up for the demo.

use crate::actions::{self, Request};
use crate::commands::{status::read as read_status, whatif};
use crate::estimate::{Estimate, LeakParams};
use crate::model::{DischargeCoefficient, Length, Mass, MassRate, TimeSpan};
use crate::report::{self, Presentation};
use crate::status::{self, StatusDocument};
use crate::store;
use anyhow::{Context, bail};
use std::io::{BufRead, BufReader, IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::Duration;
use tokio_util::sync::CancellationToken;

/// The demo site and scenario, built in so the demo runs from anywhere.
const SITE: &str = include_str!("../../../config/demo.toml");
const SCENARIO: &str = include_str!("../../../sim/scenarios/demo.toml");

/// When the scenario's leak opens, in seconds of simulator time.
const LEAK_OPENS_S: f64 = 10.0;
/// When the operator flags it.
const FLAGGED_AT_S: f64 = 14.0;

/// The simulator child, killed when dropped.
struct Simulator(Child);

impl Drop for Simulator {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// A temporary folder, removed when dropped.
struct Folder(PathBuf);

impl Drop for Folder {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// `leaktally demo`'s options.
#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// How long to track the leak after flagging it, seconds.
    #[arg(long, default_value_t = 60)]
    pub seconds: u64,
}

/// Runs `leaktally demo` as the command line gave it.
pub fn command(args: DemoArgs) -> anyhow::Result<()> {
    run(args.seconds)
}

/// Runs the demo; the leak is tracked for `seconds` after it is flagged.
pub fn run(seconds: u64) -> anyhow::Result<()> {
    let folder =
        Folder(std::env::temp_dir().join(format!("leaktally-demo-{}", std::process::id())));
    std::fs::create_dir_all(&folder.0)
        .with_context(|| format!("creating {}", folder.0.display()))?;
    let dir = folder.0.clone();
    let scenario = SCENARIO.replace("site = \"../../config/demo.toml\"", "site = \"site.toml\"");
    std::fs::write(dir.join("scenario.toml"), scenario)?;
    std::fs::write(dir.join("site.toml"), SITE)?;

    println!("leaktally demo: Fennick Flats depot (an invented site), tank FF-T12, diesel.");
    println!(
        "The simulator plays the plant. At {LEAK_OPENS_S:.0} s a hole opens low on the tank; the agent is not told its size."
    );
    let (sim, address, sim_started_ms) = start_simulator(&dir)?;
    std::fs::write(
        dir.join("site.toml"),
        SITE.replace("127.0.0.1:15020", &address),
    )?;
    let config = crate::config::load(&dir.join("site.toml"))?;
    let people = Presentation::of(&config);
    init_logging(&dir.join("agent.log"))?;

    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()?;
    let outcome = runtime.block_on(async {
        let stop = CancellationToken::new();
        let on_signal = stop.clone();
        tokio::spawn(async move {
            crate::shutdown::signalled().await;
            on_signal.cancel();
        });
        let db = dir.join("leaktally.db");
        let daemon = {
            let (db, stop) = (db.clone(), stop.clone());
            tokio::spawn(
                async move { crate::daemon::run(config, &db, stop.cancelled_owned()).await },
            )
        };
        let result = narrate(&dir, &db, sim_started_ms, seconds, &stop, &people).await;
        stop.cancel();
        let stopped = daemon.await;
        result.and(stopped.map_err(anyhow::Error::from).and_then(|r| r))
    });
    drop(sim);
    match outcome {
        Err(e) if e.to_string() == STOPPED => {
            println!("\nStopped. The simulator and the agent have shut down.");
            Ok(())
        }
        other => other,
    }
}

/// The marker error for Ctrl-C.
const STOPPED: &str = "stopped by the user";

fn start_simulator(dir: &Path) -> anyhow::Result<(Simulator, String, i64)> {
    let exe = std::env::current_exe()?;
    let sim_path = exe.with_file_name("leaktally-sim");
    if !sim_path.exists() {
        bail!(
            "the simulator {} is not there; build both binaries with `cargo build --workspace` and run target/debug/leaktally demo",
            sim_path.display()
        );
    }
    let mut child = Command::new(&sim_path)
        .arg("--scenario")
        .arg(dir.join("scenario.toml"))
        .arg("--listen")
        .arg("127.0.0.1:0")
        .arg("--truth")
        .arg(dir.join("truth.csv"))
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(std::fs::File::create(dir.join("simulator.log"))?)
        .spawn()
        .with_context(|| format!("starting {}", sim_path.display()))?;
    let started = store::now_ms();
    let stdout = child.stdout.take().context("the simulator's output")?;
    let sim = Simulator(child);
    let mut line = String::new();
    BufReader::new(stdout).read_line(&mut line)?;
    let address = line
        .trim()
        .strip_prefix("listening on ")
        .with_context(|| {
            format!(
                "the simulator did not start; see {}",
                dir.join("simulator.log").display()
            )
        })?
        .to_owned();
    Ok((sim, address, started))
}

fn init_logging(path: &Path) -> anyhow::Result<()> {
    let file = std::fs::File::create(path)?;
    let _ = tracing_subscriber::fmt()
        .with_writer(std::sync::Mutex::new(file))
        .with_ansi(false)
        .fmt_fields(crate::logging::escaped_fields())
        .try_init();
    Ok(())
}

async fn sleep_or_stop(d: Duration, stop: &CancellationToken) -> anyhow::Result<()> {
    tokio::select! {
        _ = tokio::time::sleep(d) => Ok(()),
        _ = stop.cancelled() => bail!(STOPPED),
    }
}

async fn until_sim_time(
    sim_started_ms: i64,
    seconds: f64,
    stop: &CancellationToken,
) -> anyhow::Result<()> {
    let wait = sim_started_ms + (seconds * 1000.0) as i64 - store::now_ms();
    sleep_or_stop(Duration::from_millis(wait.max(0) as u64), stop).await
}

async fn narrate(
    dir: &Path,
    db: &Path,
    sim_started_ms: i64,
    seconds: u64,
    stop: &CancellationToken,
    people: &Presentation,
) -> anyhow::Result<()> {
    // The commands as the reader can type them: this binary, by its path,
    // with the demo's database.
    let me =
        std::env::current_exe().map_or_else(|_| "leaktally".into(), |p| p.display().to_string());
    let on_db = format!("--db {}", db.display());
    until_sim_time(sim_started_ms, FLAGGED_AT_S, stop).await?;
    // The simulator's clock, from its truth file, so that the back-dated
    // start is the moment the scenario opens the hole even on a busy machine.
    let sim_zero = simulator_zero(dir).unwrap_or(sim_started_ms);
    let since = sim_zero + (LEAK_OPENS_S * 1000.0) as i64;
    let since_text = jiff::Timestamp::from_millisecond(since)?.to_string();
    println!(
        "\nAt {FLAGGED_AT_S:.0} s the operator sees the level falling and flags the leak, back-dated to when it began:"
    );
    println!(
        "  $ {me} leak open --tank FF-T12 --hole-height-m 0.3 --cd 0.61 --since {since_text} {on_db}"
    );
    let request = Request::Open {
        tank: "FF-T12".into(),
        hole_diameter_m: None,
        hole_height_m: Some(0.3),
        cd: Some(0.61),
        cd_range: None,
        since_ms: Some(since),
        note: Some("demo: level falling, hole not yet seen".into()),
    };
    let db_owned = db.to_owned();
    let sent_with = people.clone();
    let reply = tokio::task::spawn_blocking(move || actions::send(&db_owned, &request, &sent_with))
        .await??;
    println!("  {}", reply.text);
    let event = reply.event.context("the daemon's reply names no event")?;
    println!("\nRunning totals (a responder sees the same with `{me} status {on_db}`");
    match web_address(dir) {
        Some(url) => println!("or in a browser at {url}):"),
        None => println!("):"),
    }
    let terminal = std::io::stdout().is_terminal();
    for second in 1..=seconds {
        sleep_or_stop(Duration::from_secs(1), stop).await?;
        let doc = read_status(db, Some(event), people)?;
        let line = progress_line(
            people,
            second,
            doc.events
                .first()
                .and_then(|e| e.estimate.as_ref().map(|est| (&est.estimate, &e.params))),
        );
        if terminal {
            print!("\r\x1b[2K{line}");
            std::io::stdout().flush()?;
        } else if second % 10 == 0 || second == seconds {
            println!("{line}");
        }
    }
    if terminal {
        println!();
    }

    println!("\nThe leak is isolated; the operator closes the event:");
    println!("  $ {me} leak close {event} {on_db}");
    let db_owned = db.to_owned();
    let sent_with = people.clone();
    let reply = tokio::task::spawn_blocking(move || {
        actions::send(
            &db_owned,
            &Request::Close {
                event,
                note: Some("demo: isolated".into()),
            },
            &sent_with,
        )
    })
    .await??;
    println!("  {}\n", reply.text);
    let doc = read_status(db, Some(event), people)?;
    print!("{}", status::text(&doc));
    compare_with_truth(dir, &doc);
    print_what_if(dir, &doc)?;
    Ok(())
}

/// When the simulator's time was zero (UTC ms), from the first row of its
/// truth file (`time_s` and `utc`).
fn simulator_zero(dir: &Path) -> Option<i64> {
    let text = std::fs::read_to_string(dir.join("truth.csv")).ok()?;
    let row = text.lines().nth(1)?;
    let mut fields = row.split(',');
    let seconds: f64 = fields.next()?.parse().ok()?;
    let utc: jiff::Timestamp = fields.next()?.parse().ok()?;
    Some(utc.as_millisecond() - (seconds * 1000.0).round() as i64)
}

/// The address the daemon's web page listens on, from its log.
fn web_address(dir: &Path) -> Option<String> {
    let log = std::fs::read_to_string(dir.join("agent.log")).ok()?;
    let at = log.find("web page on ")?;
    log[at + "web page on ".len()..]
        .split_whitespace()
        .next()
        .map(str::to_owned)
}

/// The live line: the total with its band, the rate, the method, the
/// fitted hole as an effective area first (a fitted hole is an area, not a
/// measured diameter), and when the flow stops.
fn progress_line(
    people: &Presentation,
    second: u64,
    latest: Option<(&Estimate, &LeakParams)>,
) -> String {
    let Some((est, params)) = latest else {
        return format!("+{second:>3} s  waiting for the first sample");
    };
    let kg = |x: f64| people.mass(Mass::kilograms(x));
    let hole = report::estimate::fit_brief(est, params, people);
    let stops = est.forecast.map_or(String::new(), |f| {
        format!(
            " | stops in {}",
            report::duration(TimeSpan::seconds(f.stops_after_s))
        )
    });
    format!(
        "+{second:>3} s | released {} ({} to {}) | rate {} | {} | {hole}{stops}",
        kg(est.released_best_kg),
        kg(est.released_low_kg),
        kg(est.released_high_kg),
        people.rate(MassRate::kg_per_second(est.rate_best_kg_s)),
        report::estimate::method_name(est.method)
    )
}

/// The simulator's truth at the moment of the last estimate.
fn compare_with_truth(dir: &Path, doc: &StatusDocument) {
    let Some(est) = doc.events.first().and_then(|e| e.estimate.as_ref()) else {
        return;
    };
    // The truth file is flushed every simulated second.
    std::thread::sleep(Duration::from_millis(1200));
    let Ok(text) = std::fs::read_to_string(dir.join("truth.csv")) else {
        return;
    };
    let mut best: Option<(i64, f64)> = None;
    for line in text.lines().skip(1) {
        let f: Vec<&str> = line.split(',').collect();
        if f.len() < 7 || f[2] != "FF-T12" {
            continue;
        }
        let (Ok(at), Ok(released)) = (f[1].parse::<jiff::Timestamp>(), f[6].parse::<f64>()) else {
            continue;
        };
        let at = at.as_millisecond();
        if at <= est.at_ms {
            best = Some((at, released));
        }
    }
    if let Some((_, truth)) = best.filter(|(_, t)| *t > 0.0) {
        println!(
            "The simulator's ground truth at the last sample: {} released; the estimate is {:+.1} % from it.",
            doc.presentation.mass(Mass::kilograms(truth)),
            100.0 * (est.released_best_kg - truth) / truth
        );
    }
}

/// What an engineer would look at next: the same tank with other holes.
fn print_what_if(dir: &Path, doc: &StatusDocument) -> anyhow::Result<()> {
    let config = crate::config::load(&dir.join("site.toml"))?;
    let tank = config
        .tanks
        .iter()
        .find(|t| t.id == "FF-T12")
        .context("FF-T12 in the demo site")?;
    let level = doc
        .events
        .first()
        .and_then(|e| e.estimate.as_ref())
        .map_or(whatif::default_level(tank), |e| Length::metres(e.level_m));
    println!("\nPre-planning view of the same tank at its present level (leaktally whatif):\n");
    let request = whatif::Request {
        level: Some(level),
        hole_height: Some(Length::metres(0.3)),
        cd: Some(DischargeCoefficient::SHARP_EDGED),
        holes: whatif::REPRESENTATIVE_HOLES_MM
            .iter()
            .map(|&mm| whatif::HoleSize::Diameter(mm))
            .collect(),
        site: doc.presentation.clone(),
        ..whatif::Request::for_tank(tank)
    };
    let study = whatif::compute(tank, &request)?;
    print!("{}", whatif::human(&study));
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::Fit;

    /// The live line says the fitted hole as an effective area first, with
    /// round-hole diameters only at the ends of the Cd range, never the
    /// first format's single diameter.
    #[test]
    fn the_live_line_gives_the_fitted_hole_as_an_area_first() {
        // Cd·A = 754 mm² is a 40 mm hole at Cd 0.6 (π/4 · 40² · 0.6 = 754).
        let area = 0.6 * std::f64::consts::FRAC_PI_4 * 0.04 * 0.04;
        let est = Estimate {
            fit: Fit::Ready {
                area_m2: area,
                area_low_m2: 0.95 * area,
                area_high_m2: 1.05 * area,
            },
            fitted_diameter_m: Some(0.04),
            ..Estimate::blank()
        };
        let params = LeakParams {
            cd_range: Some((0.6, 1.0)),
            cd: 0.6,
            ..LeakParams::default()
        };
        let line = progress_line(&Presentation::default(), 30, Some((&est, &params)));
        assert!(!line.contains("fitted hole 40.0 mm"), "{line}");
        let area_at = line.find("Cd·A 754 mm²").expect(&line);
        let diameters = line
            .find("31.0 mm at Cd 1 to 40.0 mm at Cd 0.6")
            .expect(&line);
        assert!(area_at < diameters, "{line}");
        let waiting = Estimate {
            fit: Fit::NotYet {
                level_drop_m: 0.001,
                needed_m: 0.01,
            },
            ..Estimate::blank()
        };
        let line = progress_line(&Presentation::default(), 5, Some((&waiting, &params)));
        assert!(line.contains("not enough level drop yet"), "{line}");
    }
}
