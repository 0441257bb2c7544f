//! What is wrong with a scenario, and where: [`ScenarioError`] (a file that
//! could not be read, a site config that does not load, or every problem
//! in the file), how a problem found at a byte span is located as
//! file:line:column, and the way out added to the TOML parser's own
//! messages.
//!
//! The located [`Problem`] and [`line_col`] are the agent config's, so a
//! scenario's messages read as a site config's do.
//!
//! Left out: deciding what is wrong, which is the checks' job (`mod.rs` for
//! the file as a whole, `tanks`, `events` and `faults`); they collect
//! problems as spans and messages, and this file locates them.

use leaktally::config::{ConfigError, Problem, line_col};
use std::fmt;
use std::ops::Range;
use std::path::PathBuf;

/// A scenario that could not be read or is not valid.
#[derive(Debug)]
pub enum ScenarioError {
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    /// The site config it names does not load; `at` locates the `site` key.
    Site {
        at: Problem,
        source: ConfigError,
    },
    Invalid {
        problems: Vec<Problem>,
    },
}

impl fmt::Display for ScenarioError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ScenarioError::Read { path, source } => {
                write!(
                    f,
                    "cannot read the scenario file {}: {source}",
                    path.display()
                )
            }
            ScenarioError::Site { at, source } => write!(f, "{at}\n{source}"),
            ScenarioError::Invalid { problems } => {
                for (i, p) in problems.iter().enumerate() {
                    if i > 0 {
                        writeln!(f)?;
                    }
                    write!(f, "{p}")?;
                }
                Ok(())
            }
        }
    }
}

impl std::error::Error for ScenarioError {}

/// A message about the text at `span` of `text` (the file `file`), as a
/// located [`Problem`]: the line and column of the span's start.
pub(super) fn locate(text: &str, file: &str, span: Range<usize>, message: String) -> Problem {
    let (line, column) = line_col(text, span.start);
    Problem {
        file: file.to_owned(),
        line,
        column,
        message,
    }
}

/// The TOML parser's complaint about `text`, located: a file that is not
/// TOML, or does not have a scenario's shape, has this one problem only.
pub(super) fn unparsable(text: &str, file: &str, error: &toml::de::Error) -> ScenarioError {
    ScenarioError::Invalid {
        problems: vec![locate(
            text,
            file,
            error.span().unwrap_or(0..0),
            hint(error.message()),
        )],
    }
}

/// Every problem the checks found, each located, in the order found.
pub(super) fn invalid(
    text: &str,
    file: &str,
    problems: Vec<(Range<usize>, String)>,
) -> ScenarioError {
    ScenarioError::Invalid {
        problems: problems
            .into_iter()
            .map(|(span, message)| locate(text, file, span, message))
            .collect(),
    }
}

/// Adds a way out to the TOML parser's messages where it gives none.
fn hint(message: &str) -> String {
    let message = message.trim_end();
    if message.starts_with("unknown field") {
        format!("{message}; check the spelling against sim/scenarios/demo.toml")
    } else if message.starts_with("unknown variant") {
        format!("{message}; use one of the listed values")
    } else {
        message.to_owned()
    }
}
