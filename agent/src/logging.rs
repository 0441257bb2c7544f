//! Logging setup shared by the `leaktally` and `leaktally-sim` binaries.

use std::io::IsTerminal;

/// Logs to standard error, so that standard output stays clean for reports,
/// JSON and the simulator's `listening on` line. RUST_LOG adjusts the level
/// (default: info); colour only for a person at a terminal, not in captured
/// logs.
pub fn to_stderr() {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_ansi(std::io::stderr().is_terminal())
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env()
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .init();
}
