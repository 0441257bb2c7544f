//! Operator actions: each pending request applied in one unit of work on
//! the store's thread, its outcome recorded with it.

use super::OpenEvent;
use super::build::{create_and_build, rebuild, rebuild_and_store, tank_of};
use crate::actions::Request;
use crate::clock::Clock;
use crate::config::Config;
use crate::estimate::LeakParams;
use crate::estimator::Estimator;
use crate::report::Presentation;
use crate::report::estimate::describe_params;
use crate::store::{ActionRow, StoreError, StoreResult, Tx};
use std::collections::HashMap;
use std::sync::Arc;

/// An operator's request turned down, and why: recorded as the action's
/// outcome, never confused with a database error.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Refusal {
    pub event: Option<i64>,
    pub why: String,
}

impl Refusal {
    pub(super) fn new(event: Option<i64>, why: impl Into<String>) -> Self {
        Self {
            event,
            why: why.into(),
        }
    }
}

/// How far from a start the nearest logged good level may be.
const HISTORY_SLACK_MS: i64 = 60_000;
/// A request applied this long after it was made was queued while no
/// daemon took it; the outcome says so.
const LATE_AFTER_MS: i64 = 5_000;

/// What an applied action changes in memory once its unit commits.
pub(super) enum Change {
    /// An event opened, or revised (its new state replaces the old).
    Opened(Box<OpenEvent>),
    Closed(i64),
}

/// An applied action: the event it concerns, what changed in words, and
/// the change to make in memory.
pub(super) struct Done {
    pub(super) event: Option<i64>,
    pub(super) text: String,
    pub(super) change: Option<Change>,
}

/// What became of one pending action.
pub(super) enum Handled {
    Done(Done),
    Refused(Refusal),
    /// No longer pending (an earlier attempt, cut short at shutdown,
    /// committed after all).
    Gone,
}

/// What applying an action needs from the tracker, owned, for the store's
/// thread.
pub(super) struct Context {
    pub(super) config: Arc<Config>,
    pub(super) clock: Arc<Clock>,
    pub(super) untracked: HashMap<i64, String>,
}

/// Applies one pending action and records its outcome, in the caller's
/// unit: a refusal's writes are undone and the refusal recorded; an error
/// undoes everything (the unit fails).
pub(super) fn apply_action(
    tx: &mut Tx<'_>,
    cx: &Context,
    action: ActionRow,
) -> StoreResult<Handled> {
    if !tx.action_is_pending(action.id)? {
        return Ok(Handled::Gone);
    }
    let now = cx.clock.now_ms();
    let requested = cx.clock.from_wall(action.requested_at_ms).min(now);
    let outcome = match serde_json::from_value::<Request>(action.request.clone()) {
        Ok(request) => tx.attempt(|tx| apply(tx, cx, request, requested, now))?,
        Err(e) => Err(Refusal::new(
            action.event,
            format!("the request is not understood: {e}"),
        )),
    };
    match outcome {
        Ok(done) => {
            tx.finish_action(action.id, done.event, true, &done.text, now)?;
            Ok(Handled::Done(done))
        }
        Err(refusal) => {
            tx.finish_action(
                action.id,
                refusal.event.or(action.event),
                false,
                &refusal.why,
                now,
            )?;
            Ok(Handled::Refused(refusal))
        }
    }
}

/// Says how late a request is applied, when it waited for a daemon.
fn lateness(requested: i64, now: i64) -> String {
    if now - requested <= LATE_AFTER_MS {
        return String::new();
    }
    format!(
        "; applied {} after it was requested (no daemon took it then), with the time of the request",
        crate::report::duration(crate::model::TimeSpan::seconds(
            (now - requested) as f64 / 1000.0
        ))
    )
}

