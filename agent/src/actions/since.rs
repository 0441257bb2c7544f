//! Times and durations as operators write them: `--since`, `--from`,
//! `--to` and what-if horizons.
//!
//! Left out: the daemon's timeline (`crate::clock` moves a wall-clock time
//! onto it).

use anyhow::bail;
use std::time::Duration;

/// Parses `--since`: an RFC 3339 time (`2026-12-01T13:42:00Z`), a time of
/// day today in the site's time zone `zone` (`13:42` or `13:42:30`;
/// yesterday only when that is less than 3 h ago, as just after midnight),
/// or a duration ago (`90s`, `5m`, `1h30m`).
pub fn parse_since(text: &str, now_ms: i64, zone: &jiff::tz::TimeZone) -> anyhow::Result<i64> {
    let text = text.trim();
    if let Some(ago) = parse_duration(text) {
        if ago > MAX_AGO {
            bail!(
                "--since {text} is more than {} days ago; no logged history goes back that far; give a full time such as 2026-12-01T13:42:00Z",
                MAX_AGO.as_secs() / 86_400
            );
        }
        return Ok(now_ms.saturating_sub(ago.as_millis() as i64));
    }
    if let Ok(t) = text.parse::<jiff::Timestamp>() {
        return Ok(t.as_millisecond());
    }
    if let Ok(time) = text.parse::<jiff::civil::Time>() {
        let now = jiff::Timestamp::from_millisecond(now_ms)?.to_zoned_datetime(zone.clone());
        let mut at = now
            .date()
            .to_datetime(time)
            .to_zoned_datetime(now.time_zone().clone())?;
        if at.timestamp() > now.timestamp() {
            // Just after midnight, 23:55 means a few minutes ago, yesterday.
            // Much further back, a time still to come today is a slip.
            at = at.yesterday()?;
            if now_ms - at.timestamp().as_millisecond() > 3 * 3_600_000 {
                bail!(
                    "--since {text} is later than the time now ({}); give how long ago (like 20m) or a full time such as {}",
                    now.strftime("%H:%M"),
                    at.strftime("%Y-%m-%dT%H:%M:%S%:z")
                );
            }
        }
        return Ok(at.timestamp().as_millisecond());
    }
    bail!(
        "--since {text:?} is not a time or a duration; write a time today like 13:42 (in the site's time zone), an RFC 3339 time like 2026-12-01T13:42:00Z, or how long ago like 90s, 5m or 1h30m"
    )
}

/// The furthest back a duration may go: a year is past any event's logged
/// history (the rolling window keeps 24 h; event samples are kept).
const MAX_AGO: Duration = Duration::from_secs(366 * 86_400);

/// `90s`, `5m`, `1h30m`, `2h`, `7d`: a duration from number-and-unit parts.
pub fn parse_duration(text: &str) -> Option<Duration> {
    let mut total = 0.0;
    let mut number = String::new();
    let mut any = false;
    let mut chars = text.chars().peekable();
    while let Some(c) = chars.next() {
        if c.is_ascii_digit() || c == '.' {
            number.push(c);
            continue;
        }
        let mut unit = c.to_string();
        while let Some(&n) = chars.peek() {
            if n.is_ascii_alphabetic() {
                unit.push(n);
                chars.next();
            } else {
                break;
            }
        }
        let value: f64 = number.parse().ok()?;
        number.clear();
        let seconds = match unit.as_str() {
            "s" | "sec" => 1.0,
            "m" | "min" => 60.0,
            "h" | "hr" => 3600.0,
            "d" | "day" | "days" => 86_400.0,
            _ => return None,
        };
        total += value * seconds;
        any = true;
    }
    if !(any && number.is_empty()) {
        return None;
    }
    // Refuses NaN, negatives and sizes past Duration's range.
    Duration::try_from_secs_f64(total).ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn since_accepts_durations_and_times() {
        let now = jiff::Timestamp::from_second(1_780_000_000)
            .unwrap()
            .as_millisecond();
        let utc = jiff::tz::TimeZone::UTC;
        assert_eq!(parse_since("90s", now, &utc).unwrap(), now - 90_000);
        assert_eq!(parse_since("1h30m", now, &utc).unwrap(), now - 5_400_000);
        assert_eq!(
            parse_since("2026-05-28T20:00:00Z", now, &utc).unwrap(),
            1_779_998_400_000
        );
        let today = parse_since("00:00", now, &utc).unwrap();
        assert!(today <= now && now - today < 86_400_000);
        // A time of day is read in the site's zone: 1_780_000_000 s is
        // 2026-05-28T20:26:40Z, 22:26:40 in Oslo (UTC+02:00 in May, tz
        // database), so 22:00 there is 20:00 UTC that day.
        let oslo = jiff::tz::TimeZone::get("Europe/Oslo").unwrap();
        assert_eq!(parse_since("22:00", now, &oslo).unwrap(), 1_779_998_400_000);
        let err = parse_since("9000h", now, &utc).unwrap_err().to_string();
        assert!(err.contains("more than 366 days ago"), "{err}");
        for bad in [
            "soon",
            "5 parsecs",
            "12:99",
            "-5m",
            "",
            "99999999999999999999s",
        ] {
            let err = parse_since(bad, now, &utc).unwrap_err().to_string();
            assert!(err.contains("is not a time or a duration"), "{bad}: {err}");
        }
    }
}
