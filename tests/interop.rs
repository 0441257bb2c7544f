//! The Modbus path checked against an independent implementation, the
//! Python package pymodbus 3.16.1 (pinned in tests/python/requirements.txt),
//! in both directions:
//!
//! * the agent (`leaktally poll`, the real binary) reads a pymodbus server
//!   whose registers pymodbus itself encoded (tests/python/peer_server.py);
//! * a pymodbus client (tests/python/peer_client.py) reads the simulator
//!   (`leaktally-sim`, the real binary) and decodes with pymodbus's own
//!   converter.
//!
//! Each check names its source beside it. Every process binds 127.0.0.1 on a
//! port the OS picks, and is killed when its guard drops, also when an
//! assertion fails. The binaries must be built first (`cargo build
//! --workspace`); the Python venv is built on first use (see `python_env`).
//!
//! Left out: the agent's reconnect and timeout behaviour (pymodbus has no
//! way to drop a link on cue; the simulator's `link_drops` event covers it
//! elsewhere) and serial Modbus.

use crate::python_env::{python, script};
use crate::util::{ScenarioBuilder, ScenarioTank, Scratch, Server, repo_root, run};
use leaktally::registers::WordOrder;
use serde_json::Value;
use std::path::Path;
use std::process::Command;

/// A sample's reading as (value, quality).
fn reading(sample: &Value, role: &str) -> (Option<f64>, String) {
    let r = &sample[role];
    (
        r["value"].as_f64(),
        r["quality"].as_str().unwrap_or("<missing>").to_owned(),
    )
}

// ---------------------------------------------------------------------------
// The agent reads a pymodbus server
// ---------------------------------------------------------------------------

/// The site the agent polls on the pymodbus server: one device, three
/// tanks. `bridge_gaps = false` keeps the read of the invalid registers at
/// 16..18 apart from the good ones at 10..14 (plan.rs merges only
/// contiguous values then), so only the sensor mapped there fails.
fn peer_site(address: &str) -> String {
    format!(
        r#"# Written by tests/interop.rs for the pymodbus peer (tests/python/peer_server.py).
[site]
name = "interop with pymodbus"

[[device]]
id = "peer"
address = "{address}"
unit_id = 1
poll_interval_ms = 500
request_timeout_ms = 400
bridge_gaps = false

[[tank]]
id = "T1"
device = "peer"
geometry = {{ shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }}
substance = {{ name = "water", density_kg_m3 = 1000.0 }}
level = {{ register = "holding", address = 10, type = "f32", word_order = "high_first", range = [0.0, 5.0], unit = "m" }}
pressure = {{ register = "holding", address = 12, type = "f32", word_order = "low_first", range = [-50.0, 100.0], unit = "kPa", reference = "gauge" }}
leak_flag = {{ input = "coil", address = 0 }}

[[tank]]
id = "T2"
device = "peer"
geometry = {{ shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }}
substance = {{ name = "water", density_kg_m3 = 1000.0 }}
level = {{ register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }}
transfer = {{ register = "input", address = 1, type = "i16", raw = [-10000, 10000], range = [-100.0, 100.0], unit = "m3/h" }}

[[tank]]
id = "T3"
device = "peer"
geometry = {{ shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }}
substance = {{ name = "water", density_kg_m3 = 1000.0 }}
level = {{ register = "holding", address = 16, type = "f32", range = [0.0, 5.0], unit = "m" }}
"#
    )
}

