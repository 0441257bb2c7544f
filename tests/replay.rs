//! Replay end to end: an event logged by a real daemon run against the
//! simulator, replayed unchanged (it must reproduce the live figures
//! exactly), with a bigger hole (a chart and a CSV), and the simulator's
//! truth file replayed as a historian's readings (it must reproduce the
//! truth, whose physics is checked against the analytic Torricelli solution
//! in sim/src/physics.rs, within 1 %). Then the blanketed tank's truth
//! exported in the layouts historians write (tag-style names, units in
//! brackets, semicolons and decimal commas, local times with an offset or a
//! zone, a wide export of two tanks, inches and psig), each of which must
//! give the truth within 1 %; the mistakes an export invites (no pressure,
//! gauge readings on an absolute transmitter, repeated and shuffled rows);
//! and outputs that must never replace an input.

use crate::tracking::{Plant, event_id, rel};
use crate::util::{LeakOpen, Scratch, binary, run};
use serde_json::Value;
use std::path::Path;
use std::process::Command;

#[test]
fn replays_reproduce_the_live_figures_and_the_truth() {
    let plant = Plant::start("replay");
    let _daemon = plant.daemon("daemon");
    plant.wait_until(3.0);
    let since = plant.leak_start("FF-T12");
    let id = event_id(
        &plant.open_leak(
            LeakOpen::tank("FF-T12")
                .height_m(0.3)
                .cd(0.61)
                .since(&since),
        ),
    );
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
    // The document's version, and its times RFC 3339 UTC.
    assert_eq!(readings["format"], 1);
    let to: jiff::Timestamp = readings["to"].as_str().unwrap().parse().unwrap();
    assert_eq!(to.as_millisecond(), end);
    assert!(readings["from"].as_str().unwrap().ends_with('Z'));
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

/// One row of the simulator's truth for a tank: UTC ms, level (m) and
/// headspace gauge pressure (Pa).
fn truth_rows(path: &Path, tank: &str) -> Vec<(i64, f64, f64)> {
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let col = |name: &str| header.iter().position(|h| *h == name).unwrap();
    let (utc, tag, level, headspace) =
        (col("utc"), col("tank"), col("level_m"), col("headspace_pa"));
    lines
        .map(|l| l.split(',').collect::<Vec<_>>())
        .filter(|f| f.len() == header.len() && f[tag] == tank)
        .map(|f| {
            let at: jiff::Timestamp = f[utc].parse().unwrap();
            (
                at.as_millisecond(),
                f[level].parse().unwrap(),
                f[headspace].parse().unwrap(),
            )
        })
        .collect()
}

fn utc(at_ms: i64) -> jiff::Timestamp {
    jiff::Timestamp::from_millisecond(at_ms).unwrap()
}

/// `leaktally replay --readings FILE --tank T --config C ARGS --json`.
fn replay_json(plant: &Plant, file: &Path, tank: &str, config: &Path, args: &[&str]) -> Value {
    let mut all = vec![
        "replay",
        "--readings",
        file.to_str().unwrap(),
        "--tank",
        tank,
        "--config",
        config.to_str().unwrap(),
        "--json",
    ];
    all.extend(args);
    serde_json::from_str(&plant.ok(&all)).unwrap()
}

#[test]
fn historian_exports_of_a_blanketed_tank_are_read_as_they_are_meant() {
    let plant = Plant::start("readings");
    plant.wait_until(16.0);
    let truth = plant.truth();
    let rows: Vec<(i64, f64, f64)> = truth_rows(&plant.scratch.path("truth.csv"), "FF-T14")
        .into_iter()
        .step_by(10)
        .collect();
    assert!(rows.len() >= 12, "{} rows", rows.len());
    let start = truth.leak_opened_at("FF-T14");
    let from = utc(start).to_string();
    let berlin = jiff::tz::TimeZone::get("Europe/Berlin").unwrap();
    let kpa = |pa: f64| pa / 1000.0;
    const AMBIENT_KPA: f64 = 101.325;

    let mut layouts: Vec<Layout> = Vec::new();
    let mut text = String::from(
        "Timestamp,FF-T14.LT-101 [m],FF-T14.PT-101 [kPa(g)],FF-T14.TT-101 [degC],FF-T14.LT-101.Quality\n",
    );
    for (t, level, p) in &rows {
        text += &format!("{},{level},{},12.0,Good\n", utc(*t), kpa(*p));
    }
    layouts.push(("tagstyle.csv", text, None, vec![], "gauge"));
    let mut text = String::from(
        "Historian export;Fennick Flats (invented)\nTank;FF-T14\n\
         Zeitstempel;FF-T14 LT-101 [mm];FF-T14 PT-101 (kPa(g));Status\n",
    );
    for (t, level, p) in &rows {
        let local = utc(*t).to_zoned_datetime(berlin.clone());
        let numbers = format!("{:.3};{}", level * 1000.0, kpa(*p)).replace('.', ",");
        text += &format!("{};{numbers};OK\n", local.strftime("%d.%m.%Y %H:%M:%S%.3f"));
    }
    layouts.push((
        "semicolon.csv",
        text,
        Some(
            "separator = \";\"\ndecimal = \",\"\nskip_lines = 2\n\
             time_format = \"%d.%m.%Y %H:%M:%S%.f\"\ntime_zone = \"Europe/Berlin\"\n\
             [columns]\n\"Zeitstempel\" = \"time\"\n\"Status\" = \"unused\"\n",
        ),
        vec![],
        "gauge",
    ));
    let mut text = String::from("time,level_m,pressure_kpa_abs\n");
    for (t, level, p) in &rows {
        let local = utc(*t).to_zoned_datetime(jiff::tz::TimeZone::fixed(jiff::tz::offset(1)));
        text += &format!(
            "{},{level},{}\n",
            local.strftime("%Y-%m-%dT%H:%M:%S%.3f%:z"),
            kpa(*p) + AMBIENT_KPA
        );
    }
    layouts.push(("offset.csv", text, None, vec![], "absolute"));
    let t12 = truth_rows(&plant.scratch.path("truth.csv"), "FF-T12");
    let mut text = String::from(
        "Time [UTC],FF-T12.LT-101 [m],FF-T14.LT-101 [m],FF-T14.PT-101 [kPa(g)],FF-T12.FT-101 [m3/h]\n",
    );
    for (t, level, p) in &rows {
        let other = t12.iter().find(|r| r.0 >= *t).map_or(4.0, |r| r.1);
        text += &format!(
            "{},{other},{level},{},0\n",
            utc(*t).strftime("%Y-%m-%d %H:%M:%S%.3f"),
            kpa(*p)
        );
    }
    layouts.push(("wide.csv", text, None, vec![], "gauge"));
    // 1 psi = 6894.757 Pa and 1 in = 0.0254 m (exact from the definitions).
    let mut text = String::from("Date/Time,LT14 (in),PT14 (psig)\n");
    for (t, level, p) in &rows {
        text += &format!(
            "{},{},{}\n",
            *t as f64 / 1000.0,
            level / 0.0254,
            p / 6_894.757_293_168_361
        );
    }
    layouts.push(("psig.csv", text, None, vec![], "gauge"));
    // Local times with no offset in the file, the zone on the command line.
    let mut text = String::from("datetime,level_mm,pressure_kpa_g\n");
    for (t, level, p) in &rows {
        let local = utc(*t).to_zoned_datetime(berlin.clone());
        text += &format!(
            "{},{},{}\n",
            local.strftime("%Y-%m-%d %H:%M:%S%.3f"),
            level * 1000.0,
            kpa(*p)
        );
    }
    layouts.push((
        "localtime.csv",
        text,
        None,
        vec!["--time-zone", "Europe/Berlin"],
        "gauge",
    ));

    let hole = [
        "--hole-diameter",
        "40",
        "--hole-height",
        "0.2",
        "--cd",
        "0.61",
        "--from",
        from.as_str(),
    ];
    for (name, text, columns, extra, reference) in &layouts {
        let file = plant.scratch.write(name, text);
        if let Some(c) = columns {
            plant.scratch.write(&format!("{name}.columns.toml"), c);
        }
        let mut args: Vec<&str> = hole.to_vec();
        args.extend(extra.iter().copied());
        let doc = replay_json(&plant, &file, "FF-T14", &plant.site, &args);
        let end = doc["replayed"]["at_ms"].as_i64().unwrap();
        let (got, exact) = (
            doc["replayed"]["released_best_kg"].as_f64().unwrap(),
            truth.at("FF-T14", end).released_kg - truth.at("FF-T14", start).released_kg,
        );
        println!(
            "{name}: {got:.2} kg vs truth {exact:.2} kg ({:.3} %)",
            100.0 * rel(got, exact)
        );
        assert!(rel(got, exact) < 0.01, "{name}: {got} vs {exact}\n{doc:#}");
        let r = &doc["readings"];
        // FF-T14's density follows its temperature sensor: an export with
        // no temperature column is said to use the reference density.
        let has_temperature = r["columns"]
            .as_array()
            .unwrap()
            .iter()
            .any(|c| c["quantity"] == "temperature");
        let warnings = r["warnings"].as_array().unwrap();
        if has_temperature {
            assert!(warnings.is_empty(), "{name}: {r:#}");
        } else {
            assert!(
                warnings.len() == 1
                    && warnings[0]
                        .as_str()
                        .unwrap()
                        .contains("no column of the file is a temperature"),
                "{name}: {r:#}"
            );
        }
        let pressure = r["columns"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["quantity"] == "pressure")
            .unwrap_or_else(|| panic!("{name}: no pressure column used: {r:#}"));
        assert_eq!(pressure["reference"], *reference, "{name}: {pressure:#}");
        assert_eq!(pressure["tap"], "headspace", "{name}: {pressure:#}");
        // A wrong level column (FF-T12's, in the wide export) or pressure
        // ignored would miss the truth above by far more than 1 %.
        // Every column of the header is either used or unused, by name.
        let header = text
            .lines()
            .nth(if columns.is_some() { 2 } else { 0 })
            .unwrap();
        let separator = if columns.is_some() { ';' } else { ',' };
        let mut named: Vec<String> = r["columns"]
            .as_array()
            .unwrap()
            .iter()
            .chain(r["unused"].as_array().unwrap())
            .map(|c| c["name"].as_str().unwrap().to_owned())
            .collect();
        let mut expected: Vec<String> = header.split(separator).map(str::to_owned).collect();
        named.sort();
        expected.sort();
        assert_eq!(named, expected, "{name}");
    }
    // The wide export left FF-T12's columns out, and said why.
    let wide = replay_json(
        &plant,
        &plant.scratch.path("wide.csv"),
        "FF-T14",
        &plant.site,
        &hole,
    );
    let unused = wide["readings"]["unused"].to_string();
    assert!(
        unused.contains("FF-T12.LT-101 [m]") && unused.contains("a level of tank FF-T12"),
        "{unused}"
    );
    // The text says the same as the JSON: the columns, the unused ones and
    // the pressure conversion.
    let text = plant.ok(&[
        "replay",
        "--readings",
        plant.scratch.path("offset.csv").to_str().unwrap(),
        "--tank",
        "FF-T14",
        "--config",
        plant.site.to_str().unwrap(),
    ]);
    assert!(
        text.contains("column       \"pressure_kpa_abs\": pressure in kPa, absolute")
            && text.contains("converted to what the transmitter reads (gauge, in the headspace)")
            && text.contains("with an offset or Z"),
        "{text}"
    );

    // No pressure column on a tank with a transmitter: refused, unless the
    // headspace is stated, and then said.
    let mut text = String::from("utc,level_m\n");
    for (t, level, _) in &rows {
        text += &format!("{},{level}\n", utc(*t));
    }
    let bare = plant.scratch.write("bare.csv", &text);
    let refused = plant.cli(&[
        "replay",
        "--readings",
        bare.to_str().unwrap(),
        "--tank",
        "FF-T14",
        "--config",
        plant.site.to_str().unwrap(),
    ]);
    assert!(!refused.status.success());
    assert!(
        refused
            .stderr
            .contains("has a pressure transmitter (gauge, in the headspace)")
            && refused.stderr.contains("--headspace KPA"),
        "{}",
        refused.stderr
    );
    let mut args = hole.to_vec();
    args.extend(["--headspace", "15"]);
    let held = replay_json(&plant, &bare, "FF-T14", &plant.site, &args);
    assert!(
        held["readings"]["pressure"]
            .as_str()
            .unwrap()
            .contains("--headspace 15 kPa gauge is held for the whole file"),
        "{held:#}"
    );
    assert_eq!(held["readings"]["headspace_stated_kpa"], 15.0);

    // Gauge readings under a plain name, on a config whose transmitter
    // reads absolute: warned about in the JSON and the text, and the fix
    // the warning gives works.
    let site = std::fs::read_to_string(&plant.site).unwrap().replace(
        r#"range = [-10.0, 100.0], unit = "kPa", reference = "gauge""#,
        r#"range = [0.0, 250.0], unit = "kPa", reference = "absolute""#,
    );
    assert!(
        site.contains(
            r#"range = [0.0, 250.0], unit = "kPa", reference = "absolute", accuracy_kpa"#
        )
    );
    let absolute_site = plant.scratch.write("absolute-site.toml", &site);
    let mut text = String::from("utc,level_m,pressure_kpa\n");
    for (t, level, p) in &rows {
        text += &format!("{},{level},{}\n", utc(*t), kpa(*p));
    }
    let gauge = plant.scratch.write("gauge.csv", &text);
    let warned = replay_json(&plant, &gauge, "FF-T14", &absolute_site, &hole);
    let warnings = warned["readings"]["warnings"].to_string();
    assert!(
        warnings.contains("absolute readings below the ambient pressure")
            && warnings.contains(r#"--column \"pressure_kpa=pressure,kPa,gauge\""#),
        "{warnings}"
    );
    // Read as stated, the headspace is a deep vacuum and the orifice model
    // gives nothing; the level shows the loss, so the figures follow it and
    // say the model is contradicted.
    assert_eq!(warned["replayed"]["model_kg"], 0.0, "the model as stated");
    assert!(
        warned["replayed"]["warnings"]
            .as_array()
            .unwrap()
            .iter()
            .any(|w| w == "level_contradicts_model"),
        "{:#}",
        warned["replayed"]
    );
    let mut args = vec![
        "replay",
        "--readings",
        gauge.to_str().unwrap(),
        "--tank",
        "FF-T14",
        "--config",
        absolute_site.to_str().unwrap(),
    ];
    args.extend(hole);
    assert!(
        plant
            .ok(&args)
            .contains("WARNING: pressure column \"pressure_kpa\": ")
    );
    let mut fixed_args = hole.to_vec();
    fixed_args.extend(["--column", "pressure_kpa=pressure,kPa,gauge"]);
    let fixed = replay_json(&plant, &gauge, "FF-T14", &absolute_site, &fixed_args);
    assert_eq!(
        warnings_but_temperature(&fixed),
        Vec::<String>::new(),
        "{fixed:#}"
    );
    let end = fixed["replayed"]["at_ms"].as_i64().unwrap();
    let exact = truth.at("FF-T14", end).released_kg - truth.at("FF-T14", start).released_kg;
    let got = fixed["replayed"]["released_best_kg"].as_f64().unwrap();
    assert!(rel(got, exact) < 0.01, "{got} vs {exact}");

    // Repeated rows and rows out of order, as from two merged pulls: the
    // repeats counted with their lines, the rest sorted, the total as if
    // the file were clean.
    let mut lines: Vec<String> = gauge_lines(&rows);
    let repeat = lines[4].clone();
    lines.insert(5, repeat);
    lines.swap(8, 9);
    let last_but_two = lines[lines.len() - 3].clone();
    lines.push(last_but_two);
    let messy = plant.scratch.write(
        "messy.csv",
        &format!("utc,level_m,pressure_kpa_g\n{}", lines.concat()),
    );
    let clean = plant.scratch.write(
        "clean.csv",
        &format!(
            "utc,level_m,pressure_kpa_g\n{}",
            gauge_lines(&rows).concat()
        ),
    );
    let (messy, clean) = (
        replay_json(&plant, &messy, "FF-T14", &plant.site, &hole),
        replay_json(&plant, &clean, "FF-T14", &plant.site, &hole),
    );
    let r = &messy["readings"];
    assert_eq!(r["repeated_times"]["rows"], 2, "{r:#}");
    assert_eq!(
        r["repeated_times"]["lines"],
        serde_json::json!([7, lines.len() + 1])
    );
    assert_eq!(r["out_of_order"]["rows"], 2, "{r:#}");
    assert_eq!(r["out_of_order"]["action"], "sorted by time");
    assert_eq!(messy["replayed"], clean["replayed"]);
    assert_eq!(clean["readings"]["out_of_order"]["rows"], 0);
}

/// An export layout: its file name, its text, a columns file beside it (or
/// none), extra options, and what its pressure column should be read as.
type Layout<'a> = (&'a str, String, Option<&'a str>, Vec<&'a str>, &'a str);

/// The rows as `utc,level_m,pressure_kpa_g` lines.
fn gauge_lines(rows: &[(i64, f64, f64)]) -> Vec<String> {
    rows.iter()
        .map(|(t, level, p)| format!("{},{level},{}\n", utc(*t), p / 1000.0))
        .collect()
}

#[test]
fn outputs_never_replace_inputs_and_are_written_whole() {
    let scratch = Scratch::new("replay-outputs");
    let config = repo_config();
    // A draining level, 5,000 rows at 1 s: enough for the chart to thin.
    let mut text = String::from("utc,level_m\n");
    for i in 0..5000i64 {
        text += &format!("{},{}\n", 1_796_119_200 + i, 4.2 - 0.0005 * i as f64);
    }
    let readings = scratch.write("readings.csv", &text);
    std::os::unix::fs::symlink(&readings, scratch.path("link.csv")).unwrap();
    let db = scratch.path("site.db");
    std::fs::write(&db, "not really a database").unwrap();
    let replay = |args: &[&str]| {
        let mut cmd = Command::new(binary("leaktally"));
        cmd.current_dir(&scratch.0)
            .args([
                "replay",
                "--readings",
                "readings.csv",
                "--tank",
                "FF-T12",
                "--config",
            ])
            .arg(&config)
            .args([
                "--hole-diameter",
                "40",
                "--hole-height",
                "0.3",
                "--db",
                "site.db",
            ])
            .args(args);
        run("replay", &mut cmd, &scratch)
    };
    let refused = |args: &[&str], says: &str| {
        let done = replay(args);
        assert!(
            !done.status.success(),
            "{args:?} was not refused:\n{}",
            done.stdout
        );
        assert!(done.stderr.contains(says), "{args:?}: {}", done.stderr);
    };
    let input = "an input of this replay; an output never replaces an input";
    refused(&["--csv", "readings.csv"], input);
    refused(&["--csv", "link.csv"], input);
    refused(&["--csv", "./sub/../readings.csv"], "does not exist");
    std::fs::create_dir(scratch.path("sub")).unwrap();
    refused(&["--csv", "./sub/../readings.csv"], input);
    refused(&["--csv", config.to_str().unwrap()], "that is the config");
    refused(&["--csv", "site.db"], "that is the database");
    refused(
        &["--csv", "site.db-wal"],
        "that is the database's -wal file",
    );
    refused(
        &["--csv", "out.svg", "--plot", "./out.svg"],
        "is the same file as --csv",
    );
    refused(&["--csv", "sub"], "that is a folder");
    // The name the readings' columns file would have, which the next
    // replay of readings.csv would find by itself: refused before it
    // exists, however spelled, and once it does.
    let columns_name = "the name of the readings file's columns file";
    refused(&["--csv", "readings.csv.columns.toml"], columns_name);
    refused(
        &["--csv", "./sub/../readings.csv.columns.toml"],
        columns_name,
    );
    let columns = "[columns]\n\"utc\" = \"time\"\n";
    scratch.write("other.columns.toml", columns);
    refused(
        &[
            "--csv",
            "readings.csv.columns.toml",
            "--columns",
            "other.columns.toml",
        ],
        columns_name,
    );
    assert!(!scratch.path("readings.csv.columns.toml").exists());
    scratch.write("readings.csv.columns.toml", columns);
    refused(&["--csv", "readings.csv.columns.toml"], input);
    std::fs::remove_file(scratch.path("readings.csv.columns.toml")).unwrap();
    // Nothing was replaced, and no temporary file is left behind.
    assert_eq!(std::fs::read_to_string(&readings).unwrap(), text);
    assert_eq!(
        std::fs::read_to_string(&db).unwrap(),
        "not really a database"
    );

    let done = replay(&["--csv", "out.csv", "--plot", "out.svg"]);
    assert!(done.status.success(), "{}", done.stderr);
    let series = std::fs::read_to_string(scratch.path("out.csv")).unwrap();
    assert_eq!(
        series.lines().count(),
        5001,
        "a header and one row per estimate"
    );
    let svg = std::fs::read_to_string(scratch.path("out.svg")).unwrap();
    let doc = roxmltree::Document::parse(&svg).expect("the chart is well-formed XML");
    let most_points = doc
        .descendants()
        .filter_map(|n| n.attribute("points"))
        .map(|p| p.split_whitespace().count())
        .max()
        .unwrap();
    // Thinned to at most about 2,000 points (4,000 for a band's outline).
    assert!(most_points <= 4004, "{most_points} points");
    assert!(
        svg.contains("5000 estimates, up to"),
        "the chart says it is thinned"
    );
    // An existing output is kept unless --force is given.
    std::fs::write(scratch.path("out.csv"), "keep me").unwrap();
    refused(
        &["--csv", "out.csv"],
        "the file exists and was left as it is; give --force",
    );
    assert_eq!(
        std::fs::read_to_string(scratch.path("out.csv")).unwrap(),
        "keep me"
    );
    assert!(replay(&["--csv", "out.csv", "--force"]).status.success());
    assert_eq!(
        std::fs::read_to_string(scratch.path("out.csv")).unwrap(),
        series
    );
    // A replay that fails leaves nothing under the final name.
    refused(
        &["--csv", "never.csv", "--from", "2030-01-01T00:00:00Z"],
        "no usable sample in the range",
    );
    assert!(!scratch.path("never.csv").exists());
    let left: Vec<String> = std::fs::read_dir(&scratch.0)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".tmp"))
        .collect();
    assert!(left.is_empty(), "temporary files left: {left:?}");
}

