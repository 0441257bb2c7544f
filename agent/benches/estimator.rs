//! Benchmarks of the estimator's hot paths: one sample through the running
//! tally and through the event estimator, a draining forecast to flow stop,
//! and a replay of a day of 1 Hz samples. Run with
//! `cargo bench -p leaktally --bench estimator`.

use criterion::{Criterion, criterion_group, criterion_main};
use leaktally::acquire::sample::{Reading, TankSample};
use leaktally::estimate::LeakParams;
use leaktally::estimator::Estimator;
use leaktally::model::{
    AbsolutePressure, Density, DischargeCoefficient, Geometry, Heads, Hole, Length, Pressure,
    ReleaseTally, TankState, TimeSpan, Vessel, forecast_liquid,
};
use std::hint::black_box;

fn vessel(geometry: Geometry) -> Vessel {
    Vessel::new(
        geometry,
        Density::kg_per_cubic_metre(850.0),
        AbsolutePressure::STANDARD_ATMOSPHERE,
        None,
    )
    .unwrap()
}

fn tally_step(c: &mut Criterion) {
    let v = vessel(Geometry::vertical_cylinder(Length::metres(6.0), Length::metres(8.0)).unwrap());
    let hole = Hole::new(Length::millimetres(25.0), Length::metres(0.4)).unwrap();
    let mut tally = ReleaseTally::new(v, hole, DischargeCoefficient::SHARP_EDGED).unwrap();
    let mut t_ms = 0i64;
    c.bench_function("tally_push_one_sample", |b| {
        b.iter(|| {
            t_ms += 1000;
            // A level that wanders a little, as a noisy sensor's does.
            let level = 6.0 - (t_ms % 7919) as f64 * 1e-6;
            let state = TankState {
                level: Length::metres(level),
                headspace: Pressure::pascals(120.0),
            };
            black_box(tally.push(black_box(t_ms), black_box(&state)).unwrap())
        })
    });
}

fn forecast_to_stop(c: &mut Criterion) {
    let start = TankState {
        level: Length::metres(2.2),
        headspace: Pressure::kilopascals(20.0),
    };
    let horizons = [TimeSpan::minutes(15.0), TimeSpan::hours(1.0)];
    let hole = Hole::new(Length::millimetres(25.0), Length::metres(0.3)).unwrap();
    let shapes = [
        (
            "vertical",
            Geometry::vertical_cylinder(Length::metres(3.0), Length::metres(5.0)).unwrap(),
        ),
        (
            "horizontal",
            Geometry::horizontal_cylinder(Length::metres(2.5), Length::metres(8.0), Heads::Flat)
                .unwrap(),
        ),
    ];
    for (name, g) in shapes {
        let v = vessel(g);
        c.bench_function(&format!("forecast_to_stop_{name}"), |b| {
            b.iter(|| {
                forecast_liquid(
                    black_box(&v),
                    &hole,
                    DischargeCoefficient::SHARP_EDGED,
                    black_box(&start),
                    &horizons,
                )
                .unwrap()
            })
        });
    }
}

/// A day of 1 Hz samples of tank FF-T12 (demo site) draining through a small
/// hole, with a level that wanders by a few tenths of a millimetre.
fn day_of_samples() -> (leaktally::config::Tank, Vec<TankSample>) {
    let config = leaktally::config::load(
        &std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"),
    )
    .expect("the demo config");
    let tank = config.tanks[0].clone();
    let samples = (0..86_400i64)
        .map(|s| {
            let level = 4.2 - 3.0e-5 * s as f64 + ((s * 7919) % 13) as f64 * 5e-5;
            TankSample {
                tank: 0,
                tank_id: tank.id.as_str().into(),
                at_ms: s * 1000,
                level: Reading::good(level),
                pressure: None,
                transfer: Some(Reading::good(0.0)),
                temperature: None,
                leak_flag: None,
            }
        })
        .collect();
    (tank, samples)
}

fn params() -> LeakParams {
    LeakParams {
        hole_diameter_m: None,
        hole_height_m: 0.3,
        cd: 0.61,
        density_kg_m3: None,
        ..LeakParams::default()
    }
}

fn estimator_step(c: &mut Criterion) {
    let (tank, samples) = day_of_samples();
    let mut estimator = Estimator::new(&tank, params(), 0, 1000).unwrap();
    let mut i = 0usize;
    c.bench_function("estimator_push_one_sample", |b| {
        b.iter(|| {
            // Walk through the day, then start a fresh event (rarely).
            if i == samples.len() {
                estimator = Estimator::new(&tank, params(), 0, 1000).unwrap();
                i = 0;
            }
            let e = estimator.push(black_box(&samples[i]));
            i += 1;
            black_box(e)
        })
    });
}

/// The suspected-loss watch's work per sample of a tank with no event
/// open (the daemon does this for every such sample): a day of the demo
/// tank's samples, walked round.
fn loss_watch_step(c: &mut Criterion) {
    let (tank, samples) = day_of_samples();
    let new = || {
        leaktally::loss::Detector::new(
            tank.vessel.geometry().clone(),
            tank.density.clone(),
            leaktally::loss::LossParams::default(),
        )
    };
    let mut detector = new();
    let mut i = 0usize;
    c.bench_function("loss_watch_push_one_sample", |b| {
        b.iter(|| {
            if i == samples.len() {
                detector = new();
                i = 0;
            }
            let s = &samples[i];
            let change = detector.push(
                black_box(s.at_ms),
                black_box(s.level.value.unwrap_or(0.0)),
                Some(0.0),
                None,
            );
            i += 1;
            black_box(change)
        })
    });
}

fn replay_day(c: &mut Criterion) {
    let (tank, samples) = day_of_samples();
    let mut group = c.benchmark_group("replay");
    group.sample_size(20);
    group.bench_function("replay_24h_of_1hz_samples", |b| {
        b.iter(|| {
            let mut estimator = Estimator::new(&tank, params(), 0, 1000).unwrap();
            let mut last = None;
            for s in &samples {
                last = estimator.push(s).or(last);
            }
            black_box(last)
        })
    });
    group.finish();
}

criterion_group!(
    benches,
    tally_step,
    estimator_step,
    forecast_to_stop,
    replay_day,
    loss_watch_step
);
criterion_main!(benches);
