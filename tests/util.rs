//! Helpers shared by the test modules.

use serde::de::DeserializeOwned;
use std::path::PathBuf;

/// The repository's root folder (the root package's manifest directory).
pub fn repo_root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Loads a JSON fixture from tests/fixtures.
pub fn fixture<T: DeserializeOwned>(name: &str) -> T {
    let path = repo_root().join("tests/fixtures").join(name);
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("reading {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("parsing {}: {e}", path.display()))
}

/// Relative error of `got` against `expected`.
pub fn rel_err(got: f64, expected: f64) -> f64 {
    if expected == 0.0 {
        got.abs()
    } else {
        ((got - expected) / expected).abs()
    }
}

/// Keeps the largest relative error seen and prints it at the end, so the
/// measured figures show with `cargo test -- --nocapture`.
pub struct WorstError {
    label: &'static str,
    worst: f64,
    at: String,
}

impl WorstError {
    pub fn new(label: &'static str) -> Self {
        Self {
            label,
            worst: 0.0,
            at: String::new(),
        }
    }

    /// Records one comparison and returns its relative error.
    pub fn record(&mut self, got: f64, expected: f64, at: impl FnOnce() -> String) -> f64 {
        let e = rel_err(got, expected);
        if e > self.worst || self.at.is_empty() {
            self.worst = e;
            self.at = at();
        }
        e
    }

    pub fn worst(&self) -> f64 {
        self.worst
    }
}

impl Drop for WorstError {
    fn drop(&mut self) {
        println!(
            "largest relative error, {}: {:.3e} ({})",
            self.label, self.worst, self.at
        );
    }
}
