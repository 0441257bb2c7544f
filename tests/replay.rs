//! Replay end to end: an event logged by a real daemon run against the
//! simulator, replayed unchanged (it must reproduce the live figures
//! exactly), with a bigger hole (a chart and a CSV), and the simulator's
//! truth file replayed as a historian's readings (it must reproduce the
//! truth, whose physics is checked against the analytic Torricelli solution
//! in sim/src/physics.rs, within 1 %).

use crate::tracking::{Plant, event_id, rel};
use serde_json::Value;

#[test]
fn replays_reproduce_the_live_figures_and_the_truth() {
    let plant = Plant::start("replay");
    let _daemon = plant.daemon("daemon");
    plant.wait_until(3.0);
    let since = plant.leak_start("FF-T12");
    let id = event_id(&plant.open_leak("FF-T12", None, "0.3", &since));
    plant.wait_until(30.0);
    plant.ok(&["leak", "close", &id.to_string()]);
    let ev = id.to_string();

    // Unchanged: the very figures the daemon logged.
    let same: Value = serde_json::from_str(&plant.ok(&["replay", &ev, "--json"])).unwrap();
    assert_eq!(same["identical"], true, "{same:#}");
    assert!(same["compared"].as_u64().unwrap() >= 10, "{same:#}");
    println!(
        "unchanged replay: {} of {} estimates identical",
        same["matching"], same["compared"]
    );
    assert_eq!(same["replayed"], same["live"]);
    let human = plant.ok(&["replay", &ev]);
    assert!(
        human.contains("reproduces the logged live figures exactly") && human.contains("CAUTION"),
        "{human}"
    );

    // A bigger hole: more released, with a chart and a time series.
    let svg = plant.scratch.path("bigger.svg");
    let csv = plant.scratch.path("bigger.csv");
    let bigger: Value = serde_json::from_str(&plant.ok(&[
        "replay",
        &ev,
        "--hole-diameter",
        "60",
        "--json",
        "--plot",
        svg.to_str().unwrap(),
        "--csv",
        csv.to_str().unwrap(),
    ]))
    .unwrap();
    let (live, big) = (
        same["replayed"]["released_best_kg"].as_f64().unwrap(),
        bigger["replayed"]["model_kg"].as_f64().unwrap(),
    );
    // The orifice equation scales with the hole area: (60/40)² = 2.25,
    // against a fitted hole of about 40 mm.
    println!(
        "replayed with a 60 mm hole: the model gives {big:.1} kg against {live:.1} kg live ({:.2} times)",
        big / live
    );
    assert!(big / live > 2.0 && big / live < 2.5, "{big} vs {live}");
    // The logged level fell as through a 40 mm hole, not 60 mm: the best
    // figure stays with what the level shows, and the replay says why.
    let held = bigger["replayed"]["released_best_kg"].as_f64().unwrap();
    assert!(rel(held, live) < 0.1, "{held} vs {live}");
    let warnings = bigger["replayed"]["warnings"].as_array().unwrap();
    assert!(
        warnings.iter().any(|w| w == "level_contradicts_model"),
        "{warnings:?}"
    );
    assert_eq!(
        bigger["identical"],
        Value::Null,
        "no comparison with overrides"
    );

    let text = std::fs::read_to_string(&svg).unwrap();
    let doc = roxmltree::Document::parse(&text).expect("the chart is well-formed XML");
    let texts: Vec<&str> = doc.descendants().filter_map(|n| n.text()).collect();
    for label in [
        "Release rate",
        "Cumulative release",
        "rate (kg/s)",
        "released (kg)",
        "time since the event start (min)",
        "best estimate (kg)",
        "reportable quantity 250 kg",
    ] {
        assert!(
            texts.iter().any(|t| t.contains(label)),
            "the chart lacks {label:?}"
        );
    }
    assert!(
        texts.iter().any(|t| t.contains("Tank FF-T12, event")),
        "a title naming the tank and event"
    );
    let lines = doc
        .descendants()
        .filter(|n| n.has_tag_name("polyline") || n.has_tag_name("path"))
        .count();
    let bands = doc
        .descendants()
        .filter(|n| n.has_tag_name("polygon"))
        .count();
    assert!(lines >= 4 && bands >= 2, "{lines} lines, {bands} bands");

    let series = std::fs::read_to_string(&csv).unwrap();
    let header = series.lines().next().unwrap();
    for column in [
        "time",
        "level_m",
        "driving_pressure_pa",
        "rate_kg_s",
        "released_best_kg",
        "released_low_kg",
        "released_high_kg",
        "inventory_kg",
    ] {
        assert!(
            header.split(',').any(|c| c == column),
            "CSV lacks {column}: {header}"
        );
    }
    assert_eq!(
        series.lines().count() - 1,
        bigger["samples"].as_u64().unwrap() as usize
    );

    // The simulator's truth file as a historian's readings: its level
    // history through the orifice model with the true hole.
    let start = plant.truth().leak_opened_at("FF-T12");
    let from = jiff::Timestamp::from_millisecond(start)
        .unwrap()
        .to_string();
    let readings: Value = serde_json::from_str(&plant.ok(&[
        "replay",
        "--readings",
        plant.scratch.path("truth.csv").to_str().unwrap(),
        "--tank",
        "FF-T12",
        "--config",
        plant.site.to_str().unwrap(),
        "--hole-diameter",
        "40",
        "--hole-height",
        "0.3",
        "--cd",
        "0.61",
        "--from",
        &from,
        "--json",
    ]))
    .unwrap();
    // Loaded after the replay, so it reaches at least as far as the file did.
    let truth = plant.truth();
    let end = readings["replayed"]["at_ms"].as_i64().unwrap();
    let (got, exact) = (
        readings["replayed"]["released_best_kg"].as_f64().unwrap(),
        truth.at("FF-T12", end).released_kg - truth.at("FF-T12", start).released_kg,
    );
    println!(
        "truth file replayed as readings: {got:.2} kg vs truth {exact:.2} kg ({:.4} %)",
        100.0 * rel(got, exact)
    );
    assert!(rel(got, exact) < 0.01, "{got} vs {exact}");
}
