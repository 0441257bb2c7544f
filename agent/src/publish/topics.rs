//! The topics the agent publishes under, one tree per site:
//!
//! | topic | retained | payload |
//! | --- | --- | --- |
//! | `PREFIX/SITE/state` | yes | the state message: `{"format":1,"site":SITE,"state":"online"\|"offline","at":..,"at_ms":..}` (`offline` also as the last will, stamped with the connection's time) |
//! | `PREFIX/SITE/events/ID/status` | yes | the event's status document after each estimate |
//! | `PREFIX/SITE/events/ID/summary` | yes | the event's status document when it closed |
//! | `PREFIX/SITE/tanks/TANK/reading` | no | a tank's reading, as a `leaktally poll` line (only with `readings_every_s`) |
//! | `PREFIX/SITE/tanks/TANK/suspected_loss` | yes | a suspected loss raised (`"state":"suspected"`) or cleared (`"cleared"`) on the tank |
//!
//! `PREFIX` is `[mqtt] topic_prefix` (`leaktally`), `SITE` is `[mqtt]
//! site_id` (the site name as one lower-case level), `ID` the event's
//! number. A status document and a summary are the JSON of `leaktally
//! status ID --json` (with its `format`), so each carries its event,
//! revision and sample time (`events[0].estimate.at_ms`): a subscriber
//! dedupes QoS 1's repeats by that key. A central view subscribes to
//! `PREFIX/+/state` and `PREFIX/+/events/+/status`; one site's everything
//! is `PREFIX/SITE/#`.
//!
//! Left out: connecting and sending (`publish`).

use crate::config::mqtt::Mqtt;
use crate::store::outbox::{Kind, Message};

/// The site's online state: `online` while connected, `offline` when
/// stopped, and the last will the broker publishes when the connection
/// is lost.
pub fn state(m: &Mqtt) -> String {
    format!("{}/{}/state", m.topic_prefix, m.site_id)
}

/// The state message's layout version.
pub const STATE_FORMAT: u32 = 1;

/// The state message: the site, `online` or `offline`, and since when
/// (RFC 3339 UTC and ms). A central view orders a site's state messages
/// by it. The last will is the `offline` one stamped with the time of the
/// connection it stands for (OASIS MQTT 3.1.1, 3.1.2.5: the broker sends
/// it as it was given at connect time).
pub fn state_payload(m: &Mqtt, online: bool, at_ms: i64) -> String {
    serde_json::json!({
        "format": STATE_FORMAT,
        "site": m.site_id,
        "state": if online { "online" } else { "offline" },
        "at": crate::report::rfc3339(at_ms),
        "at_ms": at_ms,
    })
    .to_string()
}

/// An event's topic for a status document or a summary.
pub fn event(m: &Mqtt, event: i64, kind: Kind) -> String {
    format!(
        "{}/{}/events/{event}/{}",
        m.topic_prefix,
        m.site_id,
        kind.key()
    )
}

/// A tank's readings.
pub fn reading(m: &Mqtt, tank: &str) -> String {
    format!(
        "{}/{}/tanks/{}/reading",
        m.topic_prefix,
        m.site_id,
        level(tank)
    )
}

/// A tank's suspected-loss alerts.
pub fn suspected_loss(m: &Mqtt, tank: &str) -> String {
    format!(
        "{}/{}/tanks/{}/suspected_loss",
        m.topic_prefix,
        m.site_id,
        level(tank)
    )
}

/// A message's topic, and whether the broker retains it.
pub fn of(m: &Mqtt, message: &Message) -> (String, bool) {
    match message.kind {
        Kind::Status | Kind::Summary => (
            event(m, message.event.unwrap_or_default(), message.kind),
            true,
        ),
        Kind::Reading => (reading(m, message.tank.as_deref().unwrap_or("")), false),
        Kind::SuspectedLoss => (
            suspected_loss(m, message.tank.as_deref().unwrap_or("")),
            true,
        ),
    }
}

/// A tank tag as one topic level: `/`, `+` and `#` (and control
/// characters) become `_`.
fn level(tag: &str) -> String {
    tag.chars()
        .map(|c| {
            if matches!(c, '/' | '+' | '#') || c.is_control() {
                '_'
            } else {
                c
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_message_has_its_topic() {
        let config = crate::config::parse(
            &format!(
                "{}\n[mqtt]\nbroker = \"127.0.0.1:1883\"\ntopic_prefix = \"corp/leaktally\"\n",
                crate::config::tests::BASE
            ),
            std::path::Path::new("site.toml"),
        )
        .unwrap();
        let m = config.mqtt.unwrap();
        assert_eq!(m.site_id, crate::config::mqtt::slug(&config.site_name));
        let site = format!("corp/leaktally/{}", m.site_id);
        assert_eq!(state(&m), format!("{site}/state"));
        let said: serde_json::Value =
            serde_json::from_str(&state_payload(&m, false, 1_796_119_200_000)).unwrap();
        assert_eq!(
            said,
            serde_json::json!({"format": 1, "site": m.site_id, "state": "offline",
                "at": "2026-12-01T10:00:00.000Z", "at_ms": 1_796_119_200_000i64})
        );
        let message = |kind, event, tank: Option<&str>| Message {
            kind,
            event,
            tank: tank.map(str::to_owned),
            at_ms: 0,
            payload: String::new(),
        };
        assert_eq!(
            of(&m, &message(Kind::Status, Some(7), Some("T1"))),
            (format!("{site}/events/7/status"), true)
        );
        assert_eq!(
            of(&m, &message(Kind::Summary, Some(7), Some("T1"))),
            (format!("{site}/events/7/summary"), true)
        );
        assert_eq!(
            of(&m, &message(Kind::Reading, None, Some("A/1+#"))),
            (format!("{site}/tanks/A_1__/reading"), false)
        );
        assert_eq!(
            of(&m, &message(Kind::SuspectedLoss, None, Some("T1"))),
            (format!("{site}/tanks/T1/suspected_loss"), true)
        );
    }
}
