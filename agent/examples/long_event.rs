//! Builds a database holding one long logged event, as the daemon would
//! have logged it (the samples, and the estimates the live estimator made of
//! them), for the replay memory benchmark in BENCHMARKS.md:
//!
//!     cargo run --release -p leaktally --example long_event -- long.db 1000000
//!     /usr/bin/time -v target/release/leaktally replay 1 --db long.db --config config/demo.toml
//!
//! FF-T12 of config/demo.toml drains through a 10 mm hole, one sample a
//! second, by the analytic Torricelli solution with 1 mm of level noise from
//! a fixed-seed generator. Invented data for measuring memory, not a
//! reference. A million samples make a database of about 160 MB.

use leaktally::acquire::sample::{Reading, TankSample};
use leaktally::estimate::LeakParams;
use leaktally::estimator::Estimator;
use std::path::Path;

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let (Some(db), Some(count)) = (args.get(1), args.get(2)) else {
        anyhow::bail!("usage: long_event DB SAMPLES (the database must not exist yet)");
    };
    let count: usize = count.parse()?;
    if Path::new(db).exists() {
        anyhow::bail!("{db} exists; give a new file");
    }
    let config = leaktally::config::load(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"),
    )?;
    let tank = config
        .tanks
        .iter()
        .find(|t| t.id == "FF-T12")
        .ok_or_else(|| anyhow::anyhow!("config/demo.toml has no FF-T12"))?;
    let conn = leaktally::store::open_read_write(Path::new(db))?;
    leaktally::store::register_tanks(&conn, ["FF-T12"])?;
    let start = 1_796_119_200_000i64; // 2026-12-01T10:00:00Z
    let params = LeakParams {
        hole_diameter_m: Some(0.01),
        hole_height_m: 0.3,
        cd: 0.61,
        density_kg_m3: None,
        ..LeakParams::default()
    };
    let event = leaktally::store::create_event(&conn, "FF-T12", start, start, "operator", &params)?;
    let mut estimator = Estimator::new(tank, params, start, 1000)?;
    let (level0, hole) = (4.2f64, 0.3f64);
    // sqrt(h - z) falls linearly: d/dt sqrt(h - z) = -Cd a sqrt(2 g) / (2 A).
    let k = 0.61 * (std::f64::consts::PI * 0.01f64.powi(2) / 4.0) * (2.0f64 * 9.80665).sqrt()
        / (2.0 * std::f64::consts::PI * 1.5f64.powi(2));
    let mut state = 1u64;
    let mut noise = || {
        state = state
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        ((state >> 11) as f64 / (1u64 << 53) as f64 - 0.5) * 0.002
    };
    let (mut samples, mut estimates) = (Vec::new(), Vec::new());
    for i in 0..count {
        let s = ((level0 - hole).sqrt() - k * i as f64).max(0.0);
        let level = ((s * s + hole + noise()) * 1e4).round() / 1e4;
        let sample = TankSample {
            tank: 0,
            tank_id: "FF-T12".into(),
            at_ms: start + 1000 * i as i64,
            level: Reading::good(level),
            pressure: None,
            transfer: Some(Reading::good(0.0)),
            temperature: None,
            leak_flag: Some(Some(false)),
        };
        estimates.extend(estimator.push_and_estimate(&sample));
        samples.push(sample);
        if samples.len() == 10_000 || i + 1 == count {
            // As the tracker does: a batch's samples and estimates together.
            let batch = conn.unchecked_transaction()?;
            leaktally::store::insert_samples(&batch, &samples)?;
            leaktally::store::insert_estimates(&batch, event, 1, &estimates)?;
            batch.commit()?;
            samples.clear();
            estimates.clear();
        }
    }
    leaktally::store::close_event(&conn, event, start + 1000 * count as i64)?;
    println!("event {event} on FF-T12: {count} samples in {db}");
    Ok(())
}
