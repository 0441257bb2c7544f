//! Checking the `[mqtt]` section: the broker's address, TLS files given in
//! pairs, a password only from a file and only with a user name, topic
//! levels MQTT can carry, QoS 0 or 1, and the defaults.
//!
//! Left out: reading the files (the daemon reads them when it connects,
//! so a renewed certificate is picked up at the next start, and `check`
//! does not need them).

use super::Checker;
use crate::config::mqtt::{
    DEFAULT_KEEP_ALIVE, DEFAULT_OUTBOX_LIMIT, DEFAULT_TOPIC_PREFIX, Mqtt, is_topic_level, slug,
};
use crate::config::raw::RawMqtt;
use std::path::{Path, PathBuf};
use std::time::Duration;

impl Checker {
    pub(super) fn mqtt(&mut self, m: RawMqtt, site_name: &str, config: &Path) -> Mqtt {
        let folder = config.parent().unwrap_or(Path::new(""));
        let file = |f: &Option<toml::Spanned<String>>| -> Option<PathBuf> {
            f.as_ref().map(|f| folder.join(f.get_ref()))
        };
        let tls = match &m.tls {
            Some(t) if !*t.get_ref() && m.ca_file.is_some() => {
                self.problem(
                    t.span(),
                    "[mqtt] tls = false, but ca_file is given for TLS: remove ca_file, or set tls = true",
                );
                false
            }
            Some(t) => *t.get_ref(),
            None => m.ca_file.is_some(),
        };
        if let Some(p) = &m.password {
            self.problem(
                p.span(),
                "[mqtt] password: the password is never written in the config; put it in a file readable by the daemon's user only and give password_file = \"/etc/leaktally/mqtt-password\"",
            );
        }
        let (host, port) = self.broker(&m.broker, tls);
        if m.client_cert_file.is_some() != m.client_key_file.is_some() {
            let span = m
                .client_cert_file
                .as_ref()
                .or(m.client_key_file.as_ref())
                .map_or(0..0, |f| f.span());
            self.problem(
                span,
                "[mqtt] client_cert_file and client_key_file go together: give both, or neither",
            );
        }
        if m.client_cert_file.is_some() && !tls {
            self.problem(
                m.client_cert_file.as_ref().map_or(0..0, |f| f.span()),
                "[mqtt] client_cert_file needs TLS: set tls = true, or give ca_file (the CA the broker's certificate chains to)",
            );
        }
        if m.password_file.is_some() != m.username.is_some() {
            let span = m
                .password_file
                .as_ref()
                .map(|f| f.span())
                .or(m.username.as_ref().map(|u| u.span()))
                .unwrap_or(0..0);
            self.problem(
                span,
                "[mqtt] username and password_file go together: the password is read from that file, never written in the config",
            );
        }
        let site_id = match &m.site_id {
            Some(id) => {
                if !is_topic_level(id.get_ref()) {
                    self.problem(
                        id.span(),
                        "[mqtt] site_id must be one topic level: not empty, without '/', '+', '#' or control characters, and not starting with '$'",
                    );
                }
                id.get_ref().clone()
            }
            None => {
                let id = slug(site_name);
                if id.is_empty() {
                    self.problem(
                        0..0,
                        "[site] name has no letter or digit to make the site's topic level from; give [mqtt] site_id",
                    );
                }
                id
            }
        };
        let topic_prefix = match &m.topic_prefix {
            Some(p) => {
                let text = p.get_ref();
                if text.is_empty()
                    || text.starts_with('/')
                    || text.ends_with('/')
                    || !text.split('/').all(is_topic_level)
                {
                    self.problem(
                        p.span(),
                        "[mqtt] topic_prefix must be topic levels joined by '/', such as \"leaktally\" or \"corp/plants/leaktally\", without '+', '#', an empty level or a '/' at either end",
                    );
                }
                text.clone()
            }
            None => DEFAULT_TOPIC_PREFIX.to_owned(),
        };
        let client_id = match &m.client_id {
            Some(id) => {
                let text = id.get_ref();
                if text.is_empty() || text.len() > 65535 || text.chars().any(char::is_control) {
                    self.problem(
                        id.span(),
                        "[mqtt] client_id must be a non-empty name without control characters",
                    );
                }
                text.clone()
            }
            None => format!("leaktally-{site_id}"),
        };
        let qos = match &m.qos {
            Some(q) if *q.get_ref() > 2 => {
                self.problem(
                    q.span(),
                    "[mqtt] qos must be 0 (at most once), 1 (at least once, the default) or 2 (exactly once)",
                );
                1
            }
            Some(q) => *q.get_ref(),
            None => 1,
        };
        let readings_every = m.readings_every_s.as_ref().and_then(|s| {
            let v = *s.get_ref();
            if !(v.is_finite() && (0.1..=86_400.0).contains(&v)) {
                self.problem(
                    s.span(),
                    "[mqtt] readings_every_s must be between 0.1 and 86400 (one reading per tank per that many seconds); leave it out to publish no readings",
                );
                return None;
            }
            Some(Duration::from_secs_f64(v))
        });
        let outbox_limit = match &m.outbox_limit {
            Some(n) if *n.get_ref() < 100 => {
                self.problem(
                    n.span(),
                    "[mqtt] outbox_limit must be at least 100 messages",
                );
                DEFAULT_OUTBOX_LIMIT
            }
            Some(n) => *n.get_ref(),
            None => DEFAULT_OUTBOX_LIMIT,
        };
        let keep_alive = match &m.keep_alive_s {
            Some(s) if !(2..=3600).contains(s.get_ref()) => {
                self.problem(
                    s.span(),
                    "[mqtt] keep_alive_s must be between 2 and 3600 seconds",
                );
                DEFAULT_KEEP_ALIVE
            }
            Some(s) => Duration::from_secs(*s.get_ref()),
            None => DEFAULT_KEEP_ALIVE,
        };
        Mqtt {
            host,
            port,
            tls,
            ca_file: file(&m.ca_file),
            client_cert_file: file(&m.client_cert_file),
            client_key_file: file(&m.client_key_file),
            username: m.username.map(|u| u.into_inner()),
            password_file: file(&m.password_file),
            client_id,
            topic_prefix,
            site_id,
            qos,
            readings_every,
            outbox_limit,
            keep_alive,
        }
    }

