//! The subcommands, one module each: its command-line arguments (clap
//! types) and the work. `cli` only composes them into the top-level parser
//! and dispatches; nothing here imports it.
//!
//! * [`args`]: the arguments more than one command takes, and where a
//!   command finds the site's config and database.
//! * [`exit`]: the exit codes.

pub mod args;
pub mod check;
pub mod demo;
pub mod docs;
pub mod events;
pub mod exit;
pub mod fleet;
pub mod leak;
pub mod poll;
pub mod replay;
pub mod status;
pub mod whatif;
