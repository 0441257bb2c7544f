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

/// The path of one of the workspace's binaries (`leaktally`,
/// `leaktally-sim`), built on first use.
///
/// Cargo sets `CARGO_BIN_EXE_*` only for a package's own binaries, and these
/// tests live in the root package, so the first call runs `cargo build` for
/// both binaries (a no-op when they are fresh) with the cargo that runs the
/// tests, and later calls reuse the result.
pub fn binary(name: &str) -> PathBuf {
    static BUILT: std::sync::OnceLock<Result<PathBuf, String>> = std::sync::OnceLock::new();
    let dir = BUILT.get_or_init(|| {
        // The test executable sits in target/<profile>/deps/.
        let exe = std::env::current_exe().map_err(|e| e.to_string())?;
        let profile_dir = exe
            .parent()
            .and_then(|deps| deps.parent())
            .ok_or("cannot locate the target folder")?
            .to_owned();
        let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
        let mut build = std::process::Command::new(cargo);
        build.current_dir(repo_root()).args([
            "build",
            "--quiet",
            "-p",
            "leaktally",
            "-p",
            "leaktally-sim",
            "--bins",
        ]);
        if profile_dir.file_name().is_some_and(|p| p == "release") {
            build.arg("--release");
        }
        let status = build
            .status()
            .map_err(|e| format!("running cargo build: {e}"))?;
        if !status.success() {
            return Err(format!("cargo build of the binaries failed ({status})"));
        }
        Ok(profile_dir)
    });
    match dir {
        Ok(dir) => dir.join(name),
        Err(e) => panic!("{e}"),
    }
}
