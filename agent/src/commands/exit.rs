//! The exit codes, in one list (README, "Exit codes"), and the error that
//! carries a code of its own to the binary.
//!
//! Scripts tell outcomes apart by these, so a code keeps its meaning once
//! published.

/// The command did what was asked.
pub const SUCCESS: u8 = 0;
/// The command failed: an invalid config, a missing or damaged database, a
/// request the daemon refused, a file that could not be written.
pub const FAILED: u8 = 1;
/// The command line itself is wrong: an unknown option, a bad value
/// (clap's code for usage errors).
pub const USAGE: u8 = 2;
/// `check`, `poll`: the config is valid, but a device or one of its reads
/// did not answer properly.
pub const DEVICES_FAILED: u8 = 3;
/// `status`, `events`, `leak`: no daemon is running on the database. The
/// figures printed are not being updated; a `leak` request was not written.
pub const NO_DAEMON: u8 = 4;
/// `leak`: the request is recorded, but the daemon has not acknowledged it
/// yet (busy, stalled or stopped); it will be applied with the time it was
/// made.
pub const NOT_ACKNOWLEDGED: u8 = 5;

/// An outcome with a code of its own; `said` when the command has already
/// printed what the code means (the binary then prints only a short line).
#[derive(Debug, thiserror::Error)]
#[error("{message}")]
pub struct Coded {
    pub code: u8,
    pub message: String,
    pub said: bool,
}

impl Coded {
    /// An outcome the command already explained in its output.
    pub fn said(code: u8, message: &str) -> anyhow::Error {
        Coded {
            code,
            message: message.to_owned(),
            said: true,
        }
        .into()
    }
}

/// The code for an error a command returned.
pub fn code_of(err: &anyhow::Error) -> u8 {
    if let Some(coded) = err.downcast_ref::<Coded>() {
        coded.code
    } else if err.is::<super::check::DevicesFailed>() {
        DEVICES_FAILED
    } else if err.is::<crate::actions::NoDaemon>() {
        NO_DAEMON
    } else if err.is::<crate::actions::Unacknowledged>() {
        NOT_ACKNOWLEDGED
    } else {
        FAILED
    }
}
