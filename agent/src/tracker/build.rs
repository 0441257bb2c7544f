//! Building an event's estimator from the stored history: on resume, on
//! an open (back-dated or not), on a revision, on a raised leak flag.

use super::{FlagEdge, OpenEvent};
use crate::config::Config;
use crate::estimate::{Figures, LeakParams};
use crate::estimator::Estimator;
use crate::store::{EventRow, Reader, StoreError, StoreResult, Tx};

/// The tank of `tag` in the config, with its index and poll interval (ms).
pub(super) fn tank_of<'c>(
    config: &'c Config,
    tag: &str,
) -> Option<(usize, &'c crate::config::Tank, i64)> {
    config
        .tanks
        .iter()
        .enumerate()
        .find(|(_, t)| t.id == tag)
        .map(|(i, t)| {
            (
                i,
                t,
                config.devices[t.device].poll_interval.as_millis() as i64,
            )
        })
}

/// Builds an estimator for an event and replays its stored samples
/// through it, a sample at a time (a long event's history is never held
/// whole), handing each figure to `keep`; returns the event and how many
/// figures it made, or the reason in words when it cannot.
pub(super) fn rebuild(
    r: &Reader<'_>,
    config: &Config,
    row: EventRow,
    mut keep: impl FnMut(&Figures) -> StoreResult<()>,
) -> StoreResult<Result<(OpenEvent, usize), String>> {
    let Some((tank_index, tank, interval)) = tank_of(config, &row.tank) else {
        return Ok(Err(format!("tank {} is not in the config", row.tank)));
    };
    let mut estimator = match Estimator::new(tank, row.params, row.start_ms, interval) {
        Ok(e) => e,
        Err(e) => {
            return Ok(Err(format!(
                "its parameters do not fit tank {}: {e}",
                row.tank
            )));
        }
    };
    let end = row.closed_at_ms.unwrap_or(i64::MAX);
    let mut made = 0;
    // From one gap limit before the start: the estimator interpolates the
    // level at the start from the samples either side of it.
    r.for_each_sample(
        &row.tank,
        row.start_ms - estimator.lookback_ms(),
        end,
        |s| match estimator.push(s) {
            Some(f) => {
                made += 1;
                keep(&f)
            }
            None => Ok(()),
        },
    )?;
    Ok(Ok((
        OpenEvent {
            row,
            tank: tank_index,
            estimator,
        },
        made,
    )))
}

/// Rebuilds an event in a unit, storing its figures as they come and its
/// latest whole estimate.
pub(super) fn rebuild_and_store(
    tx: &mut Tx<'_>,
    config: &Config,
    row: EventRow,
) -> StoreResult<Result<(OpenEvent, usize), String>> {
    let (id, revision) = (row.id, row.revision);
    let built = {
        let tx = &*tx;
        rebuild(tx, config, row, |f| {
            tx.insert_figures(id, revision, std::slice::from_ref(f))
        })?
    };
    let Ok((mut event, made)) = built else {
        return Ok(built);
    };
    if let Some(latest) = event.estimator.estimate() {
        tx.put_latest(id, revision, &latest)?;
    }
    Ok(Ok((event, made)))
}

/// Creates an event from `start_ms` and builds its estimator from the
/// stored history, storing that history's estimates.
pub(super) fn create_and_build(
    tx: &mut Tx<'_>,
    config: &Config,
    tank: &str,
    opened_at_ms: i64,
    start_ms: i64,
    source: &str,
    params: LeakParams,
) -> StoreResult<Result<OpenEvent, String>> {
    let id = tx.create_event(tank, opened_at_ms, start_ms, source, &params)?;
    let row = tx
        .event(id)?
        .ok_or_else(|| StoreError::Corrupt("the new event vanished".into()))?;
    Ok(rebuild_and_store(tx, config, row)?.map(|(event, _)| event))
}

/// Opens the event of a raised leak flag, in the caller's unit.
pub(super) fn open_flagged(
    tx: &mut Tx<'_>,
    config: &Config,
    edge: &FlagEdge,
) -> StoreResult<Result<Box<OpenEvent>, String>> {
    if let Some(e) = tx.open_event_of_tank(&edge.tank)? {
        return Ok(Err(format!(
            "tank {} already has open event {}",
            edge.tank, e.id
        )));
    }
    let params = LeakParams::default();
    tx.attempt(|tx| {
        create_and_build(
            tx,
            config,
            &edge.tank,
            edge.at_ms,
            edge.start_ms,
            edge.source,
            params,
        )
        .map(|r| r.map(Box::new))
    })
}
