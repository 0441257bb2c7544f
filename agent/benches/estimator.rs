//! Benchmarks of the estimator's hot paths: one sample through the running
//! tally, and a draining forecast to flow stop. Run with
//! `cargo bench -p leaktally --bench estimator`.

use criterion::{Criterion, criterion_group, criterion_main};
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

criterion_group!(benches, tally_step, forecast_to_stop);
criterion_main!(benches);
