//! Units of work: what a closure sent to the database thread may do.
//!
//! A [`Reader`] reads inside one read transaction; a [`Tx`] also writes,
//! inside one write transaction that commits when the closure returns `Ok`
//! and rolls back otherwise. Both offer the store's operations by name and
//! never a raw connection, so code outside the store cannot run SQL, and a
//! unit cannot leave a transaction open for the next one. [`Tx::attempt`]
//! runs part of a unit in a savepoint, for work that may be refused (an
//! operator's request): its writes are undone, the rest of the unit stays.
//!
//! In tests, [`Faults`] makes the database hang, report a held lock, or
//! fail a unit part way.

use super::trim::{self, Retention, TrimState, TrimStep};
use super::{ActionRow, Beat, EventRow, Heartbeat};
use super::{StoreError, StoreResult};
use super::{actions, estimates, events, heartbeat, outbox, samples};
use crate::acquire::sample::TankSample;
use crate::clock::ClockStep;
use crate::estimate::{Estimate, Figures, LeakParams};
use rusqlite::Connection;
use std::time::Duration;
use tokio::sync::oneshot;

/// Reads, inside the unit's transaction.
pub struct Reader<'c> {
    conn: &'c Connection,
}

impl<'c> Reader<'c> {
    pub fn events(&self, open_only: bool) -> StoreResult<Vec<EventRow>> {
        events::events(self.conn, open_only)
    }

    pub fn event(&self, id: i64) -> StoreResult<Option<EventRow>> {
        events::event(self.conn, id)
    }

    /// The open event of a tank, if it has one.
    pub fn open_event_of_tank(&self, tank: &str) -> StoreResult<Option<EventRow>> {
        events::open_event_of_tank(self.conn, tank)
    }

    pub fn samples_between(
        &self,
        tank: &str,
        from_ms: i64,
        to_ms: i64,
    ) -> StoreResult<Vec<TankSample>> {
        samples::samples_between(self.conn, tank, from_ms, to_ms)
    }

    /// Calls `f` with each of a tank's samples in a time range, in order,
    /// without holding them all.
    pub fn for_each_sample(
        &self,
        tank: &str,
        from_ms: i64,
        to_ms: i64,
        f: impl FnMut(&TankSample) -> StoreResult<()>,
    ) -> StoreResult<()> {
        samples::for_each_sample(self.conn, tank, from_ms, to_ms, f)
    }

    pub fn first_sample_ms(&self, tank: &str) -> StoreResult<Option<i64>> {
        samples::first_sample_ms(self.conn, tank)
    }

    /// Whether a good level of `tank` is stored within `slack_ms` of `at_ms`.
    pub fn good_level_near(&self, tank: &str, at_ms: i64, slack_ms: i64) -> StoreResult<bool> {
        samples::good_level_near(self.conn, tank, at_ms, slack_ms)
    }

    /// The latest time anything stored carries, for anchoring the clock.
    pub fn latest_stored_ms(&self) -> StoreResult<Option<i64>> {
        heartbeat::latest_stored_ms(self.conn)
    }

    /// Whether an event revision has a latest whole estimate.
    pub fn has_latest(&self, event: i64, revision: i64) -> StoreResult<bool> {
        Ok(estimates::latest_estimate_with_version(self.conn, event, revision)?.is_some())
    }

    /// The whole estimate of an event's latest sample, of its revision.
    pub fn latest_estimate(&self, row: &EventRow) -> StoreResult<Option<Estimate>> {
        estimates::latest_estimate(self.conn, row)
    }

    /// Up to `n` outbox messages after sequence number `after`, oldest
    /// first.
    pub fn outbox_next(&self, after: i64, n: usize) -> StoreResult<Vec<outbox::Queued>> {
        outbox::next(self.conn, after, n)
    }

    /// How many messages wait in the outbox, and the sample time of the
    /// oldest.
    pub fn outbox_depth(&self) -> StoreResult<(u64, Option<i64>)> {
        Ok((outbox::depth(self.conn)?, outbox::oldest_ms(self.conn)?))
    }

    /// Whether any operator request waits.
    pub fn any_pending_action(&self) -> StoreResult<bool> {
        actions::any_pending(self.conn)
    }

    pub fn pending_actions(&self) -> StoreResult<Vec<ActionRow>> {
        actions::pending_actions(self.conn)
    }

