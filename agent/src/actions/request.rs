//! What an operator may ask the daemon for, as the CLI writes it into an
//! action row and the tracker reads it back.
//!
//! The JSON is stored, so it only ever gains fields with defaults: rows
//! written by an earlier version must still read.

use crate::estimate::ParamChange;
use serde::{Deserialize, Serialize};

/// What an operator may ask for, as stored in an action row.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum Request {
    Open {
        tank: String,
        hole_diameter_m: Option<f64>,
        hole_height_m: Option<f64>,
        cd: Option<f64>,
        /// The Cd's range (low, high); 0.61 to 1.0 if absent.
        #[serde(default)]
        cd_range: Option<(f64, f64)>,
        /// Back-dated start, UTC ms on the requester's wall clock; the time
        /// of the request if absent.
        since_ms: Option<i64>,
        note: Option<String>,
    },
    Revise {
        event: i64,
        /// Stored flat, beside `event`, as it always was.
        #[serde(flatten)]
        change: ParamChange,
        note: Option<String>,
    },
    Note {
        event: i64,
        text: String,
    },
    Close {
        event: i64,
        note: Option<String>,
    },
}

impl Request {
    pub fn kind(&self) -> &'static str {
        match self {
            Request::Open { .. } => "open",
            Request::Revise { .. } => "revise",
            Request::Note { .. } => "note",
            Request::Close { .. } => "close",
        }
    }

    pub fn event(&self) -> Option<i64> {
        match self {
            Request::Open { .. } => None,
            Request::Revise { event, .. }
            | Request::Note { event, .. }
            | Request::Close { event, .. } => Some(*event),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_revise_reads_and_writes_the_stored_layout() {
        // As an earlier version wrote it: every field flat, no cd_range.
        let stored = serde_json::json!({"kind": "revise", "event": 3, "hole_diameter_m": 0.03,
            "unknown_diameter": false, "hole_height_m": null, "cd": 0.62, "density_kg_m3": null,
            "note": "seen"});
        let request: Request = serde_json::from_value(stored).unwrap();
        let change = ParamChange {
            hole_diameter_m: Some(0.03),
            cd: Some(0.62),
            ..ParamChange::default()
        };
        assert_eq!(
            request,
            Request::Revise {
                event: 3,
                change,
                note: Some("seen".into())
            }
        );
        assert_eq!((request.kind(), request.event()), ("revise", Some(3)));
        let written = serde_json::to_value(&request).unwrap();
        assert_eq!(written["hole_diameter_m"], 0.03);
        assert_eq!(written["unknown_diameter"], false);
        assert!(written.get("change").is_none(), "{written}");
        assert_eq!(serde_json::from_value::<Request>(written).unwrap(), request);
    }

    #[test]
    fn a_request_with_a_field_it_does_not_know_is_not_read() {
        for stored in [
            serde_json::json!({"kind": "revise", "event": 3, "hole_diameter": 30}),
            serde_json::json!({"kind": "close", "event": 3, "note": null, "at": 5}),
        ] {
            assert!(
                serde_json::from_value::<Request>(stored.clone()).is_err(),
                "{stored}"
            );
        }
    }
}
