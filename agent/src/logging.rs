//! Logging setup shared by the `leaktally` and `leaktally-sim` binaries, and
//! the escaping of control characters in everything a log line or a
//! terminal echo carries.
//!
//! Log lines carry text that neither the agent nor the operator wrote in
//! full: tank ids and descriptions from the config, notes from the CLI, the
//! daemon's outcome texts, error messages from devices and the system. A
//! newline in any of them would let one line pose as two (a forged "leak
//! closed" line in the middle of a note), and an escape sequence would reach
//! the terminal of whoever reads the log. So every field of every event is
//! escaped as it is formatted, whatever the call site: a call site cannot
//! forget. Commands that echo such text to the terminal escape it with
//! [`one_line`] or [`lines`].
//!
//! Left out: log rotation and shipping (the service manager's job), and any
//! escaping of the formatter's own colour codes, which are not user text.

use std::borrow::Cow;
use std::fmt::Write as _;
use std::io::IsTerminal;
use tracing_subscriber::field::MakeExt;
use tracing_subscriber::fmt::format::Writer;

/// Logs to standard error, so that standard output stays clean for reports,
/// JSON and the simulator's `listening on` line. RUST_LOG adjusts the level
/// (default: info); colour only for a person at a terminal, not in captured
/// logs, and never under NO_COLOR. Every field is escaped
/// ([`escaped_fields`]).
pub fn to_stderr() {
    tracing_subscriber::fmt()
        .with_writer(std::io::stderr)
        .with_ansi(colour_allowed(
            std::io::stderr().is_terminal(),
            std::env::var_os("NO_COLOR"),
        ))
        .fmt_fields(escaped_fields())
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env()
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .init();
}

/// Whether output to a stream may be coloured: only at a terminal, and not
/// when NO_COLOR is set to anything but the empty string (no-color.org).
/// (clap's help follows NO_COLOR by itself.)
pub fn colour_allowed(terminal: bool, no_color: Option<std::ffi::OsString>) -> bool {
    terminal && no_color.is_none_or(|v| v.is_empty())
}

/// The field formatter every subscriber of ours uses: the message as it
/// reads, other fields as `name=value`, separated by spaces (as the default
/// formatter lays them out), each with its control characters escaped by
/// [`one_line`], so one event is always exactly one line.
pub fn escaped_fields() -> impl for<'writer> tracing_subscriber::fmt::FormatFields<'writer> + 'static
{
    tracing_subscriber::fmt::format::debug_fn(
        |writer: &mut Writer<'_>, field: &tracing::field::Field, value: &dyn std::fmt::Debug| {
            // A field's Debug output is its Display for the message and for
            // `%` fields, and a quoted, escaped string for `&str` fields;
            // escaping the result covers all of them.
            let text = format!("{value:?}");
            if field.name() == "message" {
                write!(writer, "{}", one_line(&text))
            } else {
                write!(writer, "{}={}", field.name(), one_line(&text))
            }
        },
    )
    .delimited(" ")
}

/// Text for one line: every control character escaped, newlines included.
pub fn one_line(text: &str) -> Cow<'_, str> {
    escape(text, false)
}

/// Text of several lines (a report, a list of config problems): control
/// characters escaped except the newlines that separate its lines.
pub fn lines(text: &str) -> Cow<'_, str> {
    escape(text, true)
}

/// Whether a character must not reach a log or a terminal as it is: the C0
/// controls (newline, carriage return, escape, backspace, bell...), DEL,
/// the C1 controls (U+0080 to U+009F, which some terminals take as escape
/// sequences), the Unicode line and paragraph separators (line breaks to
/// some viewers), and the bidirectional overrides and isolates, which can
/// make a line display in another order than it reads.
fn needs_escape(c: char) -> bool {
    matches!(c,
        '\u{0}'..='\u{1f}'
        | '\u{7f}'..='\u{9f}'
        | '\u{61c}'
        | '\u{200e}'
        | '\u{200f}'
        | '\u{2028}'
        | '\u{2029}'
        | '\u{202a}'..='\u{202e}'
        | '\u{2066}'..='\u{2069}')
}

