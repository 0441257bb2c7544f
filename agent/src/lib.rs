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
//! * [`loss`]: the suspected-loss watch over tanks with no event open
//!   (Page's CUSUM). Pure and clock-free.
//! * [`estimator`]: the clock-free estimator of one event.
//! * [`store`]: the SQLite database and the daemon's one writer.
//! * [`report`]: formatting figures for people, with units and the cautions;
//!   the words for estimates and the status table.
//! * [`status`]: the read model, the status document built from one
//!   database connection.
//! * [`actions`]: the operator-actions client: the requests, sending them,
//!   the daemon's replies.
//! * [`doorbell`]: how the CLI tells the daemon it recorded an action.
//! * [`tracker`]: the daemon's open events, operator actions and writes.
//! * [`web`]: the daemon's read-only responder page, JSON and metrics.
//! * [`publish`]: the daemon's MQTT publisher: the outbox to the broker,
//!   in order, under the topics of `publish::topics`.
//! * [`fleet`]: `leaktally fleet`, the read-only central view of the sites
//!   that publish to an MQTT broker.
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
pub mod doorbell;
pub mod estimate;
pub mod estimator;
pub mod fleet;
pub mod logging;
pub mod loss;
pub mod model;
pub mod plot;
pub mod publish;
pub mod readings;
pub mod registers;
pub mod report;
pub mod shutdown;
pub mod status;
pub mod store;
pub mod tracker;
pub mod web;

/// The layers of the crate, lowest first. A module may use the modules of
/// lower layers (and its own files), never those of its own layer or
/// higher: so the arrows of the module graph all point down, and a reader
/// knows what a change to one module can touch. DEVELOPERS.md explains
/// each layer; `layers_only_point_down` checks every `crate::` path.
pub const LAYERS: &[&[&str]] = &[
    &["model", "registers", "logging", "shutdown", "doorbell"],
    &["config", "estimate", "loss"],
    &["report"],
    &["clock"],
    &["acquire"],
    &["estimator", "readings", "store"],
    &["plot", "status", "actions"],
    &["tracker", "web", "publish"],
    &["daemon", "fleet"],
    &["commands"],
    &["cli"],
];

#[cfg(test)]
mod tests {
    use super::LAYERS;
    use std::path::{Path, PathBuf};

    fn layer_of(module: &str) -> Option<usize> {
        LAYERS.iter().position(|l| l.contains(&module))
    }

    fn sources(dir: &Path, out: &mut Vec<PathBuf>) {
        for entry in std::fs::read_dir(dir).unwrap() {
            let path = entry.unwrap().path();
            if path.is_dir() {
                sources(&path, out);
            } else if path.extension().is_some_and(|e| e == "rs") {
                out.push(path);
            }
        }
    }

    /// Reads every `crate::` path in the crate's sources (tests included:
    /// a test may not reach up either) and checks it against the layers.
    #[test]
    fn layers_only_point_down() {
        let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
        let mut files = Vec::new();
        sources(&src, &mut files);
        let mut wrong = Vec::new();
        let mut modules_seen = std::collections::BTreeSet::new();
        for file in &files {
            let rel = file.strip_prefix(&src).unwrap();
            let first = rel.iter().next().unwrap().to_str().unwrap();
            let module = first.trim_end_matches(".rs");
            if matches!(module, "lib" | "main") {
                continue;
            }
            modules_seen.insert(module.to_owned());
            let Some(own) = layer_of(module) else {
                wrong.push(format!("{}: module {module} is in no layer", rel.display()));
                continue;
            };
            let text = std::fs::read_to_string(file).unwrap();
            for (n, line) in text.lines().enumerate() {
                // What a comment names is not a use.
                if line.trim_start().starts_with("//") {
                    continue;
                }
                let mut rest = line;
                while let Some(at) = rest.find("crate::") {
                    let after = &rest[at + "crate::".len()..];
                    let used: String = after
                        .chars()
                        .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
                        .collect();
                    rest = &after[used.len()..];
                    if used == module || used.is_empty() {
                        continue;
                    }
                    match layer_of(&used) {
                        Some(l) if l < own => {}
                        Some(l) => wrong.push(format!(
                            "{}:{}: {module} (layer {own}) uses {used} (layer {l})",
                            rel.display(),
                            n + 1
                        )),
                        None => {}
                    }
                }
            }
        }
        // Every module of the crate has a layer, and every layer names real
        // modules.
        for layer in LAYERS {
            for m in *layer {
                assert!(
                    modules_seen.contains(*m),
                    "LAYERS names {m}, which is not a module"
                );
            }
        }
        assert!(
            wrong.is_empty(),
            "arrows that point up or sideways:\n{}",
            wrong.join("\n")
        );
    }
}