    /// `broker = "host"` or `"host:port"` (`[v6]:port` for an IPv6
    /// address); the port defaults to MQTT's (1883, or 8883 with TLS).
    fn broker(&mut self, broker: &toml::Spanned<String>, tls: bool) -> (String, u16) {
        let text = broker.get_ref().trim();
        let default_port = if tls { 8883 } else { 1883 };
        let parsed = crate::config::HostName::parse(text);
        match parsed {
            Some((host, port)) if !text.contains("://") => (host, port.unwrap_or(default_port)),
            _ => {
                self.problem(
                    broker.span(),
                    format!(
                        "[mqtt] broker = \"{text}\" is not a host and port; write it like \"broker.plant.example:{default_port}\" (no mqtt:// in front: TLS is on when ca_file is given)"
                    ),
                );
                (String::new(), default_port)
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::config::mqtt::{DEFAULT_OUTBOX_LIMIT, slug};
    use crate::config::parse;
    use crate::config::tests::BASE;
    use std::path::Path;
    use std::time::Duration;

    fn with(section: &str) -> Result<crate::config::Config, String> {
        parse(
            &format!("{BASE}[mqtt]\n{section}"),
            Path::new("/etc/leaktally/site.toml"),
        )
        .map_err(|e| e.to_string())
    }

    #[test]
    fn the_section_takes_its_defaults_and_resolves_its_files() {
        assert!(parse(BASE, Path::new("site.toml")).unwrap().mqtt.is_none());
        let config = with("broker = \"broker.plant.example\"\n").unwrap();
        let m = config.mqtt.unwrap();
        let site = slug(&config.site_name);
        assert_eq!(
            (m.host.as_str(), m.port, m.tls()),
            ("broker.plant.example", 1883, false)
        );
        assert_eq!(m.client_id, format!("leaktally-{site}"));
        assert_eq!(
            (m.topic_prefix.as_str(), m.site_id.as_str()),
            ("leaktally", site.as_str())
        );
        assert_eq!(
            (m.qos, m.readings_every, m.outbox_limit),
            (1, None, DEFAULT_OUTBOX_LIMIT)
        );
        let m = with(
            "broker = \"10.0.0.5\"\nca_file = \"ca.pem\"\nusername = \"depot\"\npassword_file = \"pw\"\nsite_id = \"depot-7\"\nqos = 0\nreadings_every_s = 60\n",
        )
        .unwrap()
        .mqtt
        .unwrap();
        assert_eq!((m.port, m.tls(), m.qos), (8883, true, 0));
        assert_eq!(m.ca_file.unwrap(), Path::new("/etc/leaktally/ca.pem"));
        assert_eq!(m.password_file.unwrap(), Path::new("/etc/leaktally/pw"));
        assert_eq!(m.readings_every, Some(Duration::from_secs(60)));
        assert_eq!(m.client_id, "leaktally-depot-7");
        let m = with("broker = \"b\"\ntls = true\nqos = 2\n")
            .unwrap()
            .mqtt
            .unwrap();
        assert_eq!((m.port, m.tls(), m.ca_file, m.qos), (8883, true, None, 2));
    }

    #[test]
    fn each_mistake_is_named() {
        for (section, expected) in [
            ("broker = \"mqtt://b:1883\"\n", "is not a host and port"),
            (
                "broker = \"b\"\npassword = \"x\"\n",
                "the password is never written in the config",
            ),
            (
                "broker = \"b\"\ntls = false\nca_file = \"c\"\n",
                "tls = false, but ca_file is given",
            ),
            (
                "broker = \"b\"\nusername = \"u\"\n",
                "username and password_file go together",
            ),
            (
                "broker = \"b\"\npassword_file = \"p\"\n",
                "username and password_file go together",
            ),
            (
                "broker = \"b\"\nclient_cert_file = \"c\"\n",
                "client_cert_file and client_key_file go together",
            ),
            (
                "broker = \"b\"\nclient_cert_file = \"c\"\nclient_key_file = \"k\"\n",
                "client_cert_file needs TLS",
            ),
            (
                "broker = \"b\"\nsite_id = \"a/b\"\n",
                "site_id must be one topic level",
            ),
            (
                "broker = \"b\"\ntopic_prefix = \"a/#\"\n",
                "topic_prefix must be topic levels",
            ),
            ("broker = \"b\"\nqos = 3\n", "qos must be 0"),
            (
                "broker = \"b\"\nsite_id = \"$SYS\"\n",
                "not starting with '$'",
            ),
            (
                "broker = \"b\"\nreadings_every_s = 0\n",
                "readings_every_s must be between",
            ),
            (
                "broker = \"b\"\noutbox_limit = 5\n",
                "outbox_limit must be at least 100",
            ),
        ] {
            let err = with(section).expect_err(section);
            assert!(err.contains(expected), "{section:?}: {err}");
        }
    }
}