/// `leaktally replay --readings FILE --tank TANK --config demo.toml ARGS`
/// in the scratch folder, which must succeed; its stdout.
fn replay_readings_ok(scratch: &Scratch, tank: &str, file: &Path, args: &[&str]) -> String {
    let mut cmd = Command::new(binary("leaktally"));
    cmd.current_dir(&scratch.0)
        .arg("replay")
        .arg("--readings")
        .arg(file)
        .args(["--tank", tank, "--config"])
        .arg(repo_config())
        .args(args);
    let done = run("replay", &mut cmd, scratch);
    assert!(done.status.success(), "{args:?}: {}", done.stderr);
    done.stdout
}

/// FF-T12's level falling for five minutes at 1 s, a ten-minute gap, then
/// another hundred seconds: most of the total is bridged across the gap.
/// Replayed with a 40 mm hole at 0.3 m (Cd not given) and `outputs`; the
/// JSON summary and its warning codes.
fn replay_across_a_gap(scratch: &Scratch, outputs: &[&str]) -> (Value, Vec<String>) {
    let mut text = String::from("utc,level_m\n");
    for i in (0..300).chain(900..1000) {
        text += &format!("{},{}\n", 1_796_119_200 + i, 4.2 - 0.0005 * i as f64);
    }
    let readings = scratch.write("gap.csv", &text);
    let mut args = vec!["--hole-diameter", "40", "--hole-height", "0.3", "--json"];
    args.extend(outputs);
    let doc: Value =
        serde_json::from_str(&replay_readings_ok(scratch, "FF-T12", &readings, &args)).unwrap();
    let codes: Vec<String> = doc["replayed"]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap().to_owned())
        .collect();
    assert!(
        codes.iter().any(|c| c == "bridged_gaps_dominate")
            && codes.iter().any(|c| c == "cd_assumed"),
        "{codes:?}"
    );
    (doc, codes)
}

