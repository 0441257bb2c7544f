//! `leaktally whatif` end to end, as a user runs it: the headspace pressure
//! read from a database a real daemon fills from the simulator (against the
//! simulator's truth), a hole above the liquid of the nitrogen-blanketed
//! tank, the options and their refusals, and the JSON document.

use crate::util::{
    Finished, ScenarioBuilder, ScenarioTank, Scratch, Truth, binary, demo_site, leaktally, now_ms,
    run, start_daemon, start_sim, toml_path, wait_for,
};
use leaktally::model::GAS_CONSTANT;
use serde_json::Value;
use std::path::Path;
use std::process::Command;
use std::time::Duration;

fn whatif(scratch: &Scratch, config: &Path, args: &[&str]) -> Finished {
    let mut command = Command::new(binary("leaktally"));
    command.arg("whatif").arg("--config").arg(config).args(args);
    run("leaktally-whatif", &mut command, scratch)
}

fn whatif_ok(scratch: &Scratch, config: &Path, args: &[&str]) -> String {
    let done = whatif(scratch, config, args);
    assert!(
        done.status.success(),
        "whatif {args:?} failed:\n{}\n{}",
        done.stdout,
        done.stderr
    );
    done.stdout
}

fn json(scratch: &Scratch, config: &Path, args: &[&str]) -> Value {
    let mut args = args.to_vec();
    args.push("--json");
    serde_json::from_str(&whatif_ok(scratch, config, &args)).expect("whatif --json is JSON")
}

/// The time of the truth file's last complete row, UTC ms.
fn truth_ends_ms(path: &Path) -> i64 {
    let text = std::fs::read_to_string(path).unwrap_or_default();
    let mut lines = text.lines();
    let Some(header) = lines.next() else {
        return i64::MIN;
    };
    let columns = header.split(',').count();
    let utc = header
        .split(',')
        .position(|h| h == "utc")
        .expect("a utc column");
    lines
        .filter(|l| l.split(',').count() >= columns)
        .filter_map(|l| l.split(',').nth(utc)?.parse::<jiff::Timestamp>().ok())
        .map(|t| t.as_millisecond())
        .max()
        .unwrap_or(i64::MIN)
}

fn demo_config() -> std::path::PathBuf {
    crate::util::repo_root().join("config/demo.toml")
}

