//! The subcommands, one module each. `cli` parses; these do the work.

pub mod check;
pub mod demo;
pub mod leak;
pub mod poll;
pub mod replay;
pub mod status;
pub mod whatif;
