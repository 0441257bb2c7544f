//! The scenario file: which site to serve, how each tank starts (with its
//! headspace held, or a gas space with an optional blanket supply), and the
//! scripted events (a leak opening, pump transfers, sensor faults, dropped
//! links, devices that refuse reads or answer with the wrong number of
//! values, the leak flag).
//!
//! As in the agent's config, a raw serde layer mirrors the TOML and a
//! validation pass turns it into a [`Scenario`] in SI units, naming
//! file:line:column for every problem and reporting all problems at once.
//! The site itself (devices, tanks, registers) is the agent's own config,
//! loaded with `leaktally::config::load`, so the simulator and the agent
//! cannot disagree on a register address.
//!
//! The files: `raw` (the file as written), `tanks` (a tank's entry: its
//! start, its gauges' errors, its ullage and blanket), `events` (the event
//! kinds, each action's keys, a leak's hole, transfers, the leak flag),
//! `faults` (sensor and device faults and their checks), `problems` (what
//! is wrong and where). This file holds [`Scenario`], [`load`], [`parse`],
//! the validation pass's state with the checks of the file as a whole (the
//! time step, the site's unit ids), and the re-exports, so code outside
//! names everything `scenario::X`, whichever file holds it.
//!
//! Left out: anything that runs the scenario (see `plant`) and any physics
//! beyond what validation needs (the tank height, for the hole and level
//! checks).

mod events;
mod faults;
mod problems;
mod raw;
mod tanks;
#[cfg(test)]
mod testing;

pub use events::{DEFAULT_CD, Event, EventKind, HoleSpec};
pub use faults::{Fault, Refusal, SensorRole, SimTable};
pub use problems::ScenarioError;
pub use tanks::TankSetup;

use leaktally::config::{self, Config};
use raw::RawScenario;
use std::collections::HashMap;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// A validated scenario.
#[derive(Debug, Clone)]
pub struct Scenario {
    /// Where it was read from.
    pub path: PathBuf,
    /// The agent config whose devices and registers the simulator serves.
    pub site: Config,
    /// The physics time step, ms; it divides 100 so truth rows fall on steps.
    pub step_ms: u64,
    /// Seed of the sensor noise.
    pub seed: u64,
    /// How each tank starts, index-aligned with `site.tanks`.
    pub tanks: Vec<TankSetup>,
    /// The script, sorted by time (stable, so same-time events keep their
    /// file order).
    pub events: Vec<Event>,
}

const DEFAULT_STEP_MS: i64 = 10;
const DEFAULT_SEED: u64 = 1;

/// Reads and validates a scenario file, and the site config it names.
pub fn load(path: &Path) -> Result<Scenario, ScenarioError> {
    let text = std::fs::read_to_string(path).map_err(|source| ScenarioError::Read {
        path: path.to_owned(),
        source,
    })?;
    parse(&text, path)
}

/// Validates scenario text; `path` names it in messages and anchors the
/// relative `site` path.
pub fn parse(text: &str, path: &Path) -> Result<Scenario, ScenarioError> {
    let file = path.display().to_string();
    let raw: RawScenario =
        toml::from_str(text).map_err(|e| problems::unparsable(text, &file, &e))?;

    // The site path is relative to the scenario file, so a scenario and its
    // site can move together and the simulator runs from any directory.
    let base = path.parent().unwrap_or_else(|| Path::new(""));
    let site_path = base.join(raw.site.get_ref());
    let site = config::load(&site_path).map_err(|source| ScenarioError::Site {
        at: problems::locate(
            text,
            &file,
            raw.site.span(),
            format!("the site config \"{}\" does not load:", raw.site.get_ref()),
        ),
        source,
    })?;

    let mut checker = Checker {
        problems: Vec::new(),
        site: &site,
    };
    let (step_ms, tanks, events) = checker.scenario(&raw);
    if checker.problems.is_empty() {
        Ok(Scenario {
            path: path.to_owned(),
            step_ms,
            seed: raw.seed.unwrap_or(DEFAULT_SEED),
            tanks,
            events,
            site,
        })
    } else {
        Err(problems::invalid(text, &file, checker.problems))
    }
}