/// The headspace from the last good reading in the database: FF-T14's
/// gauge transmitter in the headspace, and FF-T20's absolute transmitter low
/// on the shell, which also reads the liquid column above it and must come
/// out at the simulator's headspace (the truth file) once that is taken off;
/// and FF-T14's density at its last logged temperature, said as such.
#[test]
fn whatif_takes_the_headspace_from_the_last_logged_reading() {
    let scratch = Scratch::new("whatif-db");
    let scenario = ScenarioBuilder::demo()
        .seed(5)
        .tank(ScenarioTank::new("FF-T12", 4.0))
        .tank(
            ScenarioTank::new("FF-T14", 1.6)
                .headspace_kpa(22.0)
                .pressure_noise_pa(30.0)
                .temperature_c(25.0),
        )
        .tank(
            ScenarioTank::new("FF-T20", 5.1)
                .headspace_kpa(3.0)
                .pressure_noise_pa(30.0),
        )
        .write(&scratch);
    let (_sim, address) = start_sim(&scratch, &scenario, "127.0.0.1:0");
    let config = scratch.write("site.toml", &demo_site(&address));
    let db = scratch.path("leaktally.db");
    let _daemon = start_daemon(&scratch, "daemon", &config, &db);
    let db_text = db.to_str().unwrap();
    wait_for(
        "a logged pressure of FF-T20",
        Duration::from_secs(20),
        || {
            let doc = json(&scratch, &config, &["--tank", "FF-T20", "--db", db_text]);
            doc["headspace"]["source"] == "logged"
        },
    );
    for (tank, noise_pa) in [("FF-T14", 30.0), ("FF-T20", 30.0)] {
        let doc = json(&scratch, &config, &["--tank", tank, "--db", db_text]);
        let headspace = &doc["headspace"];
        assert_eq!(headspace["source"], "logged", "{tank}: {headspace:#}");
        let logged = &headspace["logged"];
        let at_ms = logged["at_ms"].as_i64().unwrap();
        // Machine times are RFC 3339 UTC, the same instant as at_ms.
        let at: jiff::Timestamp = logged["at"].as_str().unwrap().parse().unwrap();
        assert_eq!(at.as_millisecond(), at_ms, "{tank}");
        assert!(logged["at"].as_str().unwrap().ends_with('Z'), "{tank}");
        assert!(
            now_ms() - at_ms < 10_000,
            "{tank}: the reading is the latest"
        );
        // The simulator writes its truth every simulated second.
        wait_for(
            "the truth to cover the reading",
            Duration::from_secs(10),
            || truth_ends_ms(&scratch.path("truth.csv")) > at_ms,
        );
        let truth = Truth::load(&scratch.path("truth.csv"));
        let expected = truth.at(tank, at_ms).headspace_pa;
        let got = headspace["gauge_pa"].as_f64().unwrap();
        // The simulator's noise on the reading (30 Pa, one sigma) and the
        // register's quantisation (FF-T20: 250 kPa over 65535 counts).
        println!("{tank}: logged headspace {got:.0} Pa gauge, truth {expected:.0} Pa");
        assert!(
            (got - expected).abs() < 5.0 * noise_pa + 4.0,
            "{tank}: {got} Pa vs the truth {expected} Pa"
        );
        assert!(
            (headspace["absolute_pa"].as_f64().unwrap() - got - 101_325.0).abs() < 1e-6,
            "{tank}"
        );
        let text = whatif_ok(&scratch, &config, &["--tank", tank, "--db", db_text]);
        assert!(
            text.contains("the last good pressure reading in") && text.contains(" UTC ("),
            "{tank}: the text names the reading and its time:\n{text}"
        );
    }
    // FF-T14's methanol follows its temperature (792 kg/m³ at 15 °C,
    // 1.19e-3 per °C): with --db, at the liquid's last logged temperature,
    // read as 25 °C to the register's tenth of a degree, and said.
    let doc = json(&scratch, &config, &["--tank", "FF-T14", "--db", db_text]);
    let density = &doc["density"];
    assert_eq!(density["source"], "logged_temperature", "{density:#}");
    let logged_c = density["logged"]["temperature_c"].as_f64().unwrap();
    assert!((logged_c - 25.0).abs() < 0.051, "{density:#}");
    let expected = 792.0 / (1.0 + 1.19e-3 * (logged_c - 15.0));
    assert!((density["kg_m3"].as_f64().unwrap() / expected - 1.0).abs() < 1e-12);
    assert_eq!(doc["density_kg_m3"], density["kg_m3"]);
    assert!(
        doc["assumptions"].as_array().unwrap().iter().any(|a| a
            .as_str()
            .unwrap()
            .contains("last good logged temperature, 25.0 °C")),
        "{doc:#}"
    );
    let text = whatif_ok(&scratch, &config, &["--tank", "FF-T14", "--db", db_text]);
    assert!(
        text.contains("density    783 kg/m³: at the liquid's last good logged temperature"),
        "{text}"
    );
    // Without --db, the reference density, said to be one.
    let doc = json(&scratch, &config, &["--tank", "FF-T14"]);
    assert_eq!(doc["density"]["source"], "reference_temperature");
    assert_eq!(doc["density_kg_m3"], 792.0);
    assert!(
        doc["density"]["explanation"]
            .as_str()
            .unwrap()
            .contains("NOT at the liquid's temperature"),
        "{doc:#}"
    );

    let t20 = json(&scratch, &config, &["--tank", "FF-T20", "--db", db_text]);
    assert_eq!(t20["headspace"]["logged"]["tap"], "submerged");
    assert_eq!(t20["headspace"]["logged"]["reference"], "absolute");

    // A pressure given on the command line wins, and says so.
    let doc = json(
        &scratch,
        &config,
        &[
            "--tank",
            "FF-T14",
            "--db",
            db_text,
            "--headspace-kpa-abs",
            "130",
        ],
    );
    assert_eq!(doc["headspace"]["source"], "given_absolute");
    assert!((doc["headspace"]["gauge_pa"].as_f64().unwrap() - 28_675.0).abs() < 1e-6);
    assert!(
        doc["warnings"][0]
            .as_str()
            .unwrap()
            .contains("--db is not read"),
        "{doc:#}"
    );
    // A tank without a transmitter: the config's, with a word why.
    let doc = json(&scratch, &config, &["--tank", "FF-T12", "--db", db_text]);
    assert_eq!(doc["headspace"]["source"], "config_assumed");
    assert!(
        doc["warnings"][0]
            .as_str()
            .unwrap()
            .contains("no pressure transmitter")
    );
}