/// The time series: the first format's columns first, then each
/// estimate's phase, whether vapour is choked, and its warning codes.
#[test]
fn the_time_series_carries_every_warning_and_the_phase() {
    let scratch = Scratch::new("replay-csv-warnings");
    let (_, codes) = replay_across_a_gap(&scratch, &["--csv", "gap-series.csv"]);
    let series = std::fs::read_to_string(scratch.path("gap-series.csv")).unwrap();
    // No field holds a comma or a quote: a plain split reads it.
    let mut lines = series.lines().map(|l| l.split(',').collect::<Vec<_>>());
    let header = lines.next().unwrap();
    assert_eq!(
        header,
        [
            "time",
            "at_ms",
            "level_m",
            "driving_pressure_pa",
            "rate_kg_s",
            "released_best_kg",
            "released_low_kg",
            "released_high_kg",
            "inventory_kg",
            "method",
            "samples_used",
            "samples_skipped",
            "gaps_bridged",
            "after_gap",
            "phase",
            "choked",
            "warnings",
            "method_text",
        ]
    );
    let records: Vec<Vec<&str>> = lines.collect();
    assert_eq!(records.len(), 400);
    assert!(records.iter().all(|r| r.len() == header.len()));
    // The method is a code, the one the JSON uses, with its words beside it;
    // the time is RFC 3339 UTC, the same instant as at_ms.
    for r in &records {
        let (method, text) = (r[9], r[17]);
        let words = match method {
            "orifice_given_hole" => "orifice model: given hole",
            "fitted_hole" => "orifice model: fitted hole",
            "inventory_balance" => "inventory balance",
            "no_data" => "no data yet",
            other => panic!("method {other:?} is not a code"),
        };
        assert_eq!(text, words);
        assert!(r[0].ends_with('Z'), "{}", r[0]);
        let at: jiff::Timestamp = r[0].parse().unwrap();
        assert_eq!(at.as_millisecond().to_string(), r[1]);
    }
    // The last row's warnings are the final estimate's, in its order.
    let last = records.last().unwrap();
    assert_eq!(last[14], "liquid");
    assert_eq!(last[15], "", "choked is for vapour only");
    assert_eq!(last[16].split(';').collect::<Vec<_>>(), codes);
    assert!(
        records[0][16].split(';').any(|w| w == "no_loss_seen"),
        "each row carries its own estimate's warnings: {:?}",
        records[0]
    );
}

