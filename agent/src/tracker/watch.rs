//! The suspected-loss watch over every tank with no open event: each good
//! level sample goes to its tank's [`Detector`] (`crate::loss`, Page's
//! CUSUM); an alert raised or cleared is logged and put on the shared
//! [`Board`] the page and `/metrics` read, and kept as a change for the
//! MQTT outbox (`Watch::changes`). With `suspected_loss = "open"`
//! a raised alert also asks the tracker to open an event, back-dated to
//! where the unexplained fall began.
//!
//! Left out: storing the alerts (a restart starts the watch afresh, and
//! says so to the broker, tank by tank; the log keeps what was raised),
//! and tanks whose open event is not tracked
//! (their tank is only known by the event's row; the watch goes on there).

use crate::acquire::sample::TankSample;
use crate::config::{Config, LossWatch};
use crate::loss::{Board, Change, Detector, LossParams, Suspicion};
use crate::report::rfc3339;
use std::sync::Arc;
use tracing::{info, warn};

/// A tank's watch.
struct Watched {
    detector: Detector,
    /// An event is open on the tank: the detector was reset and waits.
    suspended: bool,
    mode: LossWatch,
    /// What the board shows for the tank: it is written only when this
    /// changes, not on every sample of a standing alert.
    published: Option<Suspicion>,
}

/// An alert raised or cleared on a tank, at a sample's time.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct AlertChange {
    pub(super) tank: String,
    pub(super) at_ms: i64,
    /// The alert raised, or `None` when it cleared.
    pub(super) alert: Option<Suspicion>,
    /// Why, as a code: `raised`, `explained` (the fall is explained
    /// now), `event_open` (an event took the tank over) or
    /// `watch_started` (the daemon started: no alert stands yet).
    pub(super) reason: &'static str,
}

impl Watched {
    /// Shows `alert` on the board, if that is news; an alert raised or
    /// cleared (not one that grew) is kept in `changes` too.
    fn publish(
        &mut self,
        board: &Board,
        changes: &mut Vec<AlertChange>,
        sample: &TankSample,
        alert: Option<Suspicion>,
        reason: &'static str,
    ) {
        if self.published != alert {
            board.set(&sample.tank_id, alert);
            if self.published.is_none() != alert.is_none() {
                changes.push(AlertChange {
                    tank: sample.tank_id.to_string(),
                    at_ms: sample.at_ms,
                    alert,
                    reason,
                });
            }
            self.published = alert;
        }
    }
}

/// An event the watch asks to open: on `tank`, from `start_ms`.
pub(super) struct Opening {
    pub(super) tank: String,
    pub(super) start_ms: i64,
}

pub(super) struct Watch {
    /// By the config's tank index; `None` where the watch is off.
    tanks: Vec<Option<Watched>>,
    board: Arc<Board>,
    /// Alerts raised or cleared since the tracker last took them.
    changes: Vec<AlertChange>,
}

/// The detector's settings for a tank: the defaults, with the tank's
/// allowance and its meter's stated accuracy (taken as the standard
/// uncertainty, which overstates it: fewer false alarms).
pub(super) fn params_of(config: &Config, tank: usize) -> LossParams {
    let mut params = LossParams::default();
    if let Some(t) = config.tanks.get(tank) {
        params.allowance_m_s = t.loss_allowance_m_s;
        if let Some(meter) = &t.transfer
            && meter.accuracy.relative
        {
            params.meter_fraction = meter.accuracy.bound;
        }
    }
    params
}

impl Watch {
    pub(super) fn new(config: &Config) -> Self {
        let tanks: Vec<Option<Watched>> = (0..config.tanks.len())
            .map(|i| {
                let mode = config.loss_watch(i);
                let t = &config.tanks[i];
                (mode != LossWatch::Off).then(|| Watched {
                    detector: Detector::new(
                        t.vessel.geometry().clone(),
                        t.density.clone(),
                        params_of(config, i),
                    ),
                    suspended: false,
                    mode,
                    published: None,
                })
            })
            .collect();
        // A restart starts every watch afresh: whatever alert a broker
        // retains from before no longer stands until raised again.
        let now_ms = crate::store::now_ms();
        let changes = config
            .tanks
            .iter()
            .zip(&tanks)
            .filter(|(_, w)| w.is_some())
            .map(|(t, _)| AlertChange {
                tank: t.id.clone(),
                at_ms: now_ms,
                alert: None,
                reason: "watch_started",
            })
            .collect();
        Self {
            tanks,
            board: Arc::new(Board::default()),
            changes,
        }
    }

    /// The alerts raised or cleared since the last call, oldest first.
    pub(super) fn changes(&mut self) -> Vec<AlertChange> {
        std::mem::take(&mut self.changes)
    }

    pub(super) fn board(&self) -> Arc<Board> {
        Arc::clone(&self.board)
    }

    /// Feeds a batch's good level samples of tanks with no open event
    /// (`has_open_event` says which tank indices have one); returns the
    /// events to open.
    pub(super) fn take(
        &mut self,
        batch: &[TankSample],
        has_open_event: impl Fn(usize) -> bool,
    ) -> Vec<Opening> {
        let mut openings = Vec::new();
        for s in batch {
            let Some(Some(w)) = self.tanks.get_mut(s.tank) else {
                continue;
            };
            if has_open_event(s.tank) {
                if !w.suspended {
                    w.detector.reset();
                    w.suspended = true;
                    w.publish(&self.board, &mut self.changes, s, None, "event_open");
                }
                continue;
            }
            w.suspended = false;
            let Some(level) = s.level.value.filter(|_| s.level.is_good()) else {
                continue;
            };
            let good = |r: Option<crate::acquire::sample::Reading>| {
                r.filter(|r| r.is_good()).and_then(|r| r.value)
            };
            let change = w
                .detector
                .push(s.at_ms, level, good(s.transfer), good(s.temperature));
            match change {
                Some(Change::Raised(a)) => {
                    self.board.count_raised();
                    w.publish(&self.board, &mut self.changes, s, Some(a), "raised");
                    let since = rfc3339(a.since_ms);
                    let tank = &s.tank_id;
                    let then = if w.mode == LossWatch::Open {
                        "suspected_loss = \"open\": opening an event from then".to_string()
                    } else {
                        format!(
                            "check the tank; if it leaks, confirm with: {}",
                            crate::report::confirm_loss_command(tank, a.since_ms)
                        )
                    };
                    warn!(
                        tank = %tank,
                        since = %since,
                        volume_m3 = a.volume_m3,
                        rate_m3_h = a.rate_m3_s * 3600.0,
                        "SUSPECTED LOSS on {tank}: the level has fallen about {:.3} m³ more than metered transfers explain since {since} (about {:.3} m³/h), beyond what the gauge's noise allows; an alert from an estimate, not a measurement; {then}",
                        a.volume_m3,
                        a.rate_m3_s * 3600.0,
                    );
                    if w.mode == LossWatch::Open {
                        openings.push(Opening {
                            tank: tank.to_string(),
                            start_ms: a.since_ms,
                        });
                    }
                }
                Some(Change::Cleared) => {
                    w.publish(&self.board, &mut self.changes, s, None, "explained");
                    info!(
                        tank = %s.tank_id,
                        "suspected loss on {} cleared: the level no longer falls more than metered transfers explain",
                        s.tank_id
                    );
                }
                None => {
                    if let Some(&a) = w.detector.alert() {
                        w.publish(&self.board, &mut self.changes, s, Some(a), "raised");
                    }
                }
            }
        }
        openings
    }
}
