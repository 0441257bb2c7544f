//! leaktally: running estimates of how much liquid or vapour has escaped from
//! a leaking tank, how fast it is escaping now, and how much more will.
//!
//! Layout:
//!
//! * [`model`]: the physics (orifice flow, tank geometry, draining forecast,
//!   the running total). Pure, clock-free and deterministic.
//! * [`registers`]: the Modbus register vocabulary (tables, data types, word
//!   orders, encoding), shared by the config, acquisition and the simulator.
//! * [`config`]: the site config file, validated into SI values.
//! * [`acquire`]: Modbus polling, one task per device, read-only.
//! * [`clock`]: the daemon's timeline, which wall-clock steps cannot move.
//! * [`estimate`]: what an estimate holds, as numbers and enums (data only).
//! * [`estimator`]: the clock-free estimator of one event.
//! * [`store`]: the SQLite database and the daemon's one writer.
//! * [`report`]: formatting figures for people, with units and the cautions;
//!   the words for estimates and the status table.
//! * [`status`]: the read model, the status document built from one
//!   database connection.
//! * [`actions`]: the operator-actions client: the requests, sending them,
//!   the daemon's replies.
//! * [`tracker`]: the daemon's open events, operator actions and writes.
//! * [`web`]: the daemon's read-only responder page, JSON and metrics.
//! * [`commands`]: each subcommand's arguments and what it does.
//! * [`cli`]: the command line, composed of the commands' arguments.
//!
//! Estimates for emergency planning, not measurements.

pub mod acquire;
pub mod actions;
pub mod cli;
pub mod clock;
pub mod commands;
pub mod config;
pub mod daemon;
pub mod estimate;
pub mod estimator;
pub mod logging;
pub mod model;
pub mod plot;
pub mod readings;
pub mod registers;
pub mod report;
pub mod shutdown;
pub mod status;
pub mod store;
pub mod tracker;
pub mod web;