/// The chart: each of the final estimate's warnings in words below the
/// lower panel's axis, and the share bridged across the gap above the
/// panels.
#[test]
fn the_chart_says_the_warnings_under_it() {
    let scratch = Scratch::new("replay-chart-warnings");
    let (doc, _) = replay_across_a_gap(&scratch, &["--plot", "gap.svg"]);
    let svg = std::fs::read_to_string(scratch.path("gap.svg")).unwrap();
    let chart = roxmltree::Document::parse(&svg).expect("well-formed XML");
    let y_of = |starts: &str| -> f64 {
        chart
            .descendants()
            .filter(|n| n.has_tag_name("text"))
            .find(|n| n.text().is_some_and(|t| t.contains(starts)))
            .unwrap_or_else(|| panic!("no {starts:?} in the chart"))
            .attribute("y")
            .unwrap()
            .parse()
            .unwrap()
    };
    let axis = chart
        .descendants()
        .filter(|n| n.text() == Some("time since the event start (min)"))
        .filter_map(|n| n.attribute("y")?.parse::<f64>().ok())
        .fold(0.0, f64::max);
    let words = doc["replayed_words"]["warnings_text"].as_array().unwrap();
    assert!(words.len() >= 3, "{words:?}");
    for w in words {
        let first: Vec<&str> = w.as_str().unwrap().split_whitespace().take(5).collect();
        assert!(y_of(&first.join(" ")) > axis, "{w} in the data area");
    }
    assert!(y_of("was bridged across 1 data gap(s), not measured") < y_of("Release rate"));
}

