//! `/metrics`: the agent's health and the open events' totals in the
//! Prometheus text exposition format (version 0.0.4).
//!
//! Written by hand: the format is lines of `name{labels} value` under
//! `# HELP` and `# TYPE` headers, and a client library would bring a
//! registry of its own beside the counters acquisition already keeps.
//! Label values are escaped as the format asks (backslash, double quote,
//! newline), since tank ids come from the config and may hold anything.
//!
//! Left out: timestamps on samples (the scraper's time is the right one for
//! live values), and closed events (a finished event's figures are in
//! `leaktally status EVENT`).

use crate::acquire::stats::{DeviceSnapshot, TankSnapshot};
use crate::config::{Config, LossWatch};
use crate::loss::Standing;
use crate::status::StatusDocument;
use crate::store::health::HealthSnapshot;
use crate::store::outbox::OutboxSnapshot;
use std::fmt::Write as _;

/// What the metrics are made of.
pub struct Inputs<'a> {
    pub config: &'a Config,
    pub devices: &'a [DeviceSnapshot],
    pub tanks: &'a [TankSnapshot],
    pub doc: &'a StatusDocument,
    pub store: &'a HealthSnapshot,
    /// The MQTT outbox (its families only when a broker is configured).
    pub outbox: &'a OutboxSnapshot,
    /// The suspected losses standing, and how many were raised.
    pub losses: &'a [Standing],
    pub losses_raised: u64,
    pub started_ms: i64,
}

/// One metric family being written (the fleet view writes its own with
/// it).
pub(crate) struct Family<'a> {
    out: &'a mut String,
    name: &'static str,
}

impl Family<'_> {
    fn sample(&mut self, suffix: &str, labels: &[(&str, &str)], value: f64) {
        let _ = write!(self.out, "{}{suffix}", self.name);
        if !labels.is_empty() {
            self.out.push('{');
            for (i, (k, v)) in labels.iter().enumerate() {
                if i > 0 {
                    self.out.push(',');
                }
                let _ = write!(self.out, "{k}=\"{}\"", escape_label(v));
            }
            self.out.push('}');
        }
        let _ = writeln!(self.out, " {}", number(value));
    }

    pub(crate) fn value(&mut self, labels: &[(&str, &str)], value: f64) {
        self.sample("", labels, value);
    }
}

pub(crate) fn family<'a>(
    out: &'a mut String,
    name: &'static str,
    kind: &str,
    help: &str,
) -> Family<'a> {
    let _ = writeln!(out, "# HELP {name} {help}");
    let _ = writeln!(out, "# TYPE {name} {kind}");
    Family { out, name }
}