/// A hole above the liquid of the nitrogen-blanketed FF-T14: a vapour
/// forecast, named as such, not "flow stops after 0 s".
#[test]
fn a_hole_above_the_liquid_of_the_blanketed_tank_vents_its_gas() {
    let scratch = Scratch::new("whatif-vapour");
    let config = demo_config();
    let args = [
        "--tank",
        "FF-T14",
        "--level-m",
        "1.6",
        "--hole-height-m",
        "2.3",
        "--hole-diameters-mm",
        "25.4",
        "--horizons",
        "5s,1m,30m",
    ];
    let text = whatif_ok(&scratch, &config, &args);
    println!("{text}");
    for expected in [
        "15.0 kPa(g) = 116 kPa(a): the nominal blanket pressure in the config",
        "vapour, subcritical",
        "isothermal",
        "adiabatic",
        "at ambient",
        "blanket supply off",
        "CAUTION",
    ] {
        assert!(text.contains(expected), "missing {expected:?} in:\n{text}");
    }
    assert!(!text.contains("flow stops after"), "{text}");

    let doc = json(&scratch, &config, &args);
    assert_eq!(doc["format"], 2);
    let generated: jiff::Timestamp = doc["generated_at"].as_str().unwrap().parse().unwrap();
    assert!((now_ms() - generated.as_millisecond()).abs() < 60_000);
    let hole = &doc["holes"][0];
    assert_eq!(hole["phase"], "vapour");
    assert_eq!(hole["regime"], "subcritical");
    assert_eq!(hole["liquid"], Value::Null);
    let v = &hole["vapour"];
    // The isothermal bound releases, in all, what the ideal gas law says
    // the gas space loses going from 15 kPa gauge to ambient at 15 °C:
    // (p0 - pa) V M / (R T).
    let volume = v["ullage_volume_m3"].as_f64().unwrap();
    let total = 15_000.0 * volume * 0.028_01 / (GAS_CONSTANT * 288.15);
    let iso = &v["isothermal"]["cd_chosen"];
    let adi = &v["adiabatic"]["cd_chosen"];
    assert!(
        (iso["released_by_end_kg"].as_f64().unwrap() / total - 1.0).abs() < 1e-10,
        "{iso:#}"
    );
    // Adiabatic: the gas left at ambient is cold, (pa/p0)^(1/k) of the
    // initial density (isentropic expansion).
    let initial = v["initial_gas_kg"].as_f64().unwrap();
    let adiabatic_total = initial * (1.0 - (101_325.0f64 / 116_325.0).powf(1.0 / 1.4));
    assert!(
        (adi["released_by_end_kg"].as_f64().unwrap() / adiabatic_total - 1.0).abs() < 1e-10,
        "{adi:#}"
    );
    assert_eq!(iso["end"], "ambient");
    // The bands are named, the horizons labelled.
    let band = &v["band"][1];
    assert_eq!(band["after_s"], 60.0);
    assert!(
        band["released_low_kg"].as_f64().unwrap() <= band["released_high_kg"].as_f64().unwrap()
    );
    assert!((hole["hole_diameter_m"].as_f64().unwrap() - 0.0254).abs() < 1e-12);
    assert_eq!(hole["diameter_mm"], Value::Null, "lengths in m only");
    assert!(v["initial_rate_kg_s"]["cd_low"].as_f64().unwrap() > 0.0);
    assert_eq!(doc["horizons_s"], serde_json::json!([5.0, 60.0, 1800.0]));

    // With the supply on: the pressure settles where the outflow is the
    // supply, and the release goes on.
    let mut on = args.to_vec();
    on.extend(["--blanket-supply", "50Nm3/h"]);
    let doc = json(&scratch, &config, &on);
    let v = &doc["holes"][0]["vapour"];
    assert_eq!(v["supply"], "on");
    let supply = &doc["blanket_supply"];
    // 50 normal m³/h of nitrogen: 50 * 101325 * 0.02801 / (R * 273.15) / 3600
    // kg/s (the ideal gas law at 0 °C and 101.325 kPa).
    let kg_s = 50.0 * 101_325.0 * 0.028_01 / (GAS_CONSTANT * 273.15) / 3600.0;
    assert!((supply["rate_kg_s"].as_f64().unwrap() / kg_s - 1.0).abs() < 1e-12);
    for bound in ["isothermal", "adiabatic"] {
        let run = &v[bound]["cd_chosen"];
        assert_eq!(run["end"], "steady", "{bound}: {run:#}");
        assert!((run["rate_after_end_kg_s"].as_f64().unwrap() / kg_s - 1.0).abs() < 1e-12);
        let steady = run["end_pressure_gauge_pa"].as_f64().unwrap();
        assert!(steady > 0.0 && steady < 15_000.0, "{bound}: {steady}");
    }
    let text = whatif_ok(&scratch, &config, &on);
    assert!(text.contains("blanket supply on at 50 Nm³/h"), "{text}");
    assert!(text.contains("steady at"), "{text}");

    // The supply keeps feeding the adiabatic bound's cooler, denser gas:
    // it ends later and has released more by then, so neither "less,
    // sooner" nor one band "by the end" over both would be true. Each
    // bound's own end and total are given, and the horizons compare them.
    let (iso, adi) = (&v["isothermal"]["cd_chosen"], &v["adiabatic"]["cd_chosen"]);
    let f = |x: &Value, key: &str| x[key].as_f64().unwrap();
    assert!(
        f(adi, "end_after_s") > f(iso, "end_after_s")
            && f(adi, "released_by_end_kg") > f(iso, "released_by_end_kg"),
        "{v:#}"
    );
    for (bound, end) in [
        ("isothermal", &v["isothermal_end"]),
        ("adiabatic", &v["adiabatic_end"]),
    ] {
        let runs: Vec<&Value> = ["cd_low", "cd_chosen", "cd_high"]
            .iter()
            .map(|cd| &v[bound][*cd])
            .collect();
        let over = |key: &str, pick: fn(f64, f64) -> f64| {
            runs.iter().map(|r| f(r, key)).reduce(pick).unwrap()
        };
        assert_eq!(
            f(end, "after_low_s"),
            over("end_after_s", f64::min),
            "{bound}"
        );
        assert_eq!(
            f(end, "after_high_s"),
            over("end_after_s", f64::max),
            "{bound}"
        );
        assert_eq!(
            f(end, "released_low_kg"),
            over("released_by_end_kg", f64::min)
        );
        assert_eq!(
            f(end, "released_high_kg"),
            over("released_by_end_kg", f64::max)
        );
    }
    assert!(
        v["bounds_compared"]
            .as_str()
            .unwrap()
            .contains("the adiabatic bound ends later and releases more by its end"),
        "{v:#}"
    );
    // Every horizon's band spans both bounds at that same time.
    for (k, band) in v["band"].as_array().unwrap().iter().enumerate() {
        for bound in ["isothermal", "adiabatic"] {
            let at = f(&v[bound]["cd_chosen"]["horizons"][k], "released_kg");
            assert!(
                f(band, "released_low_kg") <= at && at <= f(band, "released_high_kg"),
                "{band:#}"
            );
        }
    }
    assert!(
        !text.contains("less, sooner") && !text.contains("by the end"),
        "{text}"
    );
    for expected in [
        "neither bound releases more throughout",
        "isothermal, by its end",
        "adiabatic, by its end",
        "ends later and releases more by its end",
    ] {
        assert!(text.contains(expected), "missing {expected:?} in:\n{text}");
    }
    // Without a supply nothing is released after the end: the totals
    // compare, and the text may say which bound releases less, sooner.
    let text = whatif_ok(&scratch, &config, &args);
    assert!(
        text.contains("in total") && text.contains("less, sooner"),
        "{text}"
    );
}