/// Applies one request at `requested` (its time on the timeline).
fn apply(
    tx: &mut Tx<'_>,
    cx: &Context,
    request: Request,
    requested: i64,
    now: i64,
) -> StoreResult<Result<Done, Refusal>> {
    let refuse = |event: Option<i64>, why: String| Ok(Err(Refusal::new(event, why)));
    // The accounts of what was done are for people: in the site's zone
    // and units.
    let people = Presentation::of(&cx.config);
    match request {
        Request::Open {
            tank,
            hole_diameter_m,
            hole_height_m,
            cd,
            cd_range,
            since_ms,
            note: _,
        } => {
            if let Some(e) = tx.open_event_of_tank(&tank)? {
                let state = cx
                    .untracked
                    .get(&e.id)
                    .map_or(String::new(), |why| format!(" (not tracked: {why})"));
                return refuse(
                    None,
                    format!(
                        "tank {tank} already has open event {}{state}; revise or close it first",
                        e.id
                    ),
                );
            }
            let Some((_, t, _)) = tank_of(&cx.config, &tank) else {
                let known: Vec<&str> = cx.config.tanks.iter().map(|t| t.id.as_str()).collect();
                let like = known
                    .iter()
                    .find(|k| k.eq_ignore_ascii_case(&tank))
                    .map_or(String::new(), |k| {
                        format!(" (tank ids are exact: did you mean {k}?)")
                    });
                return refuse(
                    None,
                    format!(
                        "there is no tank {tank} in the config{like}; the tanks are: {}",
                        known.join(", ")
                    ),
                );
            };
            let start = since_ms.map_or(requested, |s| cx.clock.from_wall(s));
            if start > now + 1000 {
                return refuse(
                    None,
                    "the leak cannot start in the future; check --since".into(),
                );
            }
            if let Err(why) = check_history(tx, &tank, start, now, &people)? {
                return refuse(None, why);
            }
            let params = LeakParams {
                hole_diameter_m,
                hole_height_m: hole_height_m.unwrap_or(0.0),
                cd: cd.unwrap_or(1.0),
                cd_range,
                density_kg_m3: None,
                hole_height_assumed: hole_height_m.is_none(),
                cd_assumed: cd.is_none(),
            };
            if let Err(e) = Estimator::new(t, params, start, 1000) {
                return refuse(None, e.to_string());
            }
            let event = match create_and_build(
                tx, &cx.config, &tank, requested, start, "operator", params,
            )? {
                Ok(event) => event,
                Err(why) => return refuse(None, why),
            };
            let id = event.row.id;
            let text = format!(
                "opened event {id} on {tank} from {}{}; {}{}{}",
                people.time(start),
                if since_ms.is_some() {
                    " (back-dated)"
                } else {
                    ""
                },
                describe_params(&params, &people),
                if event.estimator.last_sample_ms().is_none() {
                    "; no stored sample yet"
                } else {
                    ""
                },
                lateness(requested, now)
            );
            Ok(Ok(Done {
                event: Some(id),
                text,
                change: Some(Change::Opened(Box::new(event))),
            }))
        }
        Request::Revise {
            event,
            change,
            note: _,
        } => {
            let Some(row) = tx.event(event)?.filter(|r| r.closed_at_ms.is_none()) else {
                return refuse(Some(event), not_open(event));
            };
            if let Some(why) = cx.untracked.get(&event) {
                return refuse(
                    Some(event),
                    format!(
                        "event {event} is not tracked ({why}); close it, or fix that and restart the daemon"
                    ),
                );
            }
            let before = row.params;
            let params = before.with(&change);
            let Some((_, tank, _)) = tank_of(&cx.config, &row.tank) else {
                return refuse(
                    Some(event),
                    format!("tank {} is not in the config", row.tank),
                );
            };
            if let Err(e) = Estimator::new(tank, params, row.start_ms, 1000) {
                return refuse(Some(event), e.to_string());
            }
            let revision = tx.revise_event(event, &params)?;
            let row = tx
                .event(event)?
                .ok_or_else(|| StoreError::Corrupt(format!("event {event} vanished")))?;
            let (event_state, count) = match rebuild_and_store(tx, &cx.config, row)? {
                Ok(built) => built,
                Err(why) => return refuse(Some(event), why),
            };
            Ok(Ok(Done {
                event: Some(event),
                text: format!(
                    "revision {revision} of event {event}: {} -> {}; recomputed {count} estimates from the start",
                    describe_params(&before, &people),
                    describe_params(&params, &people)
                ),
                change: Some(Change::Opened(Box::new(event_state))),
            }))
        }
        Request::Note { event, text } => {
            if tx.event(event)?.is_none() {
                return refuse(Some(event), format!("there is no event {event}"));
            }
            Ok(Ok(Done {
                event: Some(event),
                text: format!("note on event {event}: {text}"),
                change: None,
            }))
        }
        Request::Close { event, note: _ } => {
            let Some(row) = tx.event(event)?.filter(|r| r.closed_at_ms.is_none()) else {
                return refuse(Some(event), not_open(event));
            };
            let at = requested.max(row.start_ms);
            tx.close_event(event, at)?;
            // The close took the estimates after it away (a close the
            // daemon took late): the latest is the one at the close,
            // recomputed from the samples up to it.
            if !tx.has_latest(event, row.revision)?
                && let Some(closed) = tx.event(event)?
                && let Ok((mut rebuilt, _)) = rebuild(tx, &cx.config, closed, |_| Ok(()))?
                && let Some(latest) = rebuilt.estimator.estimate()
            {
                tx.put_latest(event, row.revision, &latest)?;
            }
            // The closing documents for the MQTT broker, in this unit.
            if let Some(out) = super::outgoing::Outgoing::of(&cx.config)
                && let Some(closed) = tx.event(event)?
            {
                let latest = tx.latest_estimate(&closed)?;
                let messages = out.closed(&closed, latest, now);
                tx.enqueue(&messages, out.limit)?;
            }
            Ok(Ok(Done {
                event: Some(event),
                text: format!(
                    "closed event {event} at {}{}",
                    people.time(at),
                    lateness(requested, now)
                ),
                change: Some(Change::Closed(event)),
            }))
        }
    }
}

/// Refuses a start that the logged history does not cover: a good level
/// must be logged within `HISTORY_SLACK_MS` of it (before or after), or the
/// total would rest on a guess of what flowed outside the record.
fn check_history(
    tx: &Tx<'_>,
    tank: &str,
    start: i64,
    now: i64,
    people: &Presentation,
) -> StoreResult<Result<(), String>> {
    if now - start <= HISTORY_SLACK_MS || tx.good_level_near(tank, start, HISTORY_SLACK_MS)? {
        return Ok(Ok(()));
    }
    let earliest = tx.first_sample_ms(tank)?;
    Ok(Err(match earliest {
        Some(at) if at > start => format!(
            "the logged history of {tank} begins at {}, after the start asked for ({}); open it --since {} or later",
            people.time(at),
            people.time(start),
            jiff::Timestamp::from_millisecond(at)
                .map(|t| t.to_string())
                .unwrap_or_default()
        ),
        _ => format!(
            "there is no good level of {tank} logged within a minute of {}; choose a start the history covers",
            people.time(start)
        ),
    }))
}

fn not_open(event: i64) -> String {
    format!(
        "event {event} is not open (closed, or never opened); `leaktally events` lists every event with its state"
    )
}