/// Renders every metric.
pub fn render(inputs: &Inputs<'_>) -> String {
    let mut out = String::new();
    let seconds = |ms: i64| ms as f64 / 1000.0;

    family(
        &mut out,
        "leaktally_up",
        "gauge",
        "1 while the daemon serves this page.",
    )
    .value(&[], 1.0);
    family(
        &mut out,
        "leaktally_start_time_seconds",
        "gauge",
        "When the daemon started, seconds since the Unix epoch.",
    )
    .value(&[], seconds(inputs.started_ms));

    let store = inputs.store;
    family(
        &mut out,
        "leaktally_store_writes_failing",
        "gauge",
        "1 while the database takes none of the daemon's writes (locked by another program, or the disk is full); acquired data then waits in memory.",
    )
    .value(&[], if store.failing.is_some() { 1.0 } else { 0.0 });
    family(
        &mut out,
        "leaktally_store_failed_commits_total",
        "counter",
        "Commit attempts that failed, since the daemon started.",
    )
    .value(&[], store.failed_attempts as f64);
    family(
        &mut out,
        "leaktally_store_held_samples",
        "gauge",
        "Samples acquired but not yet stored, held in memory.",
    )
    .value(&[], store.held_samples as f64);
    family(
        &mut out,
        "leaktally_store_dropped_samples_total",
        "counter",
        "Held samples of tanks with no open event given up to bound memory during a long outage.",
    )
    .value(&[], store.dropped_samples as f64);

    let outbox = inputs.outbox;
    if outbox.configured {
        family(
            &mut out,
            "leaktally_mqtt_connected",
            "gauge",
            "1 while the agent is connected to its MQTT broker.",
        )
        .value(&[], if outbox.connected { 1.0 } else { 0.0 });
        family(
            &mut out,
            "leaktally_mqtt_outbox_messages",
            "gauge",
            "Messages waiting in the database to be sent to the MQTT broker.",
        )
        .value(&[], outbox.depth as f64);
        family(
            &mut out,
            "leaktally_mqtt_outbox_oldest_age_seconds",
            "gauge",
            "How old the sample of the oldest message waiting for the MQTT broker is, seconds; 0 when none waits.",
        )
        .value(
            &[],
            outbox
                .oldest_ms
                .map_or(0.0, |at| seconds(inputs.doc.generated_at_ms - at).max(0.0)),
        );
        family(
            &mut out,
            "leaktally_mqtt_sent_total",
            "counter",
            "Messages the MQTT broker acknowledged, since the daemon started.",
        )
        .value(&[], outbox.sent as f64);
        family(
            &mut out,
            "leaktally_mqtt_dropped_total",
            "counter",
            "Messages given up unsent because the outbox was full, since the daemon started.",
        )
        .value(&[], outbox.dropped as f64);
    }

    let mut f = family(
        &mut out,
        "leaktally_poll_successes_total",
        "counter",
        "Poll cycles in which the device answered every read.",
    );
    for d in inputs.devices {
        f.value(&[("device", &d.id)], d.successes as f64);
    }
    let mut f = family(
        &mut out,
        "leaktally_poll_failures_total",
        "counter",
        "Poll cycles that got no data or only part of it (link down, timeout, Modbus exception, or waiting to reconnect).",
    );
    for d in inputs.devices {
        f.value(&[("device", &d.id)], d.failures as f64);
    }
    let mut f = family(
        &mut out,
        "leaktally_poll_duration_seconds",
        "histogram",
        "Duration of the poll cycles that sent requests, seconds.",
    );
    for d in inputs.devices {
        for (bound, count) in &d.cumulative {
            let le = number(*bound);
            f.sample("_bucket", &[("device", &d.id), ("le", &le)], *count as f64);
        }
        f.sample(
            "_bucket",
            &[("device", &d.id), ("le", "+Inf")],
            d.count as f64,
        );
        f.sample("_sum", &[("device", &d.id)], d.sum_s);
        f.sample("_count", &[("device", &d.id)], d.count as f64);
    }
    let mut f = family(
        &mut out,
        "leaktally_poll_last_success_timestamp_seconds",
        "gauge",
        "When the device last answered a whole cycle, seconds since the Unix epoch.",
    );
    for d in inputs.devices {
        if let Some(at) = d.last_success_ms {
            f.value(&[("device", &d.id)], seconds(at));
        }
    }

    let mut f = family(
        &mut out,
        "leaktally_tank_level_meters",
        "gauge",
        "Latest good liquid level above the tank bottom, metres.",
    );
    for t in inputs.tanks {
        if let Some((v, _)) = t.level {
            f.value(&[("tank", &t.id)], v);
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_tank_pressure_pascals",
        "gauge",
        "Latest good pressure reading as the transmitter reports it (reference gauge or absolute), pascals.",
    );
    for t in inputs.tanks {
        let absolute = inputs
            .config
            .tanks
            .iter()
            .find(|c| c.id == t.id)
            .and_then(|c| c.pressure.as_ref())
            .is_some_and(|p| p.absolute);
        let reference = if absolute { "absolute" } else { "gauge" };
        if let Some((v, _)) = t.pressure {
            f.value(&[("tank", &t.id), ("reference", reference)], v);
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_tank_reading_timestamp_seconds",
        "gauge",
        "When the latest good reading was taken, seconds since the Unix epoch.",
    );
    for t in inputs.tanks {
        for (reading, latest) in [("level", t.level), ("pressure", t.pressure)] {
            if let Some((_, at)) = latest {
                f.value(&[("tank", &t.id), ("reading", reading)], seconds(at));
            }
        }
    }

    let open: Vec<_> = inputs
        .doc
        .events
        .iter()
        .filter(|e| e.closed_at_ms.is_none())
        .collect();
    family(
        &mut out,
        "leaktally_open_events",
        "gauge",
        "Leak events open now.",
    )
    .value(&[], open.len() as f64);
    let ids: Vec<String> = open.iter().map(|e| e.event.to_string()).collect();
    let with_estimate = || {
        open.iter().zip(&ids).filter_map(|(e, id)| {
            e.estimate
                .as_ref()
                .map(|est| (id.as_str(), e.tank.as_str(), est))
        })
    };
    let mut f = family(
        &mut out,
        "leaktally_event_released_kilograms",
        "gauge",
        "Released since the event start, kg: the best estimate and the low and high ends of its band.",
    );
    for (id, tank, est) in with_estimate() {
        for (which, v) in [
            ("best", est.released_best_kg),
            ("low", est.released_low_kg),
            ("high", est.released_high_kg),
        ] {
            f.value(&[("event", id), ("tank", tank), ("estimate", which)], v);
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_event_rate_kilograms_per_second",
        "gauge",
        "Present release rate, kg/s: the best estimate and the low and high ends of its band.",
    );
    for (id, tank, est) in with_estimate() {
        for (which, v) in [
            ("best", est.rate_best_kg_s),
            ("low", est.rate_low_kg_s),
            ("high", est.rate_high_kg_s),
        ] {
            f.value(&[("event", id), ("tank", tank), ("estimate", which)], v);
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_event_reportable_crossed",
        "gauge",
        "1 once the best estimate (estimate=\"best\") or the band's high end (estimate=\"high\": the quantity may have been released) has crossed the reportable quantity (kg), else 0.",
    );
    for (id, tank, est) in with_estimate() {
        for c in &est.crossings {
            let q = number(c.quantity_kg);
            for (which, at) in [("best", c.at_ms), ("high", c.high_at_ms)] {
                f.value(
                    &[
                        ("event", id),
                        ("tank", tank),
                        ("quantity_kg", &q),
                        ("estimate", which),
                    ],
                    if at.is_some() { 1.0 } else { 0.0 },
                );
            }
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_event_reportable_crossed_timestamp_seconds",
        "gauge",
        "When the best estimate or the band's high end first crossed the reportable quantity, seconds since the Unix epoch (absent until it does).",
    );
    for (id, tank, est) in with_estimate() {
        for c in &est.crossings {
            let q = number(c.quantity_kg);
            for (which, at) in [("best", c.at_ms), ("high", c.high_at_ms)] {
                if let Some(at) = at {
                    f.value(
                        &[
                            ("event", id),
                            ("tank", tank),
                            ("quantity_kg", &q),
                            ("estimate", which),
                        ],
                        seconds(at),
                    );
                }
            }
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_event_warnings",
        "gauge",
        "1 for each warning the latest estimate carries (see the README's list of warnings).",
    );
    for (id, tank, est) in with_estimate() {
        for w in est.warnings.iter() {
            let code = serde_json::to_value(w)
                .ok()
                .and_then(|v| v.as_str().map(str::to_owned))
                .unwrap_or_default();
            f.value(&[("event", id), ("tank", tank), ("warning", &code)], 1.0);
        }
    }
    let mut f = family(
        &mut out,
        "leaktally_event_data_stale",
        "gauge",
        "1 when an open event's latest sample is older than the site's polling explains, else 0.",
    );
    for e in &inputs.doc.events {
        f.value(
            &[("event", &e.event.to_string()), ("tank", &e.tank)],
            if e.stale { 1.0 } else { 0.0 },
        );
    }
    let mut f = family(
        &mut out,
        "leaktally_event_estimate_timestamp_seconds",
        "gauge",
        "Sample time of the latest estimate, seconds since the Unix epoch.",
    );
    for (id, tank, est) in with_estimate() {
        f.value(&[("event", id), ("tank", tank)], seconds(est.at_ms));
    }
    suspected_losses(&mut out, inputs);
    out
}

/// The suspected-loss watch: an alert gauge per watched tank, and the
/// standing alerts' start and unexplained volume.
fn suspected_losses(out: &mut String, inputs: &Inputs<'_>) {
    let standing = |tank: &str| inputs.losses.iter().find(|s| s.tank == tank);
    let mut f = family(
        out,
        "leaktally_suspected_loss",
        "gauge",
        "1 while a tank with no event open loses level faster than its metered transfers explain (an alert from an estimate), else 0; watched tanks only.",
    );
    for (i, t) in inputs.config.tanks.iter().enumerate() {
        if inputs.config.loss_watch(i) != LossWatch::Off {
            f.value(
                &[("tank", &t.id)],
                f64::from(u8::from(standing(&t.id).is_some())),
            );
        }
    }
    let mut f = family(
        out,
        "leaktally_suspected_loss_since_timestamp_seconds",
        "gauge",
        "Where a standing suspected loss's unexplained fall began (the leak open --since it offers), seconds since the Unix epoch.",
    );
    for s in inputs.losses {
        f.value(&[("tank", &s.tank)], s.suspicion.since_ms as f64 / 1000.0);
    }
    let mut f = family(
        out,
        "leaktally_suspected_loss_cubic_metres",
        "gauge",
        "A standing suspected loss's unexplained volume since it began, m³ (an estimate).",
    );
    for s in inputs.losses {
        f.value(&[("tank", &s.tank)], s.suspicion.volume_m3);
    }
    family(
        out,
        "leaktally_suspected_losses_raised_total",
        "counter",
        "Suspected-loss alerts raised since the daemon started.",
    )
    .value(&[], inputs.losses_raised as f64);
}

/// A sample value as the format spells it.
fn number(x: f64) -> String {
    if x.is_nan() {
        "NaN".into()
    } else if x == f64::INFINITY {
        "+Inf".into()
    } else if x == f64::NEG_INFINITY {
        "-Inf".into()
    } else {
        format!("{x}")
    }
}

fn escape_label(v: &str) -> String {
    let mut out = String::with_capacity(v.len());
    for c in v.chars() {
        match c {
            '\\' => out.push_str("\\\\"),
            '"' => out.push_str("\\\""),
            '\n' => out.push_str("\\n"),
            c => out.push(c),
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values_and_labels_follow_the_text_format() {
        assert_eq!(number(1.0), "1");
        assert_eq!(number(0.005), "0.005");
        assert_eq!(number(f64::INFINITY), "+Inf");
        assert_eq!(number(f64::NAN), "NaN");
        assert_eq!(escape_label("a\"b\\c\nd"), "a\\\"b\\\\c\\nd");
        let mut out = String::new();
        let mut f = family(&mut out, "x_total", "counter", "Things.");
        f.value(&[("tank", "T\"1"), ("device", "d")], 3.0);
        assert_eq!(
            out,
            "# HELP x_total Things.\n# TYPE x_total counter\nx_total{tank=\"T\\\"1\",device=\"d\"} 3\n"
        );
    }
}