/// Liquid holes: rates in kg/s and m³/h, user horizons, time to a level,
/// a hole given by its area, and nothing released beyond the liquid above
/// the hole.
#[test]
fn liquid_holes_with_horizons_a_level_and_an_area() {
    let scratch = Scratch::new("whatif-liquid");
    let config = demo_config();
    let args = [
        "--tank",
        "FF-T14",
        "--level-m",
        "2.0",
        "--hole-height-m",
        "0.5",
        "--hole-areas-mm2",
        "506.7,8107",
        "--horizons",
        "5m,30m,2h",
        "--to-level-m",
        "1.0",
        "--cd",
        "0.8",
    ];
    let doc = json(&scratch, &config, &args);
    let rho = 792.0;
    let above = doc["liquid_above_hole_kg"].as_f64().unwrap();
    for hole in doc["holes"].as_array().unwrap() {
        assert_eq!(hole["phase"], "liquid");
        assert_eq!(hole["given_as"], "area");
        let l = &hole["liquid"];
        for cd in ["cd_low", "cd_chosen", "cd_high"] {
            let kg_s = l["initial_rate_kg_s"][cd].as_f64().unwrap();
            let m3_h = l["initial_rate_m3_h"][cd].as_f64().unwrap();
            assert!((m3_h - kg_s * 3600.0 / rho).abs() < 1e-9 * m3_h);
            for h in l["horizons"].as_array().unwrap() {
                let released = h["released_kg"][cd].as_f64().unwrap();
                assert!(released <= above * (1.0 + 1e-12), "{released} > {above}");
            }
            let t = l["to_level"]["reached_after_s"][cd].as_f64().unwrap();
            assert!(t > 0.0 && t < l["stops_after_s"][cd].as_f64().unwrap());
        }
        // Torricelli for the headspace held: the orifice equation at the
        // start, Cd A sqrt(2 rho dP), dP = 15 kPa + rho g (2.0 - 0.5).
        let area = hole["hole_area_m2"].as_f64().unwrap();
        let dp = 15_000.0 + rho * 9.806_65 * 1.5;
        let expected = 0.8 * area * (2.0 * rho * dp).sqrt();
        let got = l["initial_rate_kg_s"]["cd_chosen"].as_f64().unwrap();
        assert!((got / expected - 1.0).abs() < 1e-12, "{got} vs {expected}");
        assert_eq!(l["horizons"].as_array().unwrap().len(), 3);
    }
    let text = whatif_ok(&scratch, &config, &args);
    println!("{text}");
    for expected in [
        "released by 5 min",
        "released by 30 min",
        "released by 2 h",
        "level 1.00 m",
        "m³/h",
        "(506.7 mm²)",
        "Cd 0.80 [band]",
    ] {
        assert!(text.contains(expected), "missing {expected:?} in:\n{text}");
    }
    assert!(
        !text.contains("by 15 min") && !text.contains("in 15 min"),
        "user horizons replace the default:\n{text}"
    );
    // One unit per column: no kg/h anywhere in the rate columns.
    assert!(!text.contains("kg/h"), "{text}");
}