#[test]
fn agent_reads_a_pymodbus_server() {
    let agent = crate::util::binary("leaktally");
    let python = python();
    let scratch = Scratch::new("agent");
    let mut server = Server::start(
        "peer_server.py",
        Command::new(&python)
            .arg(script("peer_server.py"))
            .args(["--port", "0"]),
        scratch.path("peer_server.stderr"),
    );
    let address = server.address();
    let config = scratch.write("site.toml", &peer_site(&address));

    let poll = run(
        "leaktally-poll",
        Command::new(&agent)
            .arg("poll")
            .arg("--config")
            .arg(&config)
            .args(["--seconds", "3"]),
        &scratch,
    );
    // T3's level is on registers the server refuses (below): poll says so
    // with its own exit code, 3, as check does.
    assert_eq!(
        poll.status.code(),
        Some(3),
        "leaktally poll ({}):\n{}",
        poll.status,
        poll.stderr
    );
    let samples: Vec<Value> = poll
        .stdout
        .lines()
        .map(|line| {
            serde_json::from_str(line)
                .unwrap_or_else(|e| panic!("a poll line is not JSON ({e}): {line}"))
        })
        .collect();
    let context = || {
        format!(
            "poll stdout:\n{}\npoll stderr:\n{}\npeer_server.py stderr:\n{}",
            poll.stdout,
            poll.stderr,
            server.stderr()
        )
    };
    for id in ["T1", "T2", "T3"] {
        let n = samples.iter().filter(|s| s["tank"] == id).count();
        // 3 s at a 500 ms interval is about six cycles; two leave slack.
        assert!(
            n >= 2,
            "tank {id}: {n} samples, expected at least 2\n{}",
            context()
        );
    }

    // Every cycle must decode the same: the server's values never change.
    for s in &samples {
        let id = s["tank"].as_str().unwrap_or("<no tank>");
        match id {
            "T1" => {
                // pymodbus 3.16.1 SimData(DataType.FLOAT32) encoded 3.75 high word
                // first (registers 0x4070, 0x0000): level 3.75 m.
                assert_eq!(
                    reading(s, "level_m"),
                    (Some(3.75), "good".into()),
                    "T1 level\n{}",
                    context()
                );
                // pymodbus 3.16.1 convert_to_registers(-12.5, FLOAT32,
                // word_order="little"): -12.5 kPa gauge, reported in Pa.
                assert_eq!(
                    reading(s, "pressure_pa_gauge"),
                    (Some(-12_500.0), "good".into()),
                    "T1 pressure\n{}",
                    context()
                );
                // pymodbus 3.16.1 SimData(DataType.BITS): coil 0 on.
                assert_eq!(
                    s["leak_flag"],
                    Value::Bool(true),
                    "T1 leak flag\n{}",
                    context()
                );
                assert_eq!(s["transfer_m3_s"], Value::Null, "T1 maps no transfer");
            }
            "T2" => {
                // pymodbus 3.16.1 input register 0 = 12000 counts, on a
                // 4000..20000 span for 0..5 m: 2.5 m.
                assert_eq!(
                    reading(s, "level_m"),
                    (Some(2.5), "good".into()),
                    "T2 level\n{}",
                    context()
                );
                // pymodbus 3.16.1 convert_to_registers(-2500, INT16): -2500
                // counts on -10000..10000 for -100..100 m³/h is -25 m³/h.
                let (flow, quality) = reading(s, "transfer_m3_s");
                assert_eq!(quality, "good", "T2 transfer\n{}", context());
                let flow = flow.expect("a good reading has a value");
                assert!(
                    (flow - -25.0 / 3600.0).abs() < 1e-15,
                    "T2 transfer {flow} m³/s, expected -25 m³/h = {} m³/s",
                    -25.0 / 3600.0
                );
                assert_eq!(s["pressure_pa_gauge"], Value::Null, "T2 maps no pressure");
                assert_eq!(
                    s["pressure_pa_absolute"],
                    Value::Null,
                    "T2 maps no pressure"
                );
                assert_eq!(s["leak_flag"], Value::Null, "T2 maps no leak flag");
            }
            "T3" => {
                // pymodbus 3.16.1 answers a read of registers marked
                // DataType.INVALID with exception 2 (IllegalDataAddress), which
                // the agent flags as a device error, without a value.
                assert_eq!(
                    reading(s, "level_m"),
                    (None, "device_error".into()),
                    "T3 level\n{}",
                    context()
                );
            }
            other => panic!("a sample for unknown tank {other:?}\n{}", context()),
        }
    }
}

