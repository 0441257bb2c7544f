//! The `[mqtt]` section, validated: where the agent publishes its events
//! for a fleet (issue 18), and how it proves who it is.
//!
//! The password is never in the config: `password_file` names a file that
//! holds it (readable by the daemon's user only), read when the daemon
//! starts. TLS is on with `tls = true`, or when `ca_file` is given: the
//! broker's certificate must then chain to that CA (a corporate broker has
//! a CA of its own), or to the system's roots without it. A client
//! certificate and key may be given too, for brokers that authenticate
//! clients by certificate.
//!
//! Left out: the topics (`crate::publish::topics`), connecting, and the
//! outbox's storage (`crate::store::outbox`).

use std::path::PathBuf;
use std::time::Duration;

/// Where and how the daemon publishes to an MQTT broker.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Mqtt {
    /// The broker's host name or IP address, and its port (1883 without
    /// TLS and 8883 with it when `broker` gives none).
    pub host: String,
    pub port: u16,
    /// TLS (`[mqtt] tls`, on by default when `ca_file` is given).
    pub tls: bool,
    /// Trust anchors for the broker's certificate; the system's when TLS
    /// is on without it.
    pub ca_file: Option<PathBuf>,
    /// A client certificate and its private key (PEM), both or neither.
    pub client_cert_file: Option<PathBuf>,
    pub client_key_file: Option<PathBuf>,
    pub username: Option<String>,
    /// The file holding the password (its first line); with `username`.
    pub password_file: Option<PathBuf>,
    /// The MQTT client id: `leaktally-<site_id>` unless given.
    pub client_id: String,
    /// The first topic level(s): `leaktally` unless given.
    pub topic_prefix: String,
    /// The site's topic level: `[mqtt] site_id`, or the site name in lower
    /// case with every run of other characters than letters and digits
    /// made one `-`.
    pub site_id: String,
    /// 0, 1 (the default) or 2. QoS 1 suffices: every message carries its
    /// own key for deduplication; 2 costs two more packets a message.
    pub qos: u8,
    /// Thinned tank readings: at most one per tank per this interval;
    /// none when absent.
    pub readings_every: Option<Duration>,
    /// The most messages the outbox holds while the broker is out of reach.
    pub outbox_limit: usize,
    /// The keep-alive interval: the broker publishes the last will when it
    /// has heard nothing for 1.5 times this.
    pub keep_alive: Duration,
}

/// The outbox's bound unless `[mqtt] outbox_limit` says: at one message a
/// second per open event (the status documents), a day of 1.2 events, or
/// about two hours of 12; a status document is about 4.4 kB, so some 450 MB
/// of the database at most.
pub const DEFAULT_OUTBOX_LIMIT: usize = 100_000;
/// The topic prefix unless `[mqtt] topic_prefix` says.
pub const DEFAULT_TOPIC_PREFIX: &str = "leaktally";
/// The keep-alive unless `[mqtt] keep_alive_s` says.
pub const DEFAULT_KEEP_ALIVE: Duration = Duration::from_secs(10);

impl Mqtt {
    /// Whether the connection is TLS.
    pub fn tls(&self) -> bool {
        self.tls
    }
}

/// A topic level from a site name: lower case, letters and digits, every
/// other run of characters one `-`, none at either end.
pub fn slug(name: &str) -> String {
    let mut out = String::new();
    for c in name.chars() {
        if c.is_alphanumeric() {
            out.extend(c.to_lowercase());
        } else if !out.is_empty() && !out.ends_with('-') {
            out.push('-');
        }
    }
    while out.ends_with('-') {
        out.pop();
    }
    out
}

/// Whether `level` can be one topic level: not empty, no `/`, `+`, `#` or
/// control characters (OASIS MQTT 3.1.1, 4.7: the separator and the
/// wildcards), and not starting with `$` (4.7.2: the brokers' own topics).
pub fn is_topic_level(level: &str) -> bool {
    !level.is_empty()
        && !level.starts_with('$')
        && !level
            .chars()
            .any(|c| matches!(c, '/' | '+' | '#') || c.is_control())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_site_name_becomes_one_topic_level() {
        assert_eq!(
            slug("North Depot #7 (Rotterdam)"),
            "north-depot-7-rotterdam"
        );
        assert_eq!(slug("  Tanklager Süd  "), "tanklager-süd");
        assert!(is_topic_level(&slug("a/b+c#d")));
        assert!(!is_topic_level("a/b") && !is_topic_level("") && !is_topic_level("#"));
        assert!(!is_topic_level("$SYS") && is_topic_level("a$"));
    }
}