/// Refusals: each says what is wrong and how to put it right, and the
/// hole sizes follow the one rule `leak open` has.
#[test]
fn whatif_refuses_what_makes_no_sense_and_says_why() {
    let scratch = Scratch::new("whatif-refusals");
    let config = demo_config();
    let cases: &[(&[&str], &str)] = &[
        (&["--hole-diameters-mm", "1e-300"], "below 0.1 mm"),
        (&["--hole-diameters-mm", "6000"], "is over 5 m"),
        (&["--hole-areas-mm2", "0.001"], "below 0.1 mm"),
        (
            &["--hole-areas-mm2", "5", "--hole-diameters-mm", "5"],
            "cannot be used with",
        ),
        (
            &["--headspace-kpa", "10", "--headspace-kpa-abs", "110"],
            "cannot be used with",
        ),
        (
            &["--headspace-kpa", "-150"],
            "not a gauge pressure the tank can hold",
        ),
        (
            &["--blanket-supply", "50m3/h"],
            "the unit \"m3/h\" is not one",
        ),
        (&["--horizons", "5m,soon"], "is not a duration"),
        (&["--to-level-m", "2.4"], "is not below the level"),
        (&["--level-m", "3.0"], "above the top of the tank"),
        (&["--hole-height-m", "3.0"], "the tank is only 2.5 m tall"),
        (&["--db", "/nonexistent/x.db"], "x.db"),
    ];
    for (extra, expected) in cases {
        let mut args = vec!["--tank", "FF-T14"];
        args.extend_from_slice(extra);
        let done = whatif(&scratch, &config, &args);
        assert!(
            !done.status.success(),
            "{args:?} was accepted:\n{}",
            done.stdout
        );
        assert!(
            done.stderr.contains(expected),
            "{args:?}: expected {expected:?} in:\n{}",
            done.stderr
        );
        assert!(
            !done.stderr.contains("panicked"),
            "{args:?}: {}",
            done.stderr
        );
    }
    // The same rule as `leak open --hole-diameter`, from the same function.
    assert_eq!(leaktally::estimate::HOLE_DIAMETER_RANGE_MM, (0.1, 5000.0));

    // FF-T12 has no vapour properties: a supply cannot be forecast.
    let done = whatif(
        &scratch,
        &config,
        &["--tank", "FF-T12", "--blanket-supply", "5kg/h"],
    );
    assert!(!done.status.success());
    assert!(
        done.stderr.contains("no vapour properties"),
        "{}",
        done.stderr
    );
}