/// The density, said as status says it: fixed for FF-T12, from the
/// liquid's temperature for FF-T14 (methanol, 792 kg/m³ at 15 °C, 1.19e-3
/// per °C), from the reference where no temperature is read, and given.
#[test]
fn the_replay_says_which_density_it_uses() {
    let scratch = Scratch::new("replay-density");
    let mut fixed = String::from("utc,level_m\n");
    let mut warm = String::from("utc,level_m,pressure_kpa_g,temperature_c\n");
    let mut bare = String::from("utc,level_m,pressure_kpa_g\n");
    for i in 0..120 {
        let t = 1_796_119_200 + i;
        fixed += &format!("{t},{}\n", 4.2 - 0.0005 * i as f64);
        let level = 1.6 - 0.0002 * i as f64;
        warm += &format!("{t},{level},15.0,25.0\n");
        bare += &format!("{t},{level},15.0\n");
    }
    let fixed = scratch.write("fixed.csv", &fixed);
    let warm = scratch.write("warm.csv", &warm);
    let bare = scratch.write("bare.csv", &bare);
    let says = |tank: &str, file: &Path, args: &[&str], expected: &str| {
        let text = replay_readings_ok(&scratch, tank, file, args);
        assert!(text.contains(expected), "{expected:?} not in:\n{text}");
        let mut json = args.to_vec();
        json.push("--json");
        let doc: Value =
            serde_json::from_str(&replay_readings_ok(&scratch, tank, file, &json)).unwrap();
        assert!(
            expected.ends_with(doc["density_text"].as_str().unwrap()),
            "{:#}",
            doc["density_text"]
        );
    };
    says(
        "FF-T12",
        &fixed,
        &["--hole-height", "0.3"],
        "density      840 kg/m³ (fixed)",
    );
    // 792 / (1 + 1.19e-3 * 10) = 782.7
    says(
        "FF-T14",
        &warm,
        &["--hole-height", "0.2"],
        "density      783 kg/m³ at the liquid's 25.0 °C",
    );
    says(
        "FF-T14",
        &bare,
        &["--hole-height", "0.2"],
        "density      792 kg/m³ (the config's, at its reference temperature: no temperature reading)",
    );
    says(
        "FF-T14",
        &warm,
        &["--hole-height", "0.2", "--density", "800"],
        "density      800 kg/m³ (given, fixed)",
    );
}

fn repo_config() -> std::path::PathBuf {
    crate::util::repo_root().join("config/demo.toml")
}

/// A replay's readings warnings, less the one that says the export has no
/// temperature column for FF-T14 (whose density follows its temperature).
fn warnings_but_temperature(doc: &Value) -> Vec<String> {
    doc["readings"]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|w| w.as_str())
        .filter(|w| !w.contains("no column of the file is a temperature"))
        .map(str::to_owned)
        .collect()
}