/// The validation pass: the site config it checks against, and each
/// problem found so far as the span it concerns and its message. The
/// checks of a tank's entry, an event and a fault are its methods in
/// `tanks`, `events` and `faults`.
struct Checker<'a> {
    problems: Vec<(Range<usize>, String)>,
    site: &'a Config,
}

impl Checker<'_> {
    fn problem(&mut self, span: Range<usize>, message: impl Into<String>) {
        self.problems.push((span, message.into()));
    }

    /// The whole file: the time step, the site's unit ids, the tanks, and
    /// the events, sorted by time (stably, so same-time events keep their
    /// file order).
    fn scenario(&mut self, raw: &RawScenario) -> (u64, Vec<TankSetup>, Vec<Event>) {
        let step_ms = match &raw.step_ms {
            None => DEFAULT_STEP_MS,
            Some(s) => {
                let v = *s.get_ref();
                if !(1..=100).contains(&v) || 100 % v != 0 {
                    self.problem(
                        s.span(),
                        format!(
                            "step_ms = {v} must divide 100 (1, 2, 4, 5, 10, 20, 25, 50 or 100), so the 100 ms truth rows fall on steps; 10 suits most scenarios"
                        ),
                    );
                    DEFAULT_STEP_MS
                } else {
                    v
                }
            }
        };
        self.unique_unit_ids(raw.site.span());
        let tanks = self.tanks(&raw.tanks, raw.site.span());
        let mut events: Vec<Event> = raw.events.iter().filter_map(|e| self.event(e)).collect();
        events.sort_by(|a, b| a.at_s.total_cmp(&b.at_s));
        (step_ms as u64, tanks, events)
    }

    /// The simulator serves every device on one listener and tells them
    /// apart by unit id alone, so two devices may not share one.
    fn unique_unit_ids(&mut self, site_span: Range<usize>) {
        let mut seen: HashMap<u8, &str> = HashMap::new();
        for d in &self.site.devices {
            if let Some(first) = seen.insert(d.unit_id, &d.id) {
                let message = format!(
                    "devices \"{first}\" and \"{}\" of the site both have unit_id {}; the simulator serves all devices on one listener and routes requests by unit id, so give each device its own unit_id",
                    d.id, d.unit_id
                );
                self.problem(site_span.clone(), message);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario::testing::{TANKS, demo_dir, messages, parse_here};

    #[test]
    fn the_demo_scenario_loads_and_events_are_sorted() {
        let s = load(&demo_dir().join("demo.toml")).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(s.tanks.len(), 3);
        assert_eq!(s.tanks[1].headspace_pa, 15_000.0);
        assert!(s.events.windows(2).all(|w| w[0].at_s <= w[1].at_s));
        assert!(matches!(
            s.events[0].kind,
            EventKind::LeakOpens { tank: 0, .. }
        ));

        let text = format!(
            "{TANKS}
[[event]]
at_s = 9.0
action = \"leak_closes\"
tank = \"FF-T12\"
[[event]]
at_s = 2
action = \"leak_opens\"
tank = \"FF-T12\"
diameter_mm = 25
height_m = 0.3
"
        );
        let s = parse_here(&text).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(s.events[0].at_s, 2.0);
        let EventKind::LeakOpens { hole, .. } = s.events[0].kind else {
            panic!("{:?}", s.events[0]);
        };
        assert_eq!((hole.diameter_m, hole.cd), (0.025, DEFAULT_CD));
    }

    #[test]
    fn a_site_that_does_not_load_and_a_step_that_does_not_divide_100_are_located() {
        let msg = messages(&TANKS.replace(
            "site = \"../../config/demo.toml\"",
            "site = \"nowhere.toml\"\nstep_ms = 3",
        ));
        assert!(
            msg.contains("test.toml:2:8: the site config \"nowhere.toml\" does not load"),
            "{msg}"
        );
        let msg = messages(&TANKS.replace(
            "site = \"../../config/demo.toml\"",
            "site = \"../../config/demo.toml\"\nstep_ms = 3",
        ));
        assert!(
            msg.contains("test.toml:3:11: step_ms = 3 must divide 100"),
            "{msg}"
        );
    }
}