/// A hole far under the smallest one `leak` takes is refused by `whatif`
/// with the very words `leak open` uses, and its size said in a few
/// characters (not as 300 zeros).
#[test]
fn whatif_refuses_a_tiny_hole_in_the_words_of_leak() {
    let scratch = Scratch::new("whatif-tiny-hole");
    let config = demo_config();
    let error_line = |done: &Finished| -> String {
        assert!(!done.status.success(), "accepted:\n{}", done.stdout);
        done.stderr
            .lines()
            .find(|l| l.starts_with("error: "))
            .unwrap_or_else(|| panic!("no error line in:\n{}", done.stderr))
            .to_owned()
    };
    let whatif = error_line(&whatif(
        &scratch,
        &config,
        &["--tank", "FF-T14", "--hole-diameter", "1e-300"],
    ));
    let mut leak = Command::new(binary("leaktally"));
    leak.args([
        "leak",
        "open",
        "--tank",
        "FF-T14",
        "--hole-diameter-mm",
        "1e-300",
    ])
    .arg("--db")
    .arg(scratch.path("none.db"));
    let leak = error_line(&run("leaktally-leak", &mut leak, &scratch));
    assert_eq!(whatif, leak);
    assert_eq!(
        whatif,
        "error: --hole-diameter-mm 1e-300 is below 0.1 mm, smaller than any hole a tank leaks through; the option takes millimetres (25 for a one-inch hole)"
    );
}

/// A tank with a transmitter and no nominal pressure, no --headspace and
/// no --db: 0 kPa, with the warning in the text and in the JSON.
#[test]
fn an_assumed_zero_headspace_is_said_in_the_text_and_the_json() {
    let scratch = Scratch::new("whatif-zero");
    let text = std::fs::read_to_string(demo_config())
        .unwrap()
        .replace("nominal_headspace_kpa = 15.0\n", "");
    let config = scratch.write("site.toml", &text);
    let doc = json(&scratch, &config, &["--tank", "FF-T14"]);
    assert_eq!(doc["headspace"]["source"], "assumed_zero");
    assert_eq!(doc["headspace"]["gauge_pa"], 0.0);
    assert!(
        doc["warnings"][0].as_str().unwrap().contains("unsafe side"),
        "{doc:#}"
    );
    let text = whatif_ok(&scratch, &config, &["--tank", "FF-T14"]);
    assert!(
        text.contains("WARNING:") && text.contains("ASSUMED"),
        "{text}"
    );
}

