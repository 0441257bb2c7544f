//! Invariants of the physics core over random tanks, holes and samples.

use leaktally::model::{
    AbsolutePressure, Density, DischargeCoefficient, GasProperties, Geometry, Heads, Hole, Length,
    MolarMass, Pressure, ReleaseTally, TankState, Temperature, TimeSpan, Vessel, Volume,
    forecast_liquid,
};
use proptest::prelude::*;
use proptest::test_runner::FileFailurePersistence;

fn geometry() -> impl Strategy<Value = Geometry> {
    let m = Length::metres;
    prop_oneof![
        (0.3..40.0f64, 0.3..25.0f64).prop_map(move |(d, h)| Geometry::vertical_cylinder(
            m(d),
            m(h)
        )
        .unwrap()),
        (0.3..6.0f64, 0.5..30.0f64, 0.0..1.0f64).prop_map(move |(d, l, head)| {
            let heads = if head < 0.3 {
                Heads::Flat
            } else {
                Heads::Ellipsoidal {
                    depth: m(d / 2.0 * head),
                }
            };
            Geometry::horizontal_cylinder(m(d), m(l), heads).unwrap()
        }),
        (0.5..25.0f64).prop_map(move |d| Geometry::sphere(m(d)).unwrap()),
        (
            0.0..5.0f64,
            prop::collection::vec((0.01..2.0f64, 0.01..50.0f64), 1..12)
        )
            .prop_map(move |(heel, steps)| {
                let mut points = vec![(Length::ZERO, Volume::cubic_metres(heel))];
                let (mut h, mut v) = (0.0, heel);
                for (dh, dv) in steps {
                    h += dh;
                    v += dv;
                    points.push((m(h), Volume::cubic_metres(v)));
                }
                Geometry::calibration_table(&points).unwrap()
            }),
    ]
}

/// A tank with a hole, a starting state and a discharge coefficient.
fn leak() -> impl Strategy<Value = (Vessel, Hole, TankState, DischargeCoefficient)> {
    (
        geometry(),
        400.0..1800.0f64,
        0.0..1.0f64,
        0.0..1.0f64,
        1.0..200.0f64,
        -30_000.0..400_000.0f64,
        0.05..1.0f64,
    )
        .prop_map(|(g, rho, level_frac, hole_frac, hole_mm, headspace, cd)| {
            let top = g.height().si();
            let gas =
                GasProperties::new(MolarMass::g_per_mol(44.1), 1.13, Temperature::celsius(20.0))
                    .unwrap();
            let vessel = Vessel::new(
                g,
                Density::kg_per_cubic_metre(rho),
                AbsolutePressure::STANDARD_ATMOSPHERE,
                Some(gas),
            )
            .unwrap();
            let hole = Hole::new(
                Length::millimetres(hole_mm),
                Length::metres(top * hole_frac),
            )
            .unwrap();
            let state = TankState {
                level: Length::metres(top * level_frac),
                headspace: Pressure::pascals(headspace),
            };
            (vessel, hole, state, DischargeCoefficient::new(cd).unwrap())
        })
}

proptest! {
    #![proptest_config(ProptestConfig {
        cases: 400,
        // The tests live in the root package's tests/ folder, where
        // proptest's default (next to lib.rs) cannot find a home for them.
        failure_persistence: Some(Box::new(FileFailurePersistence::Direct("tests/proptest-regressions.txt"))),
        ..ProptestConfig::default()
    })]

    #[test]
    fn level_of_volume_of_level_is_the_level(g in geometry(), frac in 0.0..=1.0f64) {
        let h = g.height().si() * frac;
        let v = g.volume(Length::metres(h)).unwrap();
        let back = g.level(v).unwrap().si();
        prop_assert!((back - h).abs() <= 1e-9 * g.height().si().max(1.0), "{h} -> {v} -> {back}");
    }

    #[test]
    fn the_rate_is_never_negative((vessel, hole, state, cd) in leak()) {
        let out = vessel.outflow(&state, &hole, cd);
        prop_assert!(out.rate.si() >= 0.0 && out.rate.si().is_finite(), "{out:?}");
    }

    #[test]
    fn the_running_total_never_decreases(
        (vessel, hole, state, cd) in leak(),
        steps in prop::collection::vec((0i64..5000, -0.02..0.02f64, -500.0..500.0f64), 1..60),
    ) {
        let top = vessel.geometry().height().si();
        let mut tally = ReleaseTally::new(vessel, hole, cd).unwrap();
        let (mut t, mut level, mut headspace) = (0i64, state.level.si(), state.headspace.si());
        let mut previous = tally.push(t, &state).unwrap();
        for (dt, dl, dp) in steps {
            t += dt;
            level = (level + dl).clamp(0.0, top);
            headspace += dp;
            let now = tally.push(t, &TankState { level: Length::metres(level), headspace: Pressure::pascals(headspace) }).unwrap();
            prop_assert!(now.released.best >= previous.released.best);
            prop_assert!(now.released.low <= now.released.best && now.released.best <= now.released.high);
            prop_assert!(now.released.high.si().is_finite());
            previous = now;
        }
    }

    #[test]
    fn a_forecast_never_releases_more_than_the_liquid_above_the_hole((vessel, hole, state, cd) in leak()) {
        let horizons = [TimeSpan::minutes(15.0), TimeSpan::hours(1.0), TimeSpan::hours(24.0)];
        let f = forecast_liquid(&vessel, &hole, cd, &state, &horizons).unwrap();
        let inventory = vessel.liquid_above(state.level, &hole).si();
        let slack = 1e-9 * inventory.max(1.0);
        prop_assert!(f.released_by_stop.si() <= inventory + slack, "{} > {inventory}", f.released_by_stop.si());
        prop_assert!(f.stops_after.si() >= 0.0 && f.stops_after.si().is_finite());
        let mut previous = 0.0;
        for p in &f.horizons {
            prop_assert!(p.released.si() >= previous - slack, "not monotone: {f:?}");
            prop_assert!(p.released.si() <= f.released_by_stop.si() + slack);
            prop_assert!(p.rate.si() >= 0.0);
            previous = p.released.si();
        }
    }
}