fn escape(text: &str, keep_newlines: bool) -> Cow<'_, str> {
    let escaped = |c: char| needs_escape(c) && !(keep_newlines && c == '\n');
    if !text.chars().any(escaped) {
        return Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 8);
    for c in text.chars() {
        if !escaped(c) {
            out.push(c);
            continue;
        }
        match c {
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            c => {
                let _ = write!(out, "\\u{{{:x}}}", u32::from(c));
            }
        }
    }
    Cow::Owned(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// NO_COLOR (no-color.org): present and not empty turns colour off;
    /// a pipe or a file never gets it.
    #[test]
    fn colour_only_at_a_terminal_without_no_color() {
        assert!(colour_allowed(true, None));
        assert!(colour_allowed(true, Some("".into())));
        assert!(!colour_allowed(true, Some("1".into())));
        assert!(!colour_allowed(false, None));
    }

    #[test]
    fn control_characters_are_escaped_and_plain_text_is_left_alone() {
        // (input, one line, several lines)
        let cases: &[(&str, &str, &str)] = &[
            ("foam on the dike", "foam on the dike", "foam on the dike"),
            (
                "Ünïcødé ok, 13:55 m³",
                "Ünïcødé ok, 13:55 m³",
                "Ünïcødé ok, 13:55 m³",
            ),
            (
                "x\n2026-12-01T13:00:00Z  INFO leak closed",
                "x\\n2026-12-01T13:00:00Z  INFO leak closed",
                "x\n2026-12-01T13:00:00Z  INFO leak closed",
            ),
            ("a\rb\tc", "a\\rb\\tc", "a\\rb\\tc"),
            (
                "\u{1b}[31mred\u{1b}[0m",
                "\\u{1b}[31mred\\u{1b}[0m",
                "\\u{1b}[31mred\\u{1b}[0m",
            ),
            (
                "bell\u{7}del\u{7f}c1\u{9b}",
                "bell\\u{7}del\\u{7f}c1\\u{9b}",
                "bell\\u{7}del\\u{7f}c1\\u{9b}",
            ),
            (
                "ab\u{202e}cd\u{2028}",
                "ab\\u{202e}cd\\u{2028}",
                "ab\\u{202e}cd\\u{2028}",
            ),
        ];
        for (input, single, several) in cases {
            assert_eq!(one_line(input), *single, "{input:?}");
            assert_eq!(lines(input), *several, "{input:?}");
            assert!(!one_line(input).contains(['\n', '\u{1b}']), "{input:?}");
        }
        assert!(matches!(one_line("plain"), Cow::Borrowed(_)));
    }

    /// A subscriber with our field formatter writes a hostile message and
    /// field as one line, with no escape character.
    #[test]
    fn a_log_event_is_always_one_line() {
        use std::sync::{Arc, Mutex};
        #[derive(Clone, Default)]
        struct Captured(Arc<Mutex<Vec<u8>>>);
        impl std::io::Write for Captured {
            fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
                self.0.lock().unwrap().extend_from_slice(buf);
                Ok(buf.len())
            }
            fn flush(&mut self) -> std::io::Result<()> {
                Ok(())
            }
        }
        let captured = Captured::default();
        let writer = captured.clone();
        let subscriber = tracing_subscriber::fmt()
            .with_writer(move || writer.clone())
            .with_ansi(false)
            .fmt_fields(escaped_fields())
            .finish();
        let note = "isolated\n2026-12-01T13:00:00Z  INFO leak 3 closed\u{1b}[2J";
        tracing::subscriber::with_default(subscriber, || {
            tracing::info!(tank = "FF\nT12", text = %note, "noted: {note}");
        });
        let out = String::from_utf8(captured.0.lock().unwrap().clone()).unwrap();
        assert_eq!(out.matches('\n').count(), 1, "{out}");
        assert!(out.ends_with('\n') && !out.contains('\u{1b}'), "{out}");
        assert!(out.contains("noted: isolated\\n2026"), "{out}");
        assert!(out.contains("tank=\"FF\\nT12\""), "{out}");
        assert!(out.contains("text=isolated\\n"), "{out}");
    }
}
