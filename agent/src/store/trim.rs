//! Trimming the rolling history, in bounded chunks off the critical path.
//!
//! The history is kept at full rate for 2 h, at one sample per 10 s per
//! tank back to 24 h, and not at all before that; samples inside an event
//! window (from its start to its close, or still open) are kept at full
//! rate for as long as the event is kept. Trimming used to look at every
//! row and delete the doomed ones one autocommit statement (one fsync) at a
//! time, inside the daemon's loop: 107,000 rows and 16 s at the first trim
//! of a 1,000-tank site. Now:
//!
//! * Work goes by **time window** and **range**: samples are stored a poll
//!   cycle of a sample set (a device's tanks) to a block (`store::samples`),
//!   so per set, one range delete of what is too old, and for thinning one
//!   range scan of the window's times and one range delete per run of
//!   doomed blocks (the nine cycles after each kept one, at 1 Hz). The
//!   blocks' index on (sample_set, at_ms) serves these ranges. A block is
//!   kept whole inside the event window of any of its tanks: its other
//!   tanks' samples stay at full rate with it, a little more kept than the
//!   rule asks, never less.
//! * **Chunks**: a call ([`step`]) does whole sets until its time budget is
//!   spent, in the caller's one transaction, and says where to go on. The
//!   daemon runs it in the store's background lane, so a poll batch, a
//!   heartbeat or an operator action waits at most one chunk.
//! * **Progress** is kept in the `trim_progress` row, committed with the
//!   chunk that finishes a pass, so a restart goes on where it stopped
//!   rather than scanning 22 h of thinned history again. Trimming is
//!   idempotent (the first sample of a 10 s bucket stays the first), so a
//!   pass cut short by a restart is simply done again.
//! * A **pass** covers at most [`MAX_THIN_WINDOW_MS`] of thinning and
//!   [`MAX_REMOVE_WINDOW_MS`] of removal, so that one tank's share of a
//!   chunk stays small even when a daemon that was stopped for a day
//!   catches up; the daemon runs passes until none is left.

use super::{StoreResult, unit};
use rusqlite::{Connection, OptionalExtension, params};
use std::collections::HashMap;
use std::time::{Duration, Instant};

/// How the rolling history is kept (DEVELOPERS.md, "The design"): full rate for
/// `full_ms`, one sample per `thin_every_ms` per tank back to `keep_ms`, none
/// older. Samples inside an event (from its start to its close, or still
/// open) are kept at full rate for as long as the event is kept.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Retention {
    pub full_ms: i64,
    pub thin_every_ms: i64,
    pub keep_ms: i64,
}

impl Retention {
    /// 2 h at full rate, one per 10 s back to 24 h.
    pub const DEFAULT: Retention = Retention {
        full_ms: 2 * 3_600_000,
        thin_every_ms: 10_000,
        keep_ms: 24 * 3_600_000,
    };
}

/// The most history one pass thins: 10 min, 600 samples per tank at 1 Hz.
pub const MAX_THIN_WINDOW_MS: i64 = 10 * 60_000;
/// The most history one pass removes: 6 h, 2,160 thinned samples per tank,
/// in one range delete each.
pub const MAX_REMOVE_WINDOW_MS: i64 = 6 * 3_600_000;
/// The most samples a chunk deletes (finishing the set it is on). The WAL
/// checkpoint after a chunk copies every page the chunk changed, so this
/// bounds it too: measured on a 1,000-tank site with a row per sample, a
/// chunk of about 13,000 samples was followed by a checkpoint of under
/// 100 ms, one of 127,000 by one of almost 500 ms; packed, the same
/// samples take about a third of the pages.
pub const MAX_SAMPLES_PER_CHUNK: usize = 15_000;

/// The time windows of one pass.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Pass {
    /// Thinned: [thin_from, thin_to), both on bucket boundaries.
    pub thin_from: i64,
    pub thin_to: i64,
    /// Removed (outside event windows): [remove_from, remove_to).
    pub remove_from: i64,
    pub remove_to: i64,
}

/// Where a pass stands between chunks.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TrimState {
    pub pass: Pass,
    /// The next sample set (by id order) to do.
    pub next_set: usize,
}

