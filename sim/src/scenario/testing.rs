//! What the scenario tests share: text parsed as if it were a file in
//! sim/scenarios/ (so that the demo site's relative path resolves), a
//! scenario of the demo site's three tanks to add to or edit, and the
//! messages of a scenario that must not load.
//!
//! Left out: the tests themselves, which sit with the code they test.

use super::{Scenario, ScenarioError, parse};
use std::path::{Path, PathBuf};

pub(super) fn demo_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios")
}

/// Parses `text` as if it were a file in sim/scenarios/, so that
/// `site = "../../config/demo.toml"` resolves.
pub(super) fn parse_here(text: &str) -> Result<Scenario, ScenarioError> {
    parse(text, &demo_dir().join("test.toml"))
}

pub(super) const TANKS: &str = r#"
site = "../../config/demo.toml"
[[tank]]
id = "FF-T12"
initial_level_m = 4.2
[[tank]]
id = "FF-T14"
initial_level_m = 1.6
headspace_kpa = 15.0
pressure_noise_pa = 30.0
[[tank]]
id = "FF-T20"
initial_level_m = 5.1
"#;

/// The messages of a scenario that must not load.
pub(super) fn messages(text: &str) -> String {
    match parse_here(text) {
        Ok(_) => panic!("expected an error"),
        Err(e) => e.to_string(),
    }
}
