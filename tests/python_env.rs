//! The Python environment of the interoperability tests: a venv with the
//! exact pins of tests/python/requirements.txt (pymodbus), built once.
//!
//! The venv lives in the target folder (`target/test-venv`), so `cargo
//! clean` removes it and nothing outside the build tree changes. It is built
//! on first use and reused until requirements.txt changes: a copy of the
//! file it was built from sits inside the venv as a stamp, written last, so
//! a venv whose install was interrupted has no stamp and is rebuilt.
//! Two locks keep concurrent builders apart: a `OnceLock` for the threads of
//! one test run, and an OS file lock (`File::lock`) for separate processes,
//! such as two `cargo test` runs or a runner that starts one process per test.
//!
//! Left out: choosing among installed Pythons (set `PYTHON` to use another
//! interpreter than `python3`, as tests/fixtures/regenerate.sh does) and
//! offline installs (pip's own `PIP_FIND_LINKS`/`PIP_INDEX_URL` settings
//! pass through to it unchanged).

use crate::util::repo_root;
use std::fs::{self, File};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;
use std::time::Instant;

/// The requirements file, relative to the repository root.
const REQUIREMENTS: &str = "tests/python/requirements.txt";
/// The stamp inside the venv: a copy of the requirements it was built from.
const STAMP: &str = "leaktally-requirements.txt";

/// The venv's Python interpreter, with pymodbus installed; builds the venv
/// on first use. Panics with what to do when Python or PyPI is missing.
pub fn python() -> PathBuf {
    static PYTHON: OnceLock<Result<PathBuf, String>> = OnceLock::new();
    match PYTHON.get_or_init(provision) {
        Ok(python) => python.clone(),
        Err(e) => panic!("{e}"),
    }
}

/// A script in tests/python.
pub fn script(name: &str) -> PathBuf {
    repo_root().join("tests/python").join(name)
}

/// The target folder: the test executable is target/<profile>/deps/NAME, so
/// this follows `CARGO_TARGET_DIR` and `--target-dir` too.
pub fn target_dir() -> PathBuf {
    let exe = std::env::current_exe().expect("the test executable's path");
    exe.ancestors()
        .nth(3)
        .expect("the test executable sits in target/<profile>/deps")
        .to_owned()
}

fn venv_python(venv: &Path) -> PathBuf {
    if cfg!(windows) {
        venv.join("Scripts").join("python.exe")
    } else {
        venv.join("bin").join("python")
    }
}

fn provision() -> Result<PathBuf, String> {
    let requirements_path = repo_root().join(REQUIREMENTS);
    let requirements = fs::read(&requirements_path)
        .map_err(|e| format!("reading {}: {e}", requirements_path.display()))?;
    let target = target_dir();
    let venv = target.join("test-venv");
    let python = venv_python(&venv);
    let fresh =
        || python.is_file() && fs::read(venv.join(STAMP)).is_ok_and(|stamp| stamp == requirements);
    if fresh() {
        return Ok(python);
    }

    fs::create_dir_all(&target).map_err(|e| format!("creating {}: {e}", target.display()))?;
    let lock_path = target.join("test-venv.lock");
    let lock =
        File::create(&lock_path).map_err(|e| format!("creating {}: {e}", lock_path.display()))?;
    lock.lock()
        .map_err(|e| format!("locking {}: {e}", lock_path.display()))?;
    // Another process may have built it while this one waited for the lock.
    if fresh() {
        return Ok(python);
    }

    let started = Instant::now();
    eprintln!("python_env: building target/test-venv from {REQUIREMENTS} ...");
    if venv.exists() {
        fs::remove_dir_all(&venv).map_err(|e| format!("removing {}: {e}", venv.display()))?;
    }
    let base = std::env::var("PYTHON").unwrap_or_else(|_| "python3".into());
    run(
        Command::new(&base).arg("-m").arg("venv").arg(&venv),
        &format!(
            "'{base} -m venv' failed. The interop tests need Python 3.10 or newer with the venv \
             module (Debian/Ubuntu: apt install python3-venv); set PYTHON to use another interpreter"
        ),
    )?;
    run(
        Command::new(&python)
            .args([
                "-m",
                "pip",
                "install",
                "--quiet",
                "--only-binary=:all:",
                "-r",
            ])
            .arg(&requirements_path)
            .env("PIP_DISABLE_PIP_VERSION_CHECK", "1")
            .env("PIP_NO_INPUT", "1"),
        &format!(
            "pip could not install {REQUIREMENTS} into target/test-venv. The interop tests fetch \
             pymodbus from PyPI once; check the network, or point pip at a mirror or a wheel \
             folder (PIP_INDEX_URL, PIP_FIND_LINKS)"
        ),
    )?;
    // Written last: a venv without its stamp is incomplete and gets rebuilt.
    fs::write(venv.join(STAMP), &requirements)
        .map_err(|e| format!("writing the venv stamp: {e}"))?;
    eprintln!(
        "python_env: target/test-venv ready in {:.1} s",
        started.elapsed().as_secs_f64()
    );
    // The lock is released when `lock` drops.
    Ok(python)
}

/// Runs a setup command; on failure, `hint` and the command's output.
fn run(command: &mut Command, hint: &str) -> Result<(), String> {
    let output = command
        .output()
        .map_err(|e| format!("{hint}\n(could not start {:?}: {e})", command.get_program()))?;
    if output.status.success() {
        Ok(())
    } else {
        Err(format!(
            "{hint}\n{:?} exited with {}:\n{}{}",
            command.get_program(),
            output.status,
            String::from_utf8_lossy(&output.stdout),
            String::from_utf8_lossy(&output.stderr)
        ))
    }
}