/// What one chunk did.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TrimStep {
    /// Samples deleted (blocks times their set's tanks).
    pub removed: usize,
    /// Where to go on: `None` when the pass is finished (or there was
    /// nothing to do).
    pub next: Option<TrimState>,
    /// Whether there was any work at all; false means the history is
    /// trimmed up to now.
    pub worked: bool,
}

/// The progress row, made on first use: thinning from the full-rate
/// horizon (older history was thinned by the daemons before, or goes at
/// 24 h), removal from the oldest stored sample.
fn progress(conn: &Connection, now_ms: i64, retention: Retention) -> StoreResult<(i64, i64)> {
    let stored: Option<(i64, i64)> = conn
        .query_row(
            "SELECT thinned_before_ms, removed_before_ms FROM trim_progress WHERE id = 1",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .optional()?;
    if let Some(p) = stored {
        return Ok(p);
    }
    let thinned = align(now_ms - retention.full_ms, retention.thin_every_ms);
    let oldest = super::samples::oldest_sample_ms(conn)?;
    let removed = oldest.unwrap_or(now_ms - retention.keep_ms);
    Ok((thinned, removed))
}

fn align(ms: i64, every: i64) -> i64 {
    ms.div_euclid(every) * every
}

/// The next pass from the stored progress, or None when all is trimmed.
pub fn plan(conn: &Connection, now_ms: i64, retention: Retention) -> StoreResult<Option<Pass>> {
    let (thinned, removed) = progress(conn, now_ms, retention)?;
    // Both horizons move in whole buckets, so that a pass has at least a
    // bucket's work and a round of trimming ends (rather than chasing the
    // milliseconds that pass while it runs).
    let remove_horizon = align(now_ms - retention.keep_ms, retention.thin_every_ms);
    let remove_from = removed;
    let remove_to = remove_horizon.min(remove_from + MAX_REMOVE_WINDOW_MS);
    // What goes at 24 h need not be thinned first.
    let thin_from = thinned.max(remove_horizon);
    let thin_horizon = align(now_ms - retention.full_ms, retention.thin_every_ms);
    let thin_to = thin_horizon.min(thin_from + MAX_THIN_WINDOW_MS);
    if thin_from >= thin_to && remove_from >= remove_to {
        return Ok(None);
    }
    Ok(Some(Pass {
        thin_from,
        thin_to: thin_to.max(thin_from),
        remove_from,
        remove_to: remove_to.max(remove_from),
    }))
}

/// One chunk: goes on with `state` (or plans a pass), trims whole sets
/// until `budget` is spent or [`MAX_SAMPLES_PER_CHUNK`] samples are gone, and
/// records the progress when the pass is done. Runs inside the caller's
/// transaction.
pub fn step(
    conn: &Connection,
    now_ms: i64,
    retention: Retention,
    state: Option<TrimState>,
    budget: Duration,
) -> StoreResult<TrimStep> {
    let began = Instant::now();
    let state = match state {
        Some(s) => s,
        None => match plan(conn, now_ms, retention)? {
            Some(pass) => TrimState { pass, next_set: 0 },
            None => {
                return Ok(TrimStep {
                    removed: 0,
                    next: None,
                    worked: false,
                });
            }
        },
    };
    let pass = state.pass;
    let sets: Vec<(i64, usize)> = {
        let mut stmt = conn.prepare_cached(
            "SELECT sample_set, COUNT(*) FROM sample_set_slots GROUP BY sample_set ORDER BY sample_set",
        )?;
        stmt.query_map([], |r| Ok((r.get(0)?, r.get::<_, i64>(1)? as usize)))?
            .collect::<Result<_, _>>()?
    };
    let windows = event_windows(conn)?;
    let none = Vec::new();
    let mut removed = 0;
    for (i, (set, tanks)) in sets.iter().enumerate().skip(state.next_set) {
        let kept = windows.get(set).unwrap_or(&none);
        let blocks = remove(conn, *set, pass.remove_from, pass.remove_to, kept)?
            + thin(conn, *set, &pass, retention.thin_every_ms, kept)?;
        removed += blocks * tanks;
        let spent = began.elapsed() >= budget || removed >= MAX_SAMPLES_PER_CHUNK;
        if spent && i + 1 < sets.len() {
            return Ok(TrimStep {
                removed,
                next: Some(TrimState {
                    pass,
                    next_set: i + 1,
                }),
                worked: true,
            });
        }
    }
    unit::execute(conn,
        "INSERT INTO trim_progress (id, thinned_before_ms, removed_before_ms) VALUES (1, ?1, ?2)
         ON CONFLICT (id) DO UPDATE SET thinned_before_ms = MAX(thinned_before_ms, ?1), removed_before_ms = MAX(removed_before_ms, ?2)",
        params![pass.thin_to, pass.remove_to],
    )?;
    Ok(TrimStep {
        removed,
        next: None,
        worked: true,
    })
}

/// The event windows of the tanks of every sample set, by set: (start,
/// close or never).
fn event_windows(conn: &Connection) -> StoreResult<HashMap<i64, Vec<(i64, i64)>>> {
    let mut stmt = conn.prepare_cached(
        "SELECT s.sample_set, e.start_ms, COALESCE(e.closed_at_ms, ?1)
         FROM events e JOIN tanks t ON t.tag = e.tank JOIN sample_set_slots s ON s.tank = t.id",
    )?;
    let mut out: HashMap<i64, Vec<(i64, i64)>> = HashMap::new();
    for row in stmt.query_map([i64::MAX], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))? {
        let (set, from, to) = row?;
        out.entry(set).or_default().push((from, to));
    }
    Ok(out)
}

