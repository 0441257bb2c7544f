//! The sites' MQTT topics, as the fleet view reads them: the one place
//! that knows their layout (README, "Fleet view"), so that a change of
//! layout is a change here.
//!
//! Under the prefix (`leaktally` by default), with `{site}` the site's id:
//! `{prefix}/{site}/state` (online or offline, with the last will),
//! `{prefix}/{site}/events/{event}/status` (an open event's status
//! document on every estimate) and `{prefix}/{site}/events/{event}/summary`
//! (the closed event's document, once). Tank readings
//! (`{prefix}/{site}/tanks/{tank}/reading`) are not subscribed to: the view
//! shows events, not tanks.
//!
//! Left out: the payloads (`board.rs`) and the connection (`mqtt.rs`).

/// The longest site id the view takes, bytes: a topic level this long is
/// somebody's mistake or mischief, and would stretch the page.
pub const MAX_SITE_ID: usize = 128;

/// What a topic names.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Topic<'a> {
    /// The site's online state.
    State { site: &'a str },
    /// An open event's latest status document.
    Status { site: &'a str, event: i64 },
    /// A closed event's final document.
    Summary { site: &'a str, event: i64 },
}

/// The topic filters the view subscribes to under `prefix`.
pub fn filters(prefix: &str) -> [String; 3] {
    [
        format!("{prefix}/+/state"),
        format!("{prefix}/+/events/+/status"),
        format!("{prefix}/+/events/+/summary"),
    ]
}

/// What `topic` names under `prefix`, or `None` for a topic the view does
/// not know (another layout, a site id that is not topic-safe, an event id
/// that is not a positive number).
pub fn parse<'a>(prefix: &str, topic: &'a str) -> Option<Topic<'a>> {
    let rest = topic.strip_prefix(prefix)?.strip_prefix('/')?;
    let mut levels = rest.split('/');
    let site = levels.next().filter(|s| site_id_ok(s))?;
    let parsed = match (levels.next()?, levels.next(), levels.next(), levels.next()) {
        ("state", None, None, None) => Topic::State { site },
        ("events", Some(id), Some(kind), None) => {
            let event = event_id(id)?;
            match kind {
                "status" => Topic::Status { site, event },
                "summary" => Topic::Summary { site, event },
                _ => return None,
            }
        }
        _ => return None,
    };
    Some(parsed)
}

/// Whether `site` is a topic-safe site id: not empty, not too long, no
/// wildcard or NUL, and not starting with `$` (the brokers' own topics).
pub fn site_id_ok(site: &str) -> bool {
    !site.is_empty()
        && site.len() <= MAX_SITE_ID
        && !site.starts_with('$')
        && !site.contains(['/', '+', '#', '\0'])
}

/// An event id as a topic level: decimal digits, a positive `i64`.
fn event_id(level: &str) -> Option<i64> {
    if level.is_empty() || !level.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    level.parse().ok().filter(|&id| id > 0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_three_topics_and_nothing_else() {
        let p = "leaktally";
        assert_eq!(
            parse(p, "leaktally/fennick-flats/state"),
            Some(Topic::State {
                site: "fennick-flats"
            })
        );
        assert_eq!(
            parse(p, "leaktally/ff/events/12/status"),
            Some(Topic::Status {
                site: "ff",
                event: 12
            })
        );
        assert_eq!(
            parse(p, "leaktally/ff/events/3/summary"),
            Some(Topic::Summary {
                site: "ff",
                event: 3
            })
        );
        assert_eq!(
            parse("corp/leaks", "corp/leaks/ff/state"),
            Some(Topic::State { site: "ff" })
        );
        for unknown in [
            "leaktally/ff/tanks/T1/reading",
            "leaktally/ff/state/extra",
            "leaktally/ff/events/12",
            "leaktally/ff/events/12/status/x",
            "leaktally/ff/events/0/status",
            "leaktally/ff/events/-3/status",
            "leaktally/ff/events/+3/status",
            "leaktally/ff/events/99999999999999999999/status",
            "leaktally/ff/events/12/other",
            "leaktally//state",
            "leaktally/$SYS/state",
            "leaktallyX/ff/state",
            "other/ff/state",
            "leaktally",
            "",
        ] {
            assert_eq!(parse(p, unknown), None, "{unknown}");
        }
        let long = format!("leaktally/{}/state", "s".repeat(MAX_SITE_ID + 1));
        assert_eq!(parse(p, &long), None);
        assert_eq!(
            filters("leaktally")[1],
            "leaktally/+/events/+/status".to_owned()
        );
    }
}
