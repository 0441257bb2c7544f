//! What is wrong with a config, and where: [`Problem`] (one thing wrong,
//! at file:line:column), [`ConfigError`] (a file that could not be read, or
//! every problem in it), how problems are collected while a config is
//! checked, and how they are located and rendered.
//!
//! Left out: deciding what is wrong, which is the validation's job and the
//! register overlap check's; this module only words the TOML parser's own
//! complaints, adding a way out where it gives none.

use std::fmt;
use std::ops::Range;
use std::path::{Path, PathBuf};

/// A config that could not be read or is not valid.
#[derive(Debug)]
pub enum ConfigError {
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    Invalid {
        problems: Vec<Problem>,
    },
}

/// One thing wrong in a config file, located.
#[derive(Debug, Clone, PartialEq)]
pub struct Problem {
    pub file: String,
    pub line: usize,
    pub column: usize,
    pub message: String,
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        // A message quotes what the file says; a control character there
        // must not break the one-line-per-problem layout or reach a terminal.
        write!(
            f,
            "{}:{}:{}: {}",
            crate::logging::one_line(&self.file),
            self.line,
            self.column,
            crate::logging::one_line(&self.message)
        )
    }
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ConfigError::Read { path, source } => {
                write!(
                    f,
                    "cannot read the config file {}: {source}; check the path (config/reference.toml in the source tree documents the format)",
                    path.display()
                )
            }
            ConfigError::Invalid { problems } => {
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

impl std::error::Error for ConfigError {}

/// 1-based line and column of a byte offset.
pub fn line_col(text: &str, offset: usize) -> (usize, usize) {
    let mut offset = offset.min(text.len());
    while !text.is_char_boundary(offset) {
        offset -= 1;
    }
    let before = &text[..offset];
    let line = before.matches('\n').count() + 1;
    let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    (line, column)
}

/// Adds a way out to the TOML parser's messages where it gives none.
fn parse_hint(message: &str) -> String {
    let message = message.trim_end();
    if message.starts_with("unknown field") {
        format!("{message}; check the spelling against config/reference.toml")
    } else if message.starts_with("missing field") {
        format!("{message}; add it (config/reference.toml documents every key)")
    } else if message.starts_with("invalid float") || message.starts_with("invalid number") {
        format!("{message}; text such as an address needs double quotes, as in \"192.0.2.10:502\"")
    } else if message.starts_with("unknown variant") {
        format!("{message}; use one of the listed values")
    } else {
        message.to_owned()
    }
}

/// The TOML parser's complaint about `text`, located: a file that is not
/// TOML, or does not have the config's shape, has this one problem only.
pub(super) fn unparsable(text: &str, path: &Path, error: &toml::de::Error) -> ConfigError {
    let offset = error.span().map_or(0, |s| s.start);
    let file = path.display().to_string();
    ConfigError::Invalid {
        problems: vec![locate(text, &file, offset, parse_hint(error.message()))],
    }
}

/// A message about the text at byte `offset`, as a located [`Problem`].
fn locate(text: &str, file: &str, offset: usize, message: String) -> Problem {
    let (line, column) = line_col(text, offset);
    Problem {
        file: file.to_owned(),
        line,
        column,
        message,
    }
}

/// The problems found while checking a config, each with the byte span of
/// the text it is about, in the order found: all of them are reported at
/// once, so a config can be fixed in one pass.
#[derive(Debug, Default)]
pub(super) struct Problems {
    found: Vec<(Range<usize>, String)>,
}

impl Problems {
    /// Notes a problem with the text at `span`.
    pub(super) fn push(&mut self, span: Range<usize>, message: impl Into<String>) {
        self.found.push((span, message.into()));
    }

    pub(super) fn is_empty(&self) -> bool {
        self.found.is_empty()
    }

    /// Every problem located in `text`, which `path` names.
    pub(super) fn located(self, text: &str, path: &Path) -> ConfigError {
        let file = path.display().to_string();
        ConfigError::Invalid {
            problems: self
                .found
                .into_iter()
                .map(|(span, message)| locate(text, &file, span.start, message))
                .collect(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::parse;
    use crate::config::tests::BASE;

    #[test]
    fn every_problem_is_reported_at_once() {
        let text = BASE
            .replace("unit = \"m\"", "unit = \"yards\"")
            .replace("diameter_m = 3.0", "diameter_m = 0.0");
        let ConfigError::Invalid { problems } = parse(&text, Path::new("s.toml")).unwrap_err()
        else {
            panic!("expected problems");
        };
        assert_eq!(problems.len(), 2, "{problems:?}");
    }
}