/// The parts of [from, to) outside every kept window [a, b] (inclusive).
fn outside(from: i64, to: i64, kept: &[(i64, i64)]) -> Vec<(i64, i64)> {
    let mut windows: Vec<(i64, i64)> = kept
        .iter()
        .copied()
        .filter(|&(a, b)| a < to && b >= from)
        .collect();
    windows.sort_unstable();
    let mut out = Vec::new();
    let mut at = from;
    for (a, b) in windows {
        if a > at {
            out.push((at, a.min(to)));
        }
        at = at.max(b.saturating_add(1));
        if at >= to {
            break;
        }
    }
    if at < to {
        out.push((at, to));
    }
    out
}

/// Deletes a set's blocks in [from, to) outside its event windows: one
/// range delete per stretch between windows. Returns the blocks deleted.
fn remove(
    conn: &Connection,
    set: i64,
    from: i64,
    to: i64,
    kept: &[(i64, i64)],
) -> StoreResult<usize> {
    if from >= to {
        return Ok(0);
    }
    let mut delete = conn.prepare_cached(
        "DELETE FROM sample_blocks WHERE sample_set = ?1 AND at_ms >= ?2 AND at_ms < ?3",
    )?;
    let mut removed = 0;
    for (a, b) in outside(from, to, kept) {
        removed += delete.execute(params![set, a, b])?;
    }
    Ok(removed)
}