// ---------------------------------------------------------------------------
// A pymodbus client reads the simulator
// ---------------------------------------------------------------------------

/// The truth the scenario sets up for FF-T14 of config/demo.toml.
const T14_LEVEL_M: f64 = 1.25;
const T14_LEVEL_NOISE_M: f64 = 0.001;
const T14_HEADSPACE_KPA: f64 = 12.5;
const T14_PRESSURE_NOISE_PA: f64 = 20.0;
/// FF-T12 without noise at 2.5 m: exactly 12000 counts on 4000..20000 for 0..5 m.
const T12_LEVEL_M: f64 = 2.5;

/// A scenario for the demo site: no leak, FF-T14 under a steady blanket with
/// a little sensor noise, FF-T12 noise-free with its leak flag raised.
fn demo_scenario(site: &Path) -> ScenarioBuilder {
    ScenarioBuilder::for_site(site)
        .seed(7)
        .tank(ScenarioTank::new("FF-T12", T12_LEVEL_M))
        .tank(
            ScenarioTank::new("FF-T14", T14_LEVEL_M)
                .headspace_kpa(T14_HEADSPACE_KPA)
                .level_noise_m(T14_LEVEL_NOISE_M)
                .pressure_noise_pa(T14_PRESSURE_NOISE_PA),
        )
        .tank(ScenarioTank::new("FF-T20", 3.0))
        .raise_flag(0.0, "FF-T12")
}

/// pymodbus's name for a word order.
fn pymodbus_order(order: WordOrder) -> (&'static str, &'static str) {
    match order {
        WordOrder::HighFirst => ("big", "little"),
        WordOrder::LowFirst => ("little", "big"),
    }
}