/// `leak open` on a tank with an open event is refused by the daemon; the
/// refusal is one line on stderr, ended, so that whatever the shell prints
/// next starts a line of its own. (The end-to-end `leak` tests live in
/// `tracking`; this one sits beside `whatif`'s other daemon.)
#[test]
fn a_refused_leak_open_ends_its_line() {
    let scratch = Scratch::new("leak-refused");
    let site = scratch.write("sim-site.toml", &demo_site("127.0.0.1:1"));
    let scenario = scratch.write(
        "scenario.toml",
        &format!(
            "site = {}\nseed = 5\n[[tank]]\nid = \"FF-T12\"\ninitial_level_m = 4.0\n\
             [[tank]]\nid = \"FF-T14\"\ninitial_level_m = 1.6\n\
             [[tank]]\nid = \"FF-T20\"\ninitial_level_m = 5.1\n",
            toml_path(&site)
        ),
    );
    let (_sim, address) = start_sim(&scratch, &scenario, "127.0.0.1:0");
    let config = scratch.write("site.toml", &demo_site(&address));
    let db = scratch.path("leaktally.db");
    let _daemon = start_daemon(&scratch, "daemon", &config, &db);
    let open = [
        "leak",
        "open",
        "--tank",
        "FF-T12",
        "--hole-height-m",
        "0.3",
        "--cd",
        "0.61",
    ];
    let first = leaktally(&scratch, &db, &open);
    assert!(first.status.success(), "{}", first.stderr);
    assert!(first.stdout.ends_with('\n'), "{:?}", first.stdout);
    let refused = leaktally(&scratch, &db, &open);
    assert!(!refused.status.success(), "{}", refused.stdout);
    assert_eq!(refused.stdout, "");
    assert!(
        refused
            .stderr
            .ends_with("already has open event 1; revise or close it first\n"),
        "{:?}",
        refused.stderr
    );
    assert_eq!(
        refused
            .stderr
            .lines()
            .filter(|l| l.starts_with("error: "))
            .count(),
        1,
        "{:?}",
        refused.stderr
    );
}

/// A site that works in US customary units and its own time zone: the
/// tables and prose in lb, lb/s, in, ft and psi, one unit per column,
/// cumulative totals said as such, while the JSON stays SI with the unit in
/// each name. The old option names still work.
#[test]
fn a_us_site_reads_its_own_units_and_the_json_stays_si() {
    let scratch = Scratch::new("whatif-us");
    let demo = std::fs::read_to_string(demo_config()).unwrap();
    let us = demo.replacen(
        "time_zone = \"local\"\n",
        "time_zone = \"America/Chicago\"\nunits = \"us\"\n",
        1,
    );
    assert_ne!(us, demo, "the demo config names its time zone");
    let config = scratch.path("us.toml");
    std::fs::write(&config, us).unwrap();
    // The old names, now hidden aliases.
    let args = [
        "--tank",
        "FF-T14",
        "--level",
        "2.0",
        "--hole-height",
        "0.5",
        "--hole-diameter",
        "25.4",
        "--to-level",
        "1.0",
    ];
    let text = whatif_ok(&scratch, &config, &args);
    println!("{text}");
    for expected in [
        "level      6.56 ft (given)",
        "1.64 ft above the bottom",
        "psig = ",
        "psia",
        "US gal",
        "released by 15 min",
        "released by 1 h",
        "lb/s",
        "US gal/min",
        "level 3.28 ft",
    ] {
        assert!(text.contains(expected), "missing {expected:?} in:\n{text}");
    }
    for unexpected in [" kg ", "kg/s", "kg/h", "kPa", " mm ", "in 15 min"] {
        assert!(
            !text.contains(unexpected),
            "{unexpected:?} in a US site's text:\n{text}"
        );
    }
    let doc = json(&scratch, &config, &args);
    assert_eq!(doc["format"], 2);
    let hole = &doc["holes"][0];
    assert!((hole["hole_diameter_m"].as_f64().unwrap() - 0.0254).abs() < 1e-12);
    assert!((doc["level_m"].as_f64().unwrap() - 2.0).abs() < 1e-12);
    assert!(hole["liquid"]["horizons"][0]["released_kg"]["cd_chosen"].is_f64());
    assert!(doc["generated_at"].as_str().unwrap().ends_with('Z'));
}