    pub fn action_is_pending(&self, id: i64) -> StoreResult<bool> {
        actions::action_is_pending(self.conn, id)
    }

    pub fn heartbeat(&self) -> StoreResult<Option<Heartbeat>> {
        heartbeat::heartbeat(self.conn)
    }

    /// Why each open event that is not tracked is not.
    pub fn tracking_errors(&self) -> StoreResult<std::collections::HashMap<i64, String>> {
        events::tracking_errors(self.conn)
    }
}

/// Reads and writes, inside the unit's write transaction.
pub struct Tx<'c> {
    reader: Reader<'c>,
    writes: std::cell::Cell<usize>,
    /// In tests: the write after this many fails with this SQLite code.
    fail_after: Option<(usize, i32)>,
}

impl<'c> std::ops::Deref for Tx<'c> {
    type Target = Reader<'c>;

    fn deref(&self) -> &Reader<'c> {
        &self.reader
    }
}

impl<'c> Tx<'c> {
    fn conn(&self) -> &'c Connection {
        self.reader.conn
    }

    /// Counts a write, and fails it when a test asked for that.
    fn wrote(&self) -> StoreResult<()> {
        self.writes.set(self.writes.get() + 1);
        match self.fail_after {
            Some((after, code)) if self.writes.get() > after => {
                Err(StoreError::Sql(rusqlite::Error::SqliteFailure(
                    rusqlite::ffi::Error::new(code),
                    Some("failure injected by a test".into()),
                )))
            }
            _ => Ok(()),
        }
    }

    /// Runs `f` in a savepoint: its writes stay only if it returns
    /// `Ok(Ok(_))`; on `Ok(Err(_))` (a refusal) or `Err` they are undone and
    /// the rest of the unit carries on (or, on `Err`, fails as a whole).
    pub fn attempt<T, R>(
        &mut self,
        f: impl FnOnce(&mut Tx<'c>) -> StoreResult<Result<T, R>>,
    ) -> StoreResult<Result<T, R>> {
        run_cached(self.conn(), "SAVEPOINT attempt")?;
        let outcome = f(self);
        if !matches!(outcome, Ok(Ok(_))) {
            run_cached(self.conn(), "ROLLBACK TO attempt")?;
        }
        run_cached(self.conn(), "RELEASE attempt")?;
        outcome
    }

    pub fn register_tanks<'a>(
        &mut self,
        tags: impl IntoIterator<Item = &'a str>,
    ) -> StoreResult<()> {
        self.wrote()?;
        samples::register_tanks(self.conn(), tags)
    }

    pub fn insert_samples(&mut self, samples: &[TankSample]) -> StoreResult<usize> {
        self.wrote()?;
        samples::insert_samples(self.conn(), samples)
    }

    /// The sample set of these tanks in this order (see `store::samples`).
    pub fn sample_set(&mut self, tags: &[&str]) -> StoreResult<i64> {
        self.wrote()?;
        samples::sample_set(self.conn(), tags)
    }

    /// One poll cycle of a set's tanks, packed (see `store::samples`).
    pub fn insert_block(&mut self, set: i64, at_ms: i64, data: &[u8]) -> StoreResult<bool> {
        self.wrote()?;
        samples::insert_block(self.conn(), set, at_ms, data)
    }

    pub fn insert_estimates(
        &mut self,
        event: i64,
        revision: i64,
        estimates: &[Estimate],
    ) -> StoreResult<()> {
        self.wrote()?;
        estimates::insert_estimates(self.conn(), event, revision, estimates)
    }

    /// (Shared: a rebuild stores figures while it reads the samples.)
    pub fn insert_figures(
        &self,
        event: i64,
        revision: i64,
        figures: &[Figures],
    ) -> StoreResult<()> {
        self.wrote()?;
        estimates::insert_figures(self.conn(), event, revision, figures)
    }

    /// The whole estimate of an event revision's latest sample.
    pub fn put_latest(
        &mut self,
        event: i64,
        revision: i64,
        estimate: &Estimate,
    ) -> StoreResult<()> {
        self.wrote()?;
        estimates::put_latest(self.conn(), event, revision, estimate)
    }

    pub fn create_event(
        &mut self,
        tank: &str,
        opened_at_ms: i64,
        start_ms: i64,
        source: &str,
        params: &LeakParams,
    ) -> StoreResult<i64> {
        self.wrote()?;
        events::create_event(self.conn(), tank, opened_at_ms, start_ms, source, params)
    }

    pub fn revise_event(&mut self, id: i64, params: &LeakParams) -> StoreResult<i64> {
        self.wrote()?;
        events::revise_event(self.conn(), id, params)
    }

    /// Closes an event at `at_ms` and drops its estimates and crossings
    /// after that time: samples taken after the leak was isolated are not
    /// part of it (and a replay, which ends at the close, agrees).
    pub fn close_event(&mut self, id: i64, at_ms: i64) -> StoreResult<()> {
        self.wrote()?;
        events::close_event(self.conn(), id, at_ms)?;
        estimates::drop_estimates_after(self.conn(), id, at_ms)
    }

    pub fn set_tracking_error(&mut self, event: i64, why: Option<&str>) -> StoreResult<()> {
        self.wrote()?;
        events::set_tracking_error(self.conn(), event, why)
    }

    pub fn finish_action(
        &mut self,
        id: i64,
        event: Option<i64>,
        done: bool,
        outcome: &str,
        at_ms: i64,
    ) -> StoreResult<()> {
        self.wrote()?;
        actions::finish_action_at(self.conn(), id, event, done, outcome, at_ms)
    }

    /// Puts messages in the outbox, in this unit, keeping it within
    /// `limit`; returns how many older ones were given up.
    pub fn enqueue(&mut self, messages: &[outbox::Message], limit: usize) -> StoreResult<u64> {
        self.wrote()?;
        outbox::enqueue(self.conn(), messages, limit)
    }

    /// Deletes the outbox messages the broker acknowledged.
    pub fn outbox_delete(&mut self, seqs: &[i64]) -> StoreResult<()> {
        self.wrote()?;
        outbox::delete(self.conn(), seqs)
    }

    pub fn beat(&mut self, beat: &Beat) -> StoreResult<()> {
        self.wrote()?;
        heartbeat::beat_with(self.conn(), beat)
    }

    pub fn mark_stopped(&mut self, at_ms: i64, wall_ms: i64) -> StoreResult<()> {
        self.wrote()?;
        heartbeat::mark_stopped_at(self.conn(), at_ms, wall_ms)
    }

    pub fn record_clock_step(&mut self, step: &ClockStep) -> StoreResult<()> {
        self.wrote()?;
        heartbeat::record_clock_step(self.conn(), step)
    }

    /// One bounded chunk of trimming (see [`trim`]).
    pub fn trim_step(
        &mut self,
        now_ms: i64,
        retention: Retention,
        state: Option<TrimState>,
        budget: Duration,
    ) -> StoreResult<TrimStep> {
        self.wrote()?;
        trim::step(self.conn(), now_ms, retention, state, budget)
    }
}