#[test]
fn pymodbus_client_reads_the_simulator() {
    let sim = crate::util::binary("leaktally-sim");
    let python = python();
    let scratch = Scratch::new("sim");
    let site_path = repo_root().join("config/demo.toml");
    // The register map comes from the same config the simulator serves.
    let site = leaktally::config::load(&site_path).expect("config/demo.toml loads");
    let t14 = site
        .tanks
        .iter()
        .find(|t| t.id == "FF-T14")
        .expect("FF-T14 in config/demo.toml");
    let t12 = site
        .tanks
        .iter()
        .find(|t| t.id == "FF-T12")
        .expect("FF-T12 in config/demo.toml");
    assert_eq!(t14.device, t12.device, "FF-T12 and FF-T14 share rtu-east");
    let unit = site.devices[t14.device].unit_id;
    let level = &t14.level;
    let pressure = &t14
        .pressure
        .as_ref()
        .expect("FF-T14 has a pressure sensor")
        .sensor;
    let coil = t12.leak_flag.expect("FF-T12 has a leak flag").address;

    let scenario = demo_scenario(&site_path).write(&scratch);
    let mut server = Server::start(
        "leaktally-sim",
        Command::new(&sim)
            .arg("--scenario")
            .arg(&scenario)
            .args(["--listen", "127.0.0.1:0"]),
        scratch.path("sim.stderr"),
    );
    let address = server.address();

    let client = run(
        "peer_client",
        Command::new(&python)
            .arg(script("peer_client.py"))
            .arg(&address)
            .arg("--unit")
            .arg(unit.to_string())
            .arg("--f32")
            .arg(level.address.to_string())
            .arg("--f32")
            .arg(pressure.address.to_string())
            .arg("--u16")
            .arg(t12.level.address.to_string())
            .arg("--coil")
            .arg(coil.to_string())
            .arg("--write")
            .arg(level.address.to_string())
            .arg("--oversize")
            .arg("0")
            .arg("--bad-address")
            .arg("65535"),
        &scratch,
    );
    let context = || {
        format!(
            "peer_client.py stdout:\n{}\nstderr:\n{}\nleaktally-sim stderr:\n{}",
            client.stdout,
            client.stderr,
            server.stderr()
        )
    };
    assert!(
        client.status.success(),
        "peer_client.py failed ({})\n{}",
        client.status,
        context()
    );
    let report: Value = serde_json::from_str(client.stdout.trim())
        .unwrap_or_else(|e| panic!("peer_client.py printed no JSON ({e})\n{}", context()));
    assert_eq!(report["pymodbus_version"], "3.16.1");
    let read_at = |table: &str, address: u16| -> &Value {
        report["reads"]
            .as_array()
            .and_then(|reads| {
                reads
                    .iter()
                    .find(|r| r["table"] == table && r["address"] == u64::from(address))
            })
            .unwrap_or_else(|| panic!("no {table} read at {address}\n{}", context()))
    };

    // FF-T14 level, an f32 high word first: pymodbus 3.16.1
    // convert_from_registers(FLOAT32, word_order="big") gives the scenario's
    // initial level within the sensor noise (6 standard deviations).
    // FF-T14 pressure, an f32 low word first: word_order="little" gives the
    // headspace gauge pressure within its noise. The other word order must
    // not happen to give the same figure.
    for (sensor, truth, tolerance, what) in [
        (level, T14_LEVEL_M, 6.0 * T14_LEVEL_NOISE_M, "level, m"),
        (
            pressure,
            T14_HEADSPACE_KPA,
            6.0 * T14_PRESSURE_NOISE_PA / 1000.0,
            "pressure, kPa",
        ),
    ] {
        let read = read_at("holding", sensor.address);
        let (right, wrong) = pymodbus_order(sensor.word_order);
        let got = read["float32"][right]
            .as_f64()
            .unwrap_or_else(|| panic!("FF-T14 {what}: no finite {right} decode\n{}", context()));
        assert!(
            (got - truth).abs() <= tolerance,
            "FF-T14 {what}: pymodbus decoded {got} ({right} word order), truth {truth} ± {tolerance}\n{}",
            context()
        );
        let other = read["float32"][wrong].as_f64();
        assert!(
            other.is_none_or(|x| (x - truth).abs() > 1.0),
            "FF-T14 {what}: the {wrong} word order also decodes near {truth} ({other:?}); \
             the registers would not tell the orders apart\n{}",
            context()
        );
    }

    // FF-T12 level: pymodbus 3.16.1 convert_from_registers(UINT16) reads
    // exactly 12000 counts for a noise-free 2.5 m on 4000..20000 for 0..5 m.
    let counts = read_at("input", t12.level.address)["uint16"].as_u64();
    assert_eq!(counts, Some(12_000), "FF-T12 level counts\n{}", context());
    assert_eq!(
        t12.level.to_raw(T12_LEVEL_M),
        12_000.0,
        "the demo's FF-T12 scaling"
    );

    // FF-T12 leak flag: pymodbus 3.16.1 read_coils sees the coil the
    // scenario's raise_flag event set.
    assert_eq!(
        read_at("coil", coil)["bits"],
        serde_json::json!([true]),
        "FF-T12 leak flag coil\n{}",
        context()
    );

    // pymodbus 3.16.1 write_register (FC06): the simulator refuses every
    // write with exception 1, IllegalFunction.
    assert_eq!(
        report["write_register"]["exception_code"],
        1,
        "write_register\n{}",
        context()
    );

    // 126 registers, one over the limit of the Modbus application protocol
    // V1.1b3 section 6.3: pymodbus 3.16.1 refuses to send it by itself, and
    // with its limit lifted the simulator answers exception 3,
    // IllegalDataValue, as the spec asks for a quantity outside 1..125.
    let oversize = &report["oversize_read"];
    assert!(
        oversize["client_refused"].is_string(),
        "pymodbus 3.16.1 was expected to refuse count=126 itself\n{}",
        context()
    );
    assert_eq!(
        oversize["exception_code"],
        3,
        "126-register read\n{}",
        context()
    );

    // Two registers from 65535 run past the address space: pymodbus 3.16.1
    // gets exception 2, IllegalDataAddress.
    assert_eq!(
        report["bad_address_read"]["exception_code"],
        2,
        "read past address 65535\n{}",
        context()
    );
}
