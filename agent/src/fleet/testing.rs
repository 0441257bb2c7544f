//! Test fixtures: real status documents, made the way `leaktally status
//! EVENT --json` makes them (an event in a scratch database, estimates from
//! the estimator, `crate::status::document` serialised), so that the tests
//! read what the sites publish and cannot drift from it.

use crate::acquire::sample::{Reading, TankSample};
use crate::estimate::{Estimate, LeakParams};
use crate::estimator::Estimator;
use crate::report::Presentation;
use crate::store::{self, scratch::ScratchDir};

/// A tank id that would break the page if it were not escaped.
pub const HOSTILE_TANK: &str = r#"T<1>&"x""#;

const SITE: &str = r#"[site]
name = "Fennick Flats"
[[device]]
id = "d1"
address = "127.0.0.1:1502"
[[tank]]
id = "T<1>&\"x\""
device = "d1"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0, reportable_kg = [50.0, 5000.0] }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }
"#;

/// One site's database with one event, and its 120 estimates a second
/// apart, stored a slice at a time as the test asks.
pub struct SiteDb {
    pub scratch: ScratchDir,
    pub event: i64,
    pub estimates: Vec<Estimate>,
}

impl SiteDb {
    /// An open event that started two minutes ago, with no estimate
    /// stored yet.
    pub fn new(label: &str) -> Self {
        let scratch = ScratchDir::new(label);
        let config = crate::config::parse(SITE, std::path::Path::new("site.toml")).unwrap();
        let conn = store::open_read_write(&scratch.db()).unwrap();
        store::register_tanks(&conn, [HOSTILE_TANK]).unwrap();
        let start_ms = store::now_ms() - 125_000;
        let params = Self::params();
        let event =
            store::create_event(&conn, HOSTILE_TANK, start_ms, start_ms, "operator", &params)
                .unwrap();
        let mut estimator = Estimator::new(&config.tanks[0], params, start_ms, 1000).unwrap();
        let estimates = (0..120)
            .filter_map(|i| {
                estimator.push_and_estimate(&TankSample {
                    tank: 0,
                    tank_id: HOSTILE_TANK.into(),
                    at_ms: start_ms + 1000 * i,
                    level: Reading::good(4.2 - 0.0008 * i as f64),
                    pressure: None,
                    transfer: None,
                    temperature: None,
                    leak_flag: None,
                })
            })
            .collect();
        Self {
            scratch,
            event,
            estimates,
        }
    }

    /// The event's parameters: a 40 mm hole at 0.3 m, Cd 0.61.
    pub fn params() -> LeakParams {
        LeakParams {
            hole_diameter_m: Some(0.04),
            hole_height_m: 0.3,
            cd: 0.61,
            density_kg_m3: None,
            ..LeakParams::default()
        }
    }

    /// Stores the estimates `range` under `revision`.
    pub fn store(&self, revision: i64, range: std::ops::Range<usize>) {
        let conn = store::open_read_write(&self.scratch.db()).unwrap();
        store::insert_estimates(&conn, self.event, revision, &self.estimates[range]).unwrap();
    }

    /// Revises the event (its parameters unchanged) and returns the new
    /// revision.
    pub fn revise(&self) -> i64 {
        let conn = store::open_read_write(&self.scratch.db()).unwrap();
        let row = store::event(&conn, self.event).unwrap().unwrap();
        store::revise_event(&conn, self.event, &row.params).unwrap()
    }

    /// Closes the event at its latest stored estimate's time.
    pub fn close(&self, at_ms: i64) {
        let conn = store::open_read_write(&self.scratch.db()).unwrap();
        store::close_event(&conn, self.event, at_ms).unwrap();
    }

    /// The event's status document, as `leaktally status EVENT --json`
    /// prints it.
    pub fn document(&self) -> Vec<u8> {
        let conn = store::open_read_only(&self.scratch.db()).unwrap();
        let doc =
            crate::status::document(&conn, Some(self.event), &Presentation::default()).unwrap();
        serde_json::to_vec_pretty(&doc).unwrap()
    }
}

/// A site's state message (`{prefix}/{site}/state`).
pub fn state(site: &str, state: &str, at_ms: i64) -> Vec<u8> {
    serde_json::to_vec(&serde_json::json!({
        "format": 1,
        "site": site,
        "state": state,
        "at": crate::report::rfc3339(at_ms),
        "at_ms": at_ms,
    }))
    .unwrap()
}