/// Runs `work` in a write transaction on `conn`.
/// `fail_after` is for tests: the write after that many fails with that
/// SQLite code.
pub(super) fn in_write_transaction<T>(
    conn: &mut Connection,
    fail_after: Option<(usize, i32)>,
    work: impl FnOnce(&mut Tx<'_>) -> StoreResult<T>,
) -> StoreResult<T> {
    end_stray_transaction(conn);
    run_cached(conn, "BEGIN IMMEDIATE")?;
    let outcome = work(&mut Tx {
        reader: Reader { conn: &*conn },
        writes: std::cell::Cell::new(0),
        fail_after,
    });
    match outcome {
        Ok(value) => match run_cached(conn, "COMMIT") {
            Ok(()) => Ok(value),
            Err(e) => {
                // A failed COMMIT (busy, full) may leave it open.
                end_stray_transaction(conn);
                Err(e.into())
            }
        },
        Err(e) => {
            end_stray_transaction(conn);
            Err(e)
        }
    }
}

/// Runs `work` in a read transaction on `conn`: one consistent view, and
/// no write lock, so it works while another program holds that.
pub(super) fn in_read_transaction<T>(
    conn: &mut Connection,
    work: impl FnOnce(&Reader<'_>) -> StoreResult<T>,
) -> StoreResult<T> {
    end_stray_transaction(conn);
    run_cached(conn, "BEGIN")?;
    let outcome = work(&Reader { conn: &*conn });
    end_stray_transaction(conn);
    outcome
}

/// Runs a statement of no rows from the statement cache: the daemon's
/// every unit begins and commits, and parsing those each time shows in a
/// profile.
pub(super) fn run_cached(conn: &Connection, sql: &str) -> rusqlite::Result<()> {
    conn.prepare_cached(sql)?.raw_execute().map(|_| ())
}

/// `Connection::execute` through the statement cache. The daemon runs the
/// same few statements every second (the heartbeat, the action check, the
/// savepoints of a unit), and parsing one costs more than running it.
pub(super) fn execute<P: rusqlite::Params>(
    conn: &Connection,
    sql: &str,
    params: P,
) -> rusqlite::Result<usize> {
    conn.prepare_cached(sql)?.execute(params)
}

/// `Connection::query_row` through the statement cache (see [`execute`]).
pub(super) fn query_row<T, P, F>(
    conn: &Connection,
    sql: &str,
    params: P,
    f: F,
) -> rusqlite::Result<T>
where
    P: rusqlite::Params,
    F: FnOnce(&rusqlite::Row<'_>) -> rusqlite::Result<T>,
{
    conn.prepare_cached(sql)?.query_row(params, f)
}

/// Ends a transaction left open; every read ends here, so the ROLLBACK
/// comes from the statement cache too.
fn end_stray_transaction(conn: &Connection) {
    if !conn.is_autocommit() && run_cached(conn, "ROLLBACK").is_err() {
        let _ = conn.execute_batch("ROLLBACK");
    }
}

/// Waits for a job's answer from the database thread.
pub(super) async fn wait<T>(answer: oneshot::Receiver<T>) -> StoreResult<T> {
    #[cfg(test)]
    let mut answer = answer;
    #[cfg(test)]
    loop {
        // Under tokio's paused test clock, simulated time would jump ahead
        // (to the next timer) whenever this task waits for the database
        // thread, which works in real time. Blocking tasks hold the clock
        // still for up to 50 real milliseconds, so a database that answers
        // in that time (an fsync included) takes no simulated time; one
        // that does not (a hung disk) lets simulated time move on, 250 ms
        // at a time.
        for _ in 0..10 {
            let hold = tokio::task::spawn_blocking(|| std::thread::sleep(Duration::from_millis(5)));
            tokio::select! {
                biased;
                r = &mut answer => return r.map_err(|_| StoreError::Stopped),
                _ = hold => {}
            }
        }
        tokio::select! {
            biased;
            r = &mut answer => return r.map_err(|_| StoreError::Stopped),
            _ = tokio::time::sleep(Duration::from_millis(250)) => {}
        }
    }
    #[cfg(not(test))]
    answer.await.map_err(|_| StoreError::Stopped)
}

/// Faults a test can inject into the store.
#[cfg(test)]
#[derive(Default)]
pub(crate) struct Faults {
    hung: std::sync::Mutex<bool>,
    unhung: std::sync::Condvar,
    busy: std::sync::atomic::AtomicBool,
    fail_after: std::sync::Mutex<Option<(usize, i32)>>,
}

#[cfg(test)]
impl Faults {
    /// While hung, the database thread takes no job (a disk that does not
    /// answer).
    pub(crate) fn hang(&self, hung: bool) {
        *self.hung.lock().unwrap() = hung;
        self.unhung.notify_all();
    }

    pub(super) fn wait_while_hung(&self) {
        let mut hung = self.hung.lock().unwrap();
        while *hung {
            hung = self.unhung.wait(hung).unwrap();
        }
    }

    /// While busy, every write unit fails at once as if another program
    /// held the write lock.
    pub(crate) fn set_busy(&self, busy: bool) {
        self.busy.store(busy, std::sync::atomic::Ordering::SeqCst);
    }

    pub(super) fn before_unit(&self) -> StoreResult<()> {
        if self.busy.load(std::sync::atomic::Ordering::SeqCst) {
            return Err(StoreError::Sql(rusqlite::Error::SqliteFailure(
                rusqlite::ffi::Error::new(rusqlite::ffi::SQLITE_BUSY),
                Some("write lock held (injected by a test)".into()),
            )));
        }
        Ok(())
    }

    /// The next write unit fails at its write after `writes` writes, with
    /// SQLite error `code`.
    pub(crate) fn fail_next_unit_after(&self, writes: usize, code: i32) {
        *self.fail_after.lock().unwrap() = Some((writes, code));
    }

    pub(super) fn take_fail_after(&self) -> Option<(usize, i32)> {
        self.fail_after.lock().unwrap().take()
    }
}