/// Thins a set's blocks in the pass's window to the first of each bucket,
/// outside its event windows: one range scan, then one range delete per
/// run of doomed blocks. Returns the blocks deleted.
fn thin(
    conn: &Connection,
    set: i64,
    pass: &Pass,
    every_ms: i64,
    kept: &[(i64, i64)],
) -> StoreResult<usize> {
    if pass.thin_from >= pass.thin_to {
        return Ok(0);
    }
    let times: Vec<i64> = {
        let mut stmt = conn.prepare_cached(
            "SELECT at_ms FROM sample_blocks WHERE sample_set = ?1 AND at_ms >= ?2 AND at_ms < ?3 ORDER BY at_ms",
        )?;
        stmt.query_map(params![set, pass.thin_from, pass.thin_to], |r| r.get(0))?
            .collect::<Result<_, _>>()?
    };
    let in_event = |at: i64| kept.iter().any(|&(a, b)| at >= a && at <= b);
    let mut runs: Vec<(i64, i64)> = Vec::new();
    let mut bucket = i64::MIN;
    let mut run: Option<(i64, i64)> = None;
    for at in times {
        let b = at.div_euclid(every_ms);
        let doomed = b == bucket && !in_event(at);
        bucket = b;
        match (doomed, run.as_mut()) {
            (true, Some(r)) => r.1 = at,
            (true, None) => run = Some((at, at)),
            (false, _) => runs.extend(run.take()),
        }
    }
    runs.extend(run);
    let mut delete = conn.prepare_cached(
        "DELETE FROM sample_blocks WHERE sample_set = ?1 AND at_ms >= ?2 AND at_ms <= ?3",
    )?;
    let mut removed = 0;
    for (a, b) in runs {
        removed += delete.execute(params![set, a, b])?;
    }
    Ok(removed)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::acquire::sample::{Reading, TankSample};
    use crate::estimate::LeakParams;
    use crate::store as records;

    const HOUR: i64 = 3_600_000;

    fn sample(tag: &str, at_ms: i64) -> TankSample {
        TankSample {
            tank: 0,
            tank_id: tag.into(),
            at_ms,
            level: Reading::good(2.0),
            pressure: None,
            transfer: None,
            temperature: None,
            leak_flag: None,
        }
    }

    fn times(conn: &Connection, tag: &str) -> Vec<i64> {
        records::samples_between(conn, tag, i64::MIN, i64::MAX)
            .unwrap()
            .iter()
            .map(|s| s.at_ms)
            .collect()
    }

    /// Three tanks with 26 h of 1 Hz history (ending at `now`), one with an
    /// event 5 h ago: after trimming, every tank has full rate for 2 h, one
    /// per 10 s to 24 h, none older, except inside the event window; the
    /// work came in many small chunks; a second round finds nothing to do.
    #[test]
    fn trimming_keeps_the_retention_in_bounded_chunks_and_is_idempotent() {
        let dir = std::env::temp_dir().join(format!("leaktally-trim-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let db = dir.join("t.db");
        let _ = std::fs::remove_file(&db);
        let conn = crate::store::open_read_write(&db).unwrap();
        let now = 1_780_000_000_000 + 123;
        let tags = ["A", "B", "C"];
        records::register_tanks(&conn, tags).unwrap();
        conn.execute_batch("BEGIN").unwrap();
        for tag in tags {
            let batch: Vec<TankSample> = (0..26 * 3600)
                .map(|i| sample(tag, now - 26 * HOUR + 1000 * i + 7))
                .collect();
            records::insert_samples(&conn, &batch).unwrap();
        }
        conn.execute_batch("COMMIT").unwrap();
        let params = LeakParams {
            hole_diameter_m: Some(0.02),
            hole_height_m: 0.0,
            cd: 1.0,
            density_kg_m3: None,
            ..LeakParams::default()
        };
        let (event_from, event_to) = (now - 5 * HOUR, now - 5 * HOUR + 600_000);
        let id =
            records::create_event(&conn, "B", event_from, event_from, "operator", &params).unwrap();
        records::close_event(&conn, id, event_to).unwrap();
        // The progress as a daemon that kept up would have left it: thinned
        // to 24 h ago, and the 2 h before that thinned too (as pre-aged).
        conn.execute(
            "INSERT INTO trim_progress (id, thinned_before_ms, removed_before_ms) VALUES (1, ?1, ?2)",
            params![align(now - 26 * HOUR, 10_000), now - 26 * HOUR],
        )
        .unwrap();

        let mut chunks = 0;
        let mut state = None;
        let (mut removed, mut most) = (0, 0);
        loop {
            conn.execute_batch("BEGIN").unwrap();
            let step = step(&conn, now, Retention::DEFAULT, state, Duration::ZERO).unwrap();
            conn.execute_batch("COMMIT").unwrap();
            if !step.worked {
                break;
            }
            chunks += 1;
            removed += step.removed;
            most = most.max(step.removed);
            state = step.next;
            assert!(chunks < 10_000, "trimming does not end");
        }
        // A zero budget does one tank per chunk.
        assert!(chunks >= 3 * 132, "{chunks} chunks");
        assert!(
            most <= MAX_SAMPLES_PER_CHUNK + 2 * 3600,
            "a chunk removed {most} rows"
        );
        for tag in tags {
            let t = times(&conn, tag);
            assert!(t.windows(2).all(|w| w[0] < w[1]));
            let older = t.iter().filter(|&&at| at < now - 24 * HOUR).count();
            assert_eq!(older, 0, "{tag}: samples older than 24 h");
            let full = t.iter().filter(|&&at| at >= now - 2 * HOUR).count();
            assert!(
                (7199..=7200).contains(&full),
                "{tag}: {full} in the last 2 h"
            );
            let in_event = t
                .iter()
                .filter(|&&at| at >= event_from && at <= event_to)
                .count();
            if tag == "B" {
                assert_eq!(in_event, 600, "the event window is kept at full rate");
            } else {
                assert_eq!(in_event, 60, "{tag}: thinned to one per 10 s");
            }
            // Between 24 h and 2 h ago, outside the event: one per bucket.
            let mut buckets = std::collections::HashMap::new();
            for &at in t.iter().filter(|&&at| {
                at >= now - 24 * HOUR
                    && at < align(now - 2 * HOUR, 10_000)
                    && !(tag == "B" && at >= event_from && at <= event_to)
            }) {
                *buckets.entry(at.div_euclid(10_000)).or_insert(0) += 1;
            }
            assert!(
                buckets.values().all(|&n| n == 1),
                "{tag}: a bucket with more than one sample"
            );
            assert!(
                buckets.len() >= 22 * 360 - 61,
                "{tag}: {} buckets",
                buckets.len()
            );
        }
        let total: usize = tags.iter().map(|t| times(&conn, t).len()).sum();
        assert_eq!(total + removed, 3 * 26 * 3600);

        // Nothing left to do, a few seconds on too (the horizons move in
        // whole buckets), and a pass done again changes nothing.
        let again = step(&conn, now, Retention::DEFAULT, None, Duration::from_secs(1)).unwrap();
        assert!(!again.worked);
        let later = align(now, 10_000) + 9_999;
        let again = step(
            &conn,
            later,
            Retention::DEFAULT,
            None,
            Duration::from_secs(1),
        )
        .unwrap();
        assert!(!again.worked, "a pass for the milliseconds since");
        let pass = Pass {
            thin_from: align(now - 10 * HOUR, 10_000),
            thin_to: align(now - 9 * HOUR, 10_000),
            remove_from: now - 30 * HOUR,
            remove_to: now - 24 * HOUR,
        };
        let redo = step(
            &conn,
            now,
            Retention::DEFAULT,
            Some(TrimState { pass, next_set: 0 }),
            Duration::from_secs(1),
        )
        .unwrap();
        assert_eq!(redo.removed, 0);
        drop(conn);
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// However long the budget, a chunk stops after the tank that takes it
    /// past [`MAX_SAMPLES_PER_CHUNK`] rows, so the checkpoint after it stays
    /// small.
    #[test]
    fn a_chunk_is_bounded_in_rows_too() {
        let dir = std::env::temp_dir().join(format!("leaktally-trim-rows-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let db = dir.join("t.db");
        let _ = std::fs::remove_file(&db);
        let conn = crate::store::open_read_write(&db).unwrap();
        let now = 1_780_000_000_000;
        let tags: Vec<String> = (0..10).map(|i| format!("T{i}")).collect();
        records::register_tanks(&conn, tags.iter().map(String::as_str)).unwrap();
        conn.execute_batch("BEGIN").unwrap();
        for tag in &tags {
            let old: Vec<TankSample> = (0..3000)
                .map(|i| sample(tag, now - 25 * HOUR + 1000 * i))
                .collect();
            records::insert_samples(&conn, &old).unwrap();
        }
        conn.execute_batch("COMMIT").unwrap();
        let mut state = None;
        let mut sizes = Vec::new();
        loop {
            let step = step(
                &conn,
                now,
                Retention::DEFAULT,
                state,
                Duration::from_secs(60),
            )
            .unwrap();
            if !step.worked {
                break;
            }
            sizes.push(step.removed);
            state = step.next;
        }
        assert_eq!(sizes.iter().sum::<usize>(), 30_000, "{sizes:?}");
        assert!(sizes.len() >= 2, "{sizes:?}");
        assert!(
            sizes.iter().all(|&n| n <= MAX_SAMPLES_PER_CHUNK + 3000),
            "{sizes:?}"
        );
        drop(conn);
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn the_parts_outside_the_windows() {
        assert_eq!(outside(0, 100, &[]), vec![(0, 100)]);
        assert_eq!(outside(0, 100, &[(10, 20)]), vec![(0, 10), (21, 100)]);
        assert_eq!(outside(0, 100, &[(-5, 20), (50, i64::MAX)]), vec![(21, 50)]);
        assert_eq!(outside(0, 100, &[(0, 100)]), vec![]);
        assert_eq!(
            outside(0, 100, &[(30, 40), (35, 60)]),
            vec![(0, 30), (61, 100)]
        );
    }
}
