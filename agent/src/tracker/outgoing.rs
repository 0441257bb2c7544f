//! What the tracker puts in the outbox for the MQTT publisher, when the
//! config has an `[mqtt]` section: each open event's status document after
//! every estimate, the closing documents of an event, thinned tank
//! readings, and suspected losses raised or cleared. They go in the same unit of work as what they report (see
//! `store::outbox`), so none is lost to a crash and none exists for an
//! estimate that was not stored.
//!
//! The documents are built here, at the estimate's time, so each one says
//! what the agent knew then, whenever the broker takes it.
//!
//! Left out: topics and the broker (`crate::publish`); the tracker knows
//! nothing of MQTT.

use crate::acquire::line::Line;
use crate::acquire::sample::TankSample;
use crate::config::Config;
use crate::estimate::Estimate;
use crate::report::Presentation;
use crate::store::EventRow;
use crate::store::outbox::{Kind, Message};
use std::collections::HashMap;

/// The makings of the outbox's messages, fixed for the daemon's run.
pub(super) struct Outgoing {
    /// `[mqtt] outbox_limit`.
    pub(super) limit: usize,
    stale_after_ms: i64,
    people: Presentation,
    /// `[mqtt] readings_every_s`, ms.
    readings_every_ms: Option<i64>,
    /// When each tank's last reading went in, by config index.
    last_reading: HashMap<usize, i64>,
    /// `[mqtt] site_id`, for the messages that name their site.
    site_id: String,
}

/// The suspected-loss message's layout version.
pub const SUSPECTED_LOSS_FORMAT: u32 = 1;

impl Outgoing {
    /// `None` when the config publishes nothing.
    pub(super) fn of(config: &Config) -> Option<Self> {
        let mqtt = config.mqtt.as_ref()?;
        Some(Self {
            limit: mqtt.outbox_limit,
            stale_after_ms: crate::status::stale_after_ms(config),
            people: Presentation::of(config),
            readings_every_ms: mqtt.readings_every.map(|d| d.as_millis() as i64),
            last_reading: HashMap::new(),
            site_id: mqtt.site_id.clone(),
        })
    }

    /// A suspected loss raised or cleared on a tank: its figures (volumes
    /// in m³, times RFC 3339 UTC beside ms), the command that confirms it,
    /// and the caution. Retained, so a late subscriber sees the standing
    /// alert; a cleared one replaces it.
    pub(super) fn suspected_loss(&self, change: &super::watch::AlertChange) -> Message {
        use crate::report::rfc3339;
        let common = serde_json::json!({
            "format": SUSPECTED_LOSS_FORMAT,
            "site": self.site_id,
            "tank": change.tank,
            "at": rfc3339(change.at_ms),
            "at_ms": change.at_ms,
            "reason": change.reason,
        });
        let mut doc = common;
        match change.alert {
            Some(a) => {
                doc["state"] = "suspected".into();
                doc["since"] = rfc3339(a.since_ms).into();
                doc["since_ms"] = a.since_ms.into();
                doc["raised_at"] = rfc3339(a.raised_ms).into();
                doc["raised_at_ms"] = a.raised_ms.into();
                doc["volume_m3"] = a.volume_m3.into();
                doc["rate_m3_h"] = (a.rate_m3_s * 3600.0).into();
                doc["confirm_command"] =
                    crate::report::confirm_loss_command(&change.tank, a.since_ms).into();
                doc["caution"] = crate::report::CAUTION.into();
            }
            None => doc["state"] = "cleared".into(),
        }
        Message {
            kind: Kind::SuspectedLoss,
            event: None,
            tank: Some(change.tank.clone()),
            at_ms: change.at_ms,
            payload: doc.to_string(),
        }
    }

    /// An event's status document after `estimate` (or with none yet).
    pub(super) fn status(
        &self,
        row: &EventRow,
        estimate: Option<Estimate>,
        tracking_error: Option<String>,
        now_ms: i64,
        kind: Kind,
    ) -> Message {
        let at_ms = estimate.as_ref().map_or(row.start_ms, |e| e.at_ms);
        let doc = crate::status::published(
            row,
            estimate,
            tracking_error,
            now_ms,
            self.stale_after_ms,
            &self.people,
        );
        Message {
            kind,
            event: Some(row.id),
            tank: Some(row.tank.clone()),
            at_ms,
            // A document of plain numbers and strings always serialises.
            payload: serde_json::to_string(&doc).unwrap_or_default(),
        }
    }

    /// A closed event's last status document and its closing summary: the
    /// same document, under both topics.
    pub(super) fn closed(
        &self,
        row: &EventRow,
        estimate: Option<Estimate>,
        now_ms: i64,
    ) -> [Message; 2] {
        let status = self.status(row, estimate, None, now_ms, Kind::Status);
        let summary = Message {
            kind: Kind::Summary,
            ..status.clone()
        };
        [status, summary]
    }

    /// The readings of a poll cycle due for publishing: each tank's first,
    /// then one per `readings_every_s`. A reading is the line `leaktally
    /// poll` prints (its format 2).
    pub(super) fn readings(&mut self, batch: &[TankSample], config: &Config) -> Vec<Message> {
        let Some(every) = self.readings_every_ms else {
            return Vec::new();
        };
        let mut out = Vec::new();
        for sample in batch {
            let last = self.last_reading.get(&sample.tank).copied();
            if last.is_some_and(|at| sample.at_ms - at < every) {
                continue;
            }
            self.last_reading.insert(sample.tank, sample.at_ms);
            out.push(Message {
                kind: Kind::Reading,
                event: None,
                tank: Some(sample.tank_id.to_string()),
                at_ms: sample.at_ms,
                payload: serde_json::to_string(&Line::of(sample, config)).unwrap_or_default(),
            });
        }
        out
    }
}
