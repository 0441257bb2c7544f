//! The site config: the devices to poll, the tanks with their contents,
//! and where each sensor's value sits in which registers, read from a TOML
//! file and validated into SI values.
//!
//! Two layers, as ripgrep splits its arguments: `raw` mirrors the TOML and
//! only knows types; `validate` turns it into a [`Config`] whose values are
//! in SI units, in range, and consistent with each other (unique ids, known
//! devices, no two values sharing a register). Every problem names
//! file:line:column, says what is wrong and how to fix it, and all problems
//! are reported at once so a config can be fixed in one pass.
//!
//! *Invariant:* no network, and no global. Reading a config never touches
//! the network (`leaktally check` probes the devices separately; the daemon
//! binds the web page's address when it starts), and a [`Config`] is passed
//! explicitly to whatever needs it, never kept in a global.
//!
//! The files: `types` (the validated types), `validate` (the checks, split
//! into the site's, a tank's, its geometry's and a sensor's), `problems`
//! (what is wrong and where, and how it is rendered), `register_map` (which
//! registers each value occupies, and overlaps), `raw` and `units`. This
//! file holds only [`load`], [`parse`] and the re-exports, so code outside
//! names everything as `config::X`, whichever file holds it.
//!
//! Left out: the defaults of the store.

pub mod mqtt;
mod problems;
mod raw;
mod register_map;
mod types;
pub mod units;
mod validate;

pub use problems::{ConfigError, Problem, line_col};
pub use register_map::{MappedValue, overlaps, register_map};
pub use types::{
    Config, DEFAULT_DENSITY_UNCERTAINTY, DEFAULT_LEVEL_ACCURACY_FRACTION_OF_SPAN,
    DEFAULT_LEVEL_ACCURACY_MIN_M, DEFAULT_PRESSURE_ACCURACY_FRACTION_OF_SPAN,
    DEFAULT_PRESSURE_ACCURACY_MIN_PA, DEFAULT_TEMPERATURE_ACCURACY_K, DEFAULT_TRANSFER_ACCURACY,
    DEFAULT_WEB_LISTEN, Device, Flag, HostName, LossWatch, Parity, PressureSensor,
    REFERENCE_TEMPERATURE_C, Role, Sensor, SerialLine, Tank, Uncertainty, Units, UnknownZone, Web,
    time_zone,
};
pub use validate::MAX_UNMETERED_TRANSFER_M3_S;

use std::path::Path;

/// Reads and validates a config file.
pub fn load(path: &Path) -> Result<Config, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
        path: path.to_owned(),
        source,
    })?;
    parse(&text, path)
}

/// Validates config text; `path` names it in messages.
pub fn parse(text: &str, path: &Path) -> Result<Config, ConfigError> {
    let raw = toml::from_str(text).map_err(|e| problems::unparsable(text, path, &e))?;
    validate::validate(raw, path).map_err(|problems| problems.located(text, path))
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use std::path::PathBuf;

    pub(super) fn repo_file(rel: &str) -> PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR")).join("..").join(rel)
    }

    #[test]
    fn every_config_in_the_config_folder_loads() {
        let dir = repo_file("config");
        let mut seen = 0;
        for entry in std::fs::read_dir(&dir).unwrap() {
            let path = entry.unwrap().path();
            if path.extension().is_some_and(|e| e == "toml") {
                let config = load(&path).unwrap_or_else(|e| panic!("{}:\n{e}", path.display()));
                assert!(!config.tanks.is_empty());
                seen += 1;
            }
        }
        assert!(seen >= 2, "expected the demo and the reference config");
    }

    pub(crate) const BASE: &str = r#"[site]
name = "x"
[[device]]
id = "d1"
address = "127.0.0.1:1502"
[[tank]]
id = "T1"
device = "d1"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0 }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }
"#;
}
