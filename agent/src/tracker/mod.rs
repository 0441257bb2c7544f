//! The tracker: open events, operator actions, and what goes to the store.
//!
//! It owns one [`Estimator`] per open event. Every batch of samples from
//! acquisition is fed to the estimators of its tanks, and the samples and
//! the estimates they produced are committed in one unit of work, so the
//! two can never disagree after a crash. Operator actions arrive as rows in
//! the store; each is applied, with its outcome recorded, in one unit of
//! work on the store's thread (the checks, the event rows, the rebuilt
//! estimator's estimates and the action's outcome commit together or not
//! at all), and the tracker's memory changes only after that commits. A
//! request the tracker turns down is a [`Refusal`], recorded as such; a
//! database error is not a refusal, and leaves the request waiting.
//!
//! Times: the tracker works on the daemon's timeline (`crate::clock`). A
//! request carries the CLI's wall-clock time; the tracker applies it at
//! that time (moved onto the timeline): an open without `--since` starts
//! when it was asked for, a close closes then, even if no daemon was
//! running to take it at the time (it then waited in its row for the next
//! daemon, and the stretch in between is bridged and marked like any gap).
//!
//! On start it resumes every open event by replaying the event's stored
//! samples through a fresh estimator: the estimator is deterministic, so
//! this rebuilds exactly the state before the restart, with no double
//! counting, and the gap while the agent was down is bridged by the forecast
//! at the next sample. An open event that cannot be resumed (its tank left
//! the config, its parameters no longer fit the tank) is not dropped: it is
//! kept open and marked "not tracked", with the reason, for `status`, the
//! page and the log, until it is closed or the daemon can resume it.
//!
//! A new event is only ever built from the stored history when every
//! acquired sample is stored (the backlog is empty), so that the rebuilt
//! estimator is the one a live daemon would have had.

use crate::acquire::sample::TankSample;
use crate::actions::Request;
use crate::clock::Clock;
use crate::config::Config;
use crate::estimate::{Estimate, LeakParams};
use crate::estimator::Estimator;
use crate::report::estimate::describe_params;
use crate::store::health::{StoreHealth, WriteFailure};
use crate::store::{ActionRow, EventRow, Lane, Reader, Store, StoreError, StoreResult, Tx};
use std::collections::{HashMap, HashSet, VecDeque};
use std::sync::Arc;
use std::time::Duration;
use tokio::time::Instant;
use tracing::{debug, error, info, warn};

/// An operator's request turned down, and why: recorded as the action's
/// outcome, never confused with a database error.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Refusal {
    pub event: Option<i64>,
    pub why: String,
}

impl Refusal {
    fn new(event: Option<i64>, why: impl Into<String>) -> Self {
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

/// How long after a failed commit the next one is tried. Each attempt may
/// wait out the writer's busy timeout, and the daemon's loop waits with it,
/// so attempts are spaced to let the loop drain acquisition in between.
const RETRY_EVERY: Duration = Duration::from_secs(2);
/// Poll cycles committed in one transaction, and transactions in one
/// flush, when catching up on held cycles.
const CYCLES_PER_COMMIT: usize = 100;
const COMMITS_PER_FLUSH: usize = 5;
/// Failed attempts between repeated warnings in the log (about a minute).
const WARN_EVERY_ATTEMPTS: u64 = 30;
/// Samples held in memory, while the database takes no writes, before the
/// oldest samples of tanks with no open event are given up: about half an
/// hour of a 1,000-tank site at 1 s, some 300 MB. Event samples and
/// estimates are never given up.
const MAX_HELD_SAMPLES: usize = 2_000_000;

/// What an applied action changes in memory once its unit commits.
enum Change {
    /// An event opened, or revised (its new state replaces the old).
    Opened(Box<OpenEvent>),
    Closed(i64),
}

/// An applied action: the event it concerns, what changed in words, and
/// the change to make in memory.
struct Done {
    event: Option<i64>,
    text: String,
    change: Option<Change>,
}

/// What became of one pending action.
enum Handled {
    Done(Done),
    Refused(Refusal),
    /// No longer pending (an earlier attempt, cut short at shutdown,
    /// committed after all).
    Gone,
}

/// Samples and estimates that belong in one transaction.
#[derive(Debug, Default, Clone)]
struct Write {
    samples: Vec<TankSample>,
    /// (event, revision, estimates).
    estimates: Vec<(i64, i64, Vec<Estimate>)>,
}

struct OpenEvent {
    row: EventRow,
    estimator: Estimator,
}

/// A rising leak flag, waiting for every acquired sample to be stored.
#[derive(Debug, Clone)]
struct FlagEdge {
    tank: String,
    at_ms: i64,
}

/// How a run went, for the daemon's last log line and its tests.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Counts {
    /// Samples handed to the tracker.
    pub acquired: u64,
    /// Samples committed (each once; a re-commit after an interrupted one
    /// is not counted again).
    pub stored: u64,
}

/// The tracker of every open event of a site.
pub struct Tracker {
    config: Arc<Config>,
    store: Arc<Store>,
    clock: Arc<Clock>,
    open: HashMap<i64, OpenEvent>,
    /// Open events that could not be resumed, and why.
    untracked: HashMap<i64, String>,
    /// Last leak-flag state per tank index, for rising edges.
    flags: HashMap<usize, bool>,
    edges: VecDeque<FlagEdge>,
    /// Writes not yet committed (waiting, or failed: database locked, disk
    /// full), oldest first: nothing acquired is dropped while the process
    /// lives.
    backlog: VecDeque<Arc<Write>>,
    /// Samples in `backlog`.
    held_samples: usize,
    /// Set after a failed commit: no attempt before then.
    retry_at: Option<Instant>,
    /// [`MAX_HELD_SAMPLES`], smaller in tests.
    max_held_samples: usize,
    health: Arc<StoreHealth>,
    counts: Counts,
}

impl Tracker {
    /// Resumes the open events stored in the database. One that cannot be
    /// resumed is kept, marked not tracked, with the reason in the log and
    /// in its row.
    pub async fn resume(
        config: Arc<Config>,
        store: Arc<Store>,
        clock: Arc<Clock>,
        health: Arc<StoreHealth>,
    ) -> StoreResult<Self> {
        let mut tracker = Self {
            config,
            store,
            clock,
            open: HashMap::new(),
            untracked: HashMap::new(),
            flags: HashMap::new(),
            edges: VecDeque::new(),
            backlog: VecDeque::new(),
            held_samples: 0,
            retry_at: None,
            max_held_samples: MAX_HELD_SAMPLES,
            health,
            counts: Counts::default(),
        };
        let (events, marked) = tracker
            .store
            .read(|r| Ok((r.events(true)?, r.tracking_errors()?)))
            .await?;
        for row in events {
            let config = Arc::clone(&tracker.config);
            let id = row.id;
            let tank = row.tank.clone();
            let rebuilt = tracker
                .store
                .read(move |r| rebuild(r, &config, &row).map(|e| e.map(|e| (row, e))))
                .await;
            let why = match rebuilt {
                Ok(Ok((row, (estimator, replayed)))) => {
                    info!(event = id, tank = %tank, "resumed open event ({} samples replayed)", replayed.len());
                    tracker.open.insert(id, OpenEvent { row, estimator });
                    if marked.contains_key(&id) {
                        tracker
                            .store
                            .write(Lane::Urgent, move |tx| tx.set_tracking_error(id, None))
                            .await?;
                    }
                    continue;
                }
                Ok(Err(why)) => why,
                Err(StoreError::Stopped) => return Err(StoreError::Stopped),
                Err(e) => format!("its stored history cannot be read: {e}"),
            };
            error!(
                event = id,
                tank = %tank,
                "open event {id} on {tank} cannot be resumed and is NOT TRACKED: {why}; it stays open, shown as not tracked, until it is closed (`leaktally leak close {id}`) or the daemon can resume it"
            );
            let text = why.clone();
            tracker
                .store
                .write(Lane::Urgent, move |tx| {
                    tx.set_tracking_error(id, Some(&text))
                })
                .await?;
            tracker.untracked.insert(id, why);
        }
        Ok(tracker)
    }

    /// How many events are open (tracked or not).
    pub fn open_events(&self) -> usize {
        self.open.len() + self.untracked.len()
    }

    /// Open events that are not tracked, and why.
    pub fn untracked(&self) -> &HashMap<i64, String> {
        &self.untracked
    }

    /// Whether the database is taking writes, shared for the web server.
    pub fn health(&self) -> Arc<StoreHealth> {
        Arc::clone(&self.health)
    }

    /// True while commits fail and acquired data waits in memory; the
    /// daemon then leaves its own housekeeping writes alone.
    pub fn store_failing(&self) -> bool {
        self.retry_at.is_some()
    }

    /// Samples acquired and stored so far.
    pub fn counts(&self) -> Counts {
        self.counts
    }

    /// What the tracker is doing, in words, for the heartbeat.
    pub fn activity(&self) -> String {
        match (self.retry_at.is_some(), self.backlog.len()) {
            (true, n) => format!("holding {n} poll cycle(s) the database has not taken"),
            (false, n) if n > 1 => format!("storing {n} held poll cycle(s)"),
            _ => "polling".into(),
        }
    }

    /// Feeds one poll cycle's samples to the open events and commits both.
    pub async fn on_batch(&mut self, batch: Vec<TankSample>) {
        self.take(batch);
        if self.retry_at.is_some_and(|at| Instant::now() < at) {
            self.bound_backlog();
            self.health.set_held(self.backlog.len(), self.held_samples);
            return;
        }
        self.flush().await;
        self.open_on_flags().await;
    }

    /// Feeds a batch to the estimators of its tanks and queues it, with the
    /// estimates, for the store; notes rising leak flags. Touches nothing
    /// but memory, so the daemon can drain acquisition with it at shutdown
    /// whatever the database does.
    pub fn take(&mut self, batch: Vec<TankSample>) {
        for sample in &batch {
            let Some(Some(flag)) = sample.leak_flag else {
                continue;
            };
            let was = self.flags.insert(sample.tank, flag);
            if was == Some(false) && flag {
                self.edges.push_back(FlagEdge {
                    tank: sample.tank_id.clone(),
                    at_ms: sample.at_ms,
                });
            }
        }
        let mut write = Write::default();
        for event in self.open.values_mut() {
            let estimates: Vec<Estimate> = batch
                .iter()
                .filter(|s| s.tank_id == event.row.tank)
                .filter_map(|s| event.estimator.push(s))
                .collect();
            if !estimates.is_empty() {
                write
                    .estimates
                    .push((event.row.id, event.row.revision, estimates));
            }
        }
        write.samples = batch;
        self.counts.acquired += write.samples.len() as u64;
        self.held_samples += write.samples.len();
        self.backlog.push_back(Arc::new(write));
        self.health.set_held(self.backlog.len(), self.held_samples);
    }

    /// At shutdown: commits what is held, retrying until `until` if the
    /// database takes nothing; returns how many samples are lost (0 when
    /// all is stored), which the log says too.
    pub async fn finish(&mut self, until: Instant) -> usize {
        loop {
            if self.retry_at.is_none_or(|at| Instant::now() >= at) {
                self.flush().await;
            }
            if self.backlog.is_empty() {
                return 0;
            }
            if Instant::now() >= until {
                error!(
                    "{} poll cycle(s), {} samples, could not be stored before the daemon had to stop, and are lost",
                    self.backlog.len(),
                    self.held_samples,
                );
                return self.held_samples;
            }
            let next = self
                .retry_at
                .unwrap_or_else(|| Instant::now() + Duration::from_millis(500))
                .min(until);
            tokio::time::sleep_until(next).await;
        }
    }

    /// Commits the backlog, oldest first, up to [`CYCLES_PER_COMMIT`] poll
    /// cycles a unit and [`COMMITS_PER_FLUSH`] units a call: after a long
    /// outage the catch-up spreads over the next cycles, and the daemon's
    /// loop keeps serving the pollers, the stop signal and the operators
    /// meanwhile.
    async fn flush(&mut self) {
        if self.backlog.is_empty() {
            return;
        }
        let held = self.backlog.len();
        for _ in 0..COMMITS_PER_FLUSH {
            // Shared, not copied: a poll cycle of a large site is thousands
            // of samples, and it stays in the backlog until it is committed.
            let chunk: Vec<Arc<Write>> = self
                .backlog
                .iter()
                .take(CYCLES_PER_COMMIT)
                .cloned()
                .collect();
            if chunk.is_empty() {
                break;
            }
            let committed = chunk.len();
            let result = self
                .store
                .write(Lane::Urgent, move |tx| {
                    for write in &chunk {
                        tx.insert_samples(&write.samples)?;
                        for (event, revision, e) in &write.estimates {
                            tx.insert_estimates(*event, *revision, e)?;
                        }
                    }
                    Ok(())
                })
                .await;
            if let Err(e) = result {
                self.on_write_failure(&e);
                return;
            }
            for _ in 0..committed {
                if let Some(w) = self.backlog.pop_front() {
                    self.held_samples -= w.samples.len();
                    self.counts.stored += w.samples.len() as u64;
                }
            }
        }
        if self.retry_at.take().is_some() {
            let since = self.health.snapshot().failing.map_or(0, |(ms, _)| ms);
            info!(
                "the database takes writes again after {:.1} s; storing {held} held poll cycle(s)",
                (self.clock.now_ms() - since) as f64 / 1000.0
            );
        }
        self.health.record_success();
        self.health.set_held(self.backlog.len(), self.held_samples);
    }

    fn on_write_failure(&mut self, e: &StoreError) {
        let why = WriteFailure::of(e);
        let first = self.retry_at.is_none();
        self.retry_at = Some(Instant::now() + RETRY_EVERY);
        self.health.record_failure(self.clock.now_ms(), why);
        self.bound_backlog();
        self.health.set_held(self.backlog.len(), self.held_samples);
        let attempts = self.health.snapshot().failed_attempts;
        let message = format!(
            "cannot store {} poll cycle(s) ({} samples) yet: {e}; {}; holding them in memory and retrying every {} s",
            self.backlog.len(),
            self.held_samples,
            why.describe(),
            RETRY_EVERY.as_secs()
        );
        if first || attempts.is_multiple_of(WARN_EVERY_ATTEMPTS) {
            warn!("{message}");
        } else {
            debug!("{message}");
        }
    }

    /// Keeps the held samples under [`MAX_HELD_SAMPLES`] by giving up the
    /// oldest samples of tanks with no open event. An open event's samples
    /// are its evidence and stay, however long the outage.
    fn bound_backlog(&mut self) {
        if self.held_samples <= self.max_held_samples {
            return;
        }
        let tracked: HashSet<&str> = self.open.values().map(|e| e.row.tank.as_str()).collect();
        let mut dropped = 0;
        for write in self.backlog.iter_mut() {
            if self.held_samples - dropped <= self.max_held_samples {
                break;
            }
            let w = Arc::make_mut(write);
            let before = w.samples.len();
            w.samples.retain(|s| tracked.contains(s.tank_id.as_str()));
            dropped += before - w.samples.len();
        }
        if dropped > 0 {
            self.held_samples -= dropped;
            self.health.add_dropped(dropped);
            error!(
                "the database has taken no writes for long enough that {dropped} held samples of tanks with no open event were given up to bound memory; event samples are all kept"
            );
        }
    }

    /// Opens an event on each tank whose leak flag rose, once every
    /// acquired sample is stored (so the event's history is complete). An
    /// edge seen while the database takes no writes waits until it does.
    async fn open_on_flags(&mut self) {
        while self.backlog.is_empty() && !self.store_failing() {
            let Some(edge) = self.edges.front().cloned() else {
                return;
            };
            let config = Arc::clone(&self.config);
            let opened = self
                .store
                .write(Lane::Urgent, move |tx| open_flagged(tx, &config, &edge))
                .await;
            match opened {
                Ok(Ok(event)) => {
                    let id = event.row.id;
                    info!(event = id, tank = %event.row.tank, "leak flag raised: opened event");
                    self.open.insert(id, *event);
                }
                Ok(Err(why)) => warn!("leak flag raised but no event opened: {why}"),
                Err(e) if WriteFailure::passes(&e) => {
                    self.on_write_failure(&e);
                    return;
                }
                Err(e) => warn!("leak flag raised but no event opened: {e}"),
            }
            self.edges.pop_front();
        }
    }

    /// Applies every pending operator action, each in a unit of its own.
    pub async fn on_actions(&mut self) -> StoreResult<()> {
        // Make sure every acquired sample is stored before an action reads
        // the history (back-dating, revisions). Until it is, actions wait
        // in their rows; none is refused for a locked or full disk.
        if self.retry_at.is_some_and(|at| Instant::now() < at) {
            return Ok(());
        }
        self.flush().await;
        if !self.backlog.is_empty() {
            return Ok(());
        }
        self.open_on_flags().await;
        let pending = self.store.read(|r| r.pending_actions()).await?;
        for action in pending {
            let context = Context {
                config: Arc::clone(&self.config),
                clock: Arc::clone(&self.clock),
                untracked: self.untracked.clone(),
            };
            let (id, kind, user, event) = (
                action.id,
                action.kind.clone(),
                action.os_user.clone(),
                action.event,
            );
            let handled = self
                .store
                .write(Lane::Urgent, move |tx| apply_action(tx, &context, action))
                .await;
            match handled {
                Ok(Handled::Done(done)) => {
                    match done.change {
                        Some(Change::Opened(event)) => {
                            self.untracked.remove(&event.row.id);
                            self.open.insert(event.row.id, *event);
                        }
                        Some(Change::Closed(id)) => {
                            self.open.remove(&id);
                            self.untracked.remove(&id);
                        }
                        None => {}
                    }
                    info!(action = id, user = %user, "{kind}: {}", done.text);
                }
                Ok(Handled::Refused(refusal)) => {
                    warn!(action = id, user = %user, "{kind} refused: {}", refusal.why);
                }
                Ok(Handled::Gone) => {}
                // A lock or a full disk: nothing of the action stays, and
                // it is tried again once writes go through.
                Err(e) if WriteFailure::passes(&e) => {
                    self.on_write_failure(&e);
                    return Ok(());
                }
                Err(StoreError::Stopped) => return Err(StoreError::Stopped),
                // Anything else would fail again: nothing of the action
                // stays, and the failure is its outcome.
                Err(e) => {
                    let text = format!("failed: {e}");
                    warn!(action = id, user = %user, "{kind} {text}");
                    let at = self.clock.now_ms();
                    let recorded = self
                        .store
                        .write(Lane::Urgent, move |tx| {
                            tx.finish_action(id, event, false, &text, at)
                        })
                        .await;
                    match recorded {
                        Ok(()) => {}
                        Err(e) if WriteFailure::passes(&e) => {
                            self.on_write_failure(&e);
                            return Ok(());
                        }
                        Err(e) => return Err(e),
                    }
                }
            }
        }
        Ok(())
    }
}

/// What applying an action needs from the tracker, owned, for the store's
/// thread.
struct Context {
    config: Arc<Config>,
    clock: Arc<Clock>,
    untracked: HashMap<i64, String>,
}

/// The tank of `tag` in the config, with its index and poll interval (ms).
fn tank_of<'c>(config: &'c Config, tag: &str) -> Option<(usize, &'c crate::config::Tank, i64)> {
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

/// Builds an estimator for an event and replays its stored samples; the
/// reason in words when it cannot.
fn rebuild(
    r: &Reader<'_>,
    config: &Config,
    row: &EventRow,
) -> StoreResult<Result<(Estimator, Vec<Estimate>), String>> {
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
    // From one gap limit before the start: the estimator interpolates the
    // level at the start from the samples either side of it.
    let samples = r.samples_between(&row.tank, row.start_ms - estimator.lookback_ms(), end)?;
    let estimates = samples
        .into_iter()
        .filter_map(|mut s| {
            s.tank = tank_index;
            estimator.push(&s)
        })
        .collect();
    Ok(Ok((estimator, estimates)))
}

/// Creates an event from `start_ms` and builds its estimator from the
/// stored history, storing that history's estimates.
fn create_and_build(
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
    let (estimator, estimates) = match rebuild(tx, config, &row)? {
        Ok(built) => built,
        Err(why) => return Ok(Err(why)),
    };
    tx.insert_estimates(id, row.revision, &estimates)?;
    Ok(Ok(OpenEvent { row, estimator }))
}

/// Opens the event of a raised leak flag, in the caller's unit.
fn open_flagged(
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
            edge.at_ms,
            "leak flag",
            params,
        )
        .map(|r| r.map(Box::new))
    })
}

/// Applies one pending action and records its outcome, in the caller's
/// unit: a refusal's writes are undone and the refusal recorded; an error
/// undoes everything (the unit fails).
fn apply_action(tx: &mut Tx<'_>, cx: &Context, action: ActionRow) -> StoreResult<Handled> {
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
                return refuse(None, format!("there is no tank {tank} in the config"));
            };
            let start = since_ms.map_or(requested, |s| cx.clock.from_wall(s));
            if start > now + 1000 {
                return refuse(
                    None,
                    "the leak cannot start in the future; check --since".into(),
                );
            }
            if let Err(why) = check_history(tx, &tank, start, now)? {
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
                crate::report::utc(start),
                if since_ms.is_some() {
                    " (back-dated)"
                } else {
                    ""
                },
                describe_params(&params),
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
            let (estimator, estimates) = match rebuild(tx, &cx.config, &row)? {
                Ok(built) => built,
                Err(why) => return refuse(Some(event), why),
            };
            let count = estimates.len();
            tx.insert_estimates(event, revision, &estimates)?;
            Ok(Ok(Done {
                event: Some(event),
                text: format!(
                    "revision {revision} of event {event}: {} -> {}; recomputed {count} estimates from the start",
                    describe_params(&before),
                    describe_params(&params)
                ),
                change: Some(Change::Opened(Box::new(OpenEvent { row, estimator }))),
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
            Ok(Ok(Done {
                event: Some(event),
                text: format!(
                    "closed event {event} at {}{}",
                    crate::report::utc(at),
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
fn check_history(tx: &Tx<'_>, tank: &str, start: i64, now: i64) -> StoreResult<Result<(), String>> {
    if now - start <= HISTORY_SLACK_MS || tx.good_level_near(tank, start, HISTORY_SLACK_MS)? {
        return Ok(Ok(()));
    }
    let earliest = tx.first_sample_ms(tank)?;
    Ok(Err(match earliest {
        Some(at) if at > start => format!(
            "the logged history of {tank} begins at {}, after the start asked for ({}); open it --since {} or later",
            crate::report::utc(at),
            crate::report::utc(start),
            jiff::Timestamp::from_millisecond(at)
                .map(|t| t.to_string())
                .unwrap_or_default()
        ),
        _ => format!(
            "there is no good level of {tank} logged within a minute of {}; choose a start the history covers",
            crate::report::utc(start)
        ),
    }))
}

fn not_open(event: i64) -> String {
    format!("event {event} is not open; `leaktally status` lists the open events")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::acquire::sample::Reading;
    use crate::clock::testing::SteppedWall;
    use crate::store::{self, records};

    /// A site of two upright tanks, T1 and T2, on one device.
    fn site() -> String {
        let mut site = String::from(
            "[site]\nname = \"Test\"\n[[device]]\nid = \"d1\"\naddress = \"127.0.0.1:1502\"\n",
        );
        for (address, tag) in ["T1", "T2"].iter().enumerate() {
            site += &format!(
                r#"[[tank]]
id = "{tag}"
device = "d1"
geometry = {{ shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }}
substance = {{ name = "diesel", density_kg_m3 = 840.0 }}
level = {{ register = "input", address = {address}, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }}
"#
            );
        }
        site
    }

    fn sample(tank: usize, at_ms: i64) -> TankSample {
        TankSample {
            tank,
            tank_id: format!("T{}", tank + 1),
            at_ms,
            level: Reading::good(4.0 - 0.001 * (at_ms % 100_000) as f64 / 1000.0),
            pressure: None,
            transfer: None,
            temperature: None,
            leak_flag: None,
        }
    }

    /// A draining level: 1 mm a second from 4 m, at `at_ms` since `t0`.
    fn draining(tank: usize, t0: i64, at_ms: i64) -> TankSample {
        let mut s = sample(tank, at_ms);
        s.level = Reading::good(4.0 - 0.001 * (at_ms - t0) as f64 / 1000.0);
        s
    }

    /// A scratch database with the two tanks registered, and the config.
    struct Fixture {
        dir: std::path::PathBuf,
        db: std::path::PathBuf,
        config: Arc<Config>,
    }

    impl Fixture {
        fn new(label: &str) -> Self {
            let dir = std::env::temp_dir()
                .join(format!("leaktally-tracker-{label}-{}", std::process::id()));
            let _ = std::fs::remove_dir_all(&dir);
            std::fs::create_dir_all(&dir).unwrap();
            let db = dir.join("t.db");
            let conn = store::open_read_write(&db).unwrap();
            records::register_tanks(&conn, ["T1", "T2"]).unwrap();
            let config =
                Arc::new(crate::config::parse(&site(), std::path::Path::new("site.toml")).unwrap());
            Self { dir, db, config }
        }

        fn conn(&self) -> rusqlite::Connection {
            store::open_read_write(&self.db).unwrap()
        }

        async fn tracker(&self, clock: Arc<Clock>) -> (Tracker, Arc<Store>) {
            let store = Arc::new(Store::open(&self.db).unwrap());
            let tracker = Tracker::resume(
                Arc::clone(&self.config),
                Arc::clone(&store),
                clock,
                Arc::new(StoreHealth::default()),
            )
            .await
            .unwrap();
            (tracker, store)
        }

        fn request(&self, request: serde_json::Value, at_ms: i64) -> i64 {
            let conn = self.conn();
            let kind = request["kind"].as_str().unwrap().to_owned();
            let event = request["event"].as_i64();
            let id = records::request_action(
                &conn,
                &kind,
                event,
                &request,
                &("op".to_owned(), "cr1".to_owned()),
            )
            .unwrap();
            conn.execute(
                "UPDATE actions SET requested_at_ms = ?2 WHERE id = ?1",
                rusqlite::params![id, at_ms],
            )
            .unwrap();
            id
        }
    }

    impl Drop for Fixture {
        fn drop(&mut self) {
            if !std::thread::panicking() {
                let _ = std::fs::remove_dir_all(&self.dir);
            }
        }
    }

    async fn close(tracker: Tracker, store: Arc<Store>) {
        drop(tracker);
        if let Ok(store) = Arc::try_unwrap(store) {
            assert!(store.close(Duration::from_secs(10)).await);
        }
    }

    fn open_request(tank: &str, diameter_m: Option<f64>) -> serde_json::Value {
        serde_json::json!({"kind": "open", "tank": tank, "hole_diameter_m": diameter_m,
            "hole_height_m": 0.3, "cd": 0.61, "since_ms": null, "note": null})
    }

    /// A write lock held by another connection: commits fail and are held,
    /// the samples of the tank with no event are given up past the bound
    /// while every event sample is kept, and all that is held is stored
    /// once the lock goes.
    #[tokio::test(flavor = "multi_thread")]
    async fn held_writes_survive_a_lock_and_only_untracked_samples_are_given_up() {
        let fx = Fixture::new("held");
        let start = store::now_ms() - 60_000;
        {
            let params = LeakParams {
                hole_diameter_m: Some(0.02),
                hole_height_m: 0.3,
                cd: 0.61,
                density_kg_m3: None,
                ..LeakParams::default()
            };
            records::create_event(&fx.conn(), "T1", start, start, "operator", &params).unwrap();
        }
        let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
        assert_eq!(tracker.open_events(), 1);
        tracker.max_held_samples = 10;

        let holder = rusqlite::Connection::open(&fx.db).unwrap();
        holder.execute_batch("BEGIN IMMEDIATE").unwrap();
        for i in 0..10 {
            let at = start + 1000 * (i + 1);
            tracker.on_batch(vec![sample(0, at), sample(1, at)]).await;
        }
        assert!(tracker.store_failing());
        let h = tracker.health().snapshot();
        assert_eq!(h.failing.map(|(_, why)| why), Some(WriteFailure::Locked));
        assert_eq!(h.held_cycles, 10);
        // 20 acquired, bound 10: the 10 oldest T2 samples are given up
        // (the bound is checked per cycle, so it gives up what it must).
        assert_eq!(h.held_samples + h.dropped_samples, 20);
        assert!(h.held_samples <= 11, "{h:?}");
        assert!(h.dropped_samples >= 9, "{h:?}");

        holder.execute_batch("COMMIT").unwrap();
        assert_eq!(
            tracker
                .finish(Instant::now() + Duration::from_secs(20))
                .await,
            0
        );
        assert!(!tracker.store_failing());
        assert_eq!(tracker.health().snapshot().failing, None);
        let conn = fx.conn();
        let n = |tag: &str| records::sample_count(&conn, tag).unwrap().0;
        assert_eq!(n("T1"), 10, "every event sample is stored");
        assert_eq!(n("T2") as u64, 10 - h.dropped_samples);
        close(tracker, store).await;
    }

    /// Operator actions made while another program holds the write lock
    /// wait, leave nothing behind, and are applied exactly once when the
    /// lock goes: an open makes one event, a close closes it.
    #[tokio::test(flavor = "multi_thread")]
    async fn actions_during_a_lock_are_applied_once_afterwards() {
        let fx = Fixture::new("lock");
        fx.request(open_request("T2", Some(0.02)), store::now_ms());
        let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;

        let holder = rusqlite::Connection::open(&fx.db).unwrap();
        holder.execute_batch("BEGIN IMMEDIATE").unwrap();
        tracker.on_actions().await.unwrap();
        assert_eq!(tracker.open_events(), 0);
        assert!(tracker.store_failing());
        // Paced: a second try inside the retry interval does not touch the
        // database at all.
        tracker.on_actions().await.unwrap();
        holder.execute_batch("COMMIT").unwrap();
        tracker.retry_at = Some(Instant::now());
        tracker.on_actions().await.unwrap();
        tracker.on_actions().await.unwrap();
        assert_eq!(tracker.open_events(), 1);
        let conn = fx.conn();
        let events = records::events(&conn, false).unwrap();
        let pending = records::pending_actions(&conn).unwrap();
        assert_eq!(events.len(), 1, "exactly one event: {events:?}");
        assert!(pending.is_empty(), "{pending:?}");
        close(tracker, store).await;
    }

    /// A unit that fails after its first write leaves nothing of itself:
    /// an open that fails with a passing error (a lock) after creating its
    /// event row has no event row, waits, and is applied exactly once
    /// later; one that fails for good is recorded as failed, with no event
    /// row; a revise that fails after bumping the revision leaves the
    /// revision as it was, in the file and in memory; a poll cycle's commit
    /// that fails after its first write stores none of it, then all of it
    /// once.
    #[tokio::test(flavor = "multi_thread")]
    async fn a_failure_after_the_first_write_leaves_nothing_half_applied() {
        let fx = Fixture::new("inject");
        let now = store::now_ms();
        let conn = fx.conn();
        for i in 0..5 {
            records::insert_samples(&conn, &[sample(0, now - 5000 + 1000 * i)]).unwrap();
        }
        let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;

        // A lock after the first write (the event row).
        let first = fx.request(open_request("T1", Some(0.02)), now);
        store
            .faults
            .fail_next_unit_after(1, rusqlite::ffi::SQLITE_BUSY);
        tracker.on_actions().await.unwrap();
        assert!(tracker.store_failing());
        assert_eq!(tracker.open_events(), 0);
        assert!(
            records::events(&conn, false).unwrap().is_empty(),
            "no half-made event"
        );
        assert_eq!(
            records::action(&conn, first).unwrap().unwrap().state,
            "pending"
        );
        tracker.retry_at = Some(Instant::now());
        tracker.on_actions().await.unwrap();
        let events = records::events(&conn, false).unwrap();
        assert_eq!(events.len(), 1, "{events:?}");
        assert_eq!(
            records::action(&conn, first).unwrap().unwrap().state,
            "done"
        );
        let id = events[0].id;

        // An I/O error after the first write: recorded as failed.
        let second = fx.request(open_request("T2", Some(0.02)), now);
        store
            .faults
            .fail_next_unit_after(1, rusqlite::ffi::SQLITE_IOERR);
        tracker.on_actions().await.unwrap();
        let action = records::action(&conn, second).unwrap().unwrap();
        assert_eq!(action.state, "refused");
        assert!(
            action.outcome.as_deref().unwrap().starts_with("failed:"),
            "{action:?}"
        );
        assert_eq!(records::events(&conn, false).unwrap().len(), 1);
        assert!(records::open_event_of_tank(&conn, "T2").unwrap().is_none());
        assert_eq!(tracker.open_events(), 1);

        // A revise failing after the revision's bump.
        let revise = serde_json::json!({"kind": "revise", "event": id, "hole_diameter_m": 0.03,
            "unknown_diameter": false, "hole_height_m": null, "cd": null, "density_kg_m3": null, "note": null});
        let third = fx.request(revise, now);
        store
            .faults
            .fail_next_unit_after(1, rusqlite::ffi::SQLITE_IOERR);
        tracker.on_actions().await.unwrap();
        assert_eq!(records::event(&conn, id).unwrap().unwrap().revision, 1);
        assert_eq!(tracker.open[&id].row.revision, 1);
        assert_eq!(
            records::action(&conn, third).unwrap().unwrap().state,
            "refused"
        );

        // A poll cycle's commit failing after its first write.
        store
            .faults
            .fail_next_unit_after(1, rusqlite::ffi::SQLITE_BUSY);
        tracker
            .on_batch(vec![sample(0, now + 1000), sample(1, now + 1000)])
            .await;
        assert!(tracker.store_failing());
        assert_eq!(
            records::sample_count(&conn, "T1").unwrap().0,
            5,
            "none of the cycle"
        );
        tracker.retry_at = Some(Instant::now());
        tracker.on_batch(vec![sample(0, now + 2000)]).await;
        assert!(!tracker.store_failing());
        assert_eq!(records::sample_count(&conn, "T1").unwrap(), (7, 0));
        let estimates = records::estimates_of(&conn, id, 1).unwrap();
        assert!(estimates.windows(2).all(|w| w[0].at_ms < w[1].at_ms));
        assert_eq!(
            tracker.counts(),
            Counts {
                acquired: 3,
                stored: 3
            }
        );
        close(tracker, store).await;
    }

    /// Requests that waited while no daemon ran are applied with their
    /// own time: an open made 45 s ago starts then (the stretch to the
    /// first sample after it is bridged and marked), and a close made 10 s
    /// ago closes then, dropping the estimates of the samples after it.
    #[tokio::test(flavor = "multi_thread")]
    async fn requests_made_while_no_daemon_ran_keep_their_time() {
        let fx = Fixture::new("queued");
        let now = store::now_ms();
        let t0 = now - 110_000;
        let conn = fx.conn();
        // History up to 50 s ago (the daemon died then), none after.
        let history: Vec<TankSample> = (0..60).map(|i| draining(0, t0, t0 + 1000 * i)).collect();
        records::insert_samples(&conn, &history).unwrap();
        let asked_at = now - 45_000;
        let opened = fx.request(open_request("T1", Some(0.02)), asked_at);
        let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
        tracker.on_actions().await.unwrap();
        let action = records::action(&conn, opened).unwrap().unwrap();
        assert_eq!(action.state, "done", "{action:?}");
        let text = action.outcome.unwrap();
        assert!(text.contains("with the time of the request"), "{text}");
        let event = records::open_event_of_tank(&conn, "T1").unwrap().unwrap();
        assert!(
            (event.start_ms - asked_at).abs() <= 1,
            "{} vs {asked_at}",
            event.start_ms
        );
        assert_eq!(event.opened_at_ms, event.start_ms);

        // The next daemon's samples, from 20 s ago.
        for i in 0..15 {
            let at = now - 20_000 + 1000 * i;
            tracker.on_batch(vec![draining(0, t0, at)]).await;
        }
        let live = records::estimates_of(&conn, event.id, 1).unwrap();
        assert_eq!(live.len(), 15);
        assert!(
            live[0].after_gap,
            "the 25 s until the first sample is a marked gap"
        );
        assert!(live[0].released_best_kg > 0.0);

        let close_at = now - 15_500;
        let closed = fx.request(
            serde_json::json!({"kind": "close", "event": event.id, "note": null}),
            close_at,
        );
        tracker.on_actions().await.unwrap();
        assert_eq!(
            records::action(&conn, closed).unwrap().unwrap().state,
            "done"
        );
        let row = records::event(&conn, event.id).unwrap().unwrap();
        assert!((row.closed_at_ms.unwrap() - close_at).abs() <= 1);
        let kept = records::estimates_of(&conn, event.id, 1).unwrap();
        assert_eq!(kept.len(), 5, "estimates at or before the close");
        assert!(kept.iter().all(|e| e.at_ms <= row.closed_at_ms.unwrap()));
        assert_eq!(tracker.open_events(), 0);
        close(tracker, store).await;
    }

    /// An open event whose tank left the config is kept, open and marked
    /// not tracked with the reason; a revise is refused with it; a close
    /// closes it and clears the mark.
    #[tokio::test(flavor = "multi_thread")]
    async fn an_event_that_cannot_be_resumed_is_kept_visibly_not_tracked() {
        let fx = Fixture::new("untracked");
        let now = store::now_ms();
        let conn = fx.conn();
        records::register_tanks(&conn, ["T9"]).unwrap();
        let params = LeakParams {
            hole_diameter_m: Some(0.02),
            hole_height_m: 0.3,
            cd: 0.61,
            density_kg_m3: None,
            ..LeakParams::default()
        };
        let id = records::create_event(&conn, "T9", now - 1000, now - 1000, "operator", &params)
            .unwrap();
        let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
        assert_eq!(tracker.open_events(), 1);
        assert!(tracker.untracked()[&id].contains("not in the config"));
        let marked = records::tracking_errors(&conn).unwrap();
        assert!(
            marked[&id].contains("tank T9 is not in the config"),
            "{marked:?}"
        );
        assert!(
            records::event(&conn, id)
                .unwrap()
                .unwrap()
                .closed_at_ms
                .is_none()
        );

        let revise = serde_json::json!({"kind": "revise", "event": id, "hole_diameter_m": 0.03,
            "unknown_diameter": false, "hole_height_m": null, "cd": null, "density_kg_m3": null, "note": null});
        let refused = fx.request(revise, now);
        let closed = fx.request(
            serde_json::json!({"kind": "close", "event": id, "note": null}),
            now,
        );
        tracker.on_actions().await.unwrap();
        let refused = records::action(&conn, refused).unwrap().unwrap();
        assert_eq!(refused.state, "refused");
        assert!(refused.outcome.unwrap().contains("is not tracked"));
        assert_eq!(
            records::action(&conn, closed).unwrap().unwrap().state,
            "done"
        );
        assert!(
            records::event(&conn, id)
                .unwrap()
                .unwrap()
                .closed_at_ms
                .is_some()
        );
        assert!(records::tracking_errors(&conn).unwrap().is_empty());
        assert_eq!(tracker.open_events(), 0);
        close(tracker, store).await;
    }

    /// The wall clock steps back an hour and forward an hour in the middle
    /// of an event, with the pollers' samples timed by the daemon's clock:
    /// every sample is stored in order, one second apart, and the running
    /// total goes up by about the same each second: it neither freezes
    /// (samples older than the last, skipped) nor jumps (a gap of an hour,
    /// bridged).
    #[tokio::test(start_paused = true)]
    async fn a_clock_stepped_back_and_forward_mid_event_neither_freezes_nor_jumps_the_total() {
        let fx = Fixture::new("clock");
        let wall = SteppedWall::new(store::now_ms());
        let clock = Arc::new(Clock::anchored(wall.source(), None));
        let t0 = clock.now_ms();
        let (mut tracker, store) = fx.tracker(Arc::clone(&clock)).await;
        for _ in 0..5 {
            let at = clock.now_ms();
            tracker.on_batch(vec![draining(0, t0, at)]).await;
            tokio::time::sleep(Duration::from_secs(1)).await;
        }
        // No hole given: the total follows the level balance alone, so a
        // jump or a freeze could only come from the clock.
        fx.request(open_request("T1", None), wall.now_ms() - 3000);
        tracker.on_actions().await.unwrap();
        let id = records::open_event_of_tank(&fx.conn(), "T1")
            .unwrap()
            .unwrap()
            .id;
        let mut steps = Vec::new();
        for second in 0..60 {
            match second {
                20 => wall.step(-3_600_000),
                40 => wall.step(3_600_000),
                _ => {}
            }
            steps.extend(clock.check(tracker.open_events() == 0));
            let at = clock.now_ms();
            tracker.on_batch(vec![draining(0, t0, at)]).await;
            tokio::time::sleep(Duration::from_secs(1)).await;
        }
        assert_eq!(steps.len(), 2, "{steps:?}");
        assert!(
            steps
                .iter()
                .all(|s| s.kind == crate::clock::StepKind::WallStep)
        );
        let conn = fx.conn();
        let stored = records::samples_between(&conn, "T1", 0, i64::MAX).unwrap();
        assert_eq!(stored.len(), 65, "every sample stored");
        // A second apart as the test slept, give or take what the
        // database's real time let the paused clock move on.
        assert!(
            stored
                .windows(2)
                .all(|w| (1000..1600).contains(&(w[1].at_ms - w[0].at_ms))),
            "in order, about a second apart: {:?}",
            stored
                .windows(2)
                .map(|w| w[1].at_ms - w[0].at_ms)
                .collect::<Vec<_>>()
        );
        let estimates = records::estimates_of(&conn, id, 1).unwrap();
        assert!(estimates.len() >= 60, "{} estimates", estimates.len());
        assert!(estimates.iter().all(|e| !e.after_gap), "no gap bridged");
        // The release per second of time between estimates: the level
        // falls steadily, so it barely changes.
        let rates: Vec<f64> = estimates
            .windows(2)
            .map(|w| {
                (w[1].released_best_kg - w[0].released_best_kg) * 1000.0
                    / (w[1].at_ms - w[0].at_ms) as f64
            })
            .collect();
        let (lo, hi) = rates
            .iter()
            .fold((f64::MAX, f64::MIN), |(lo, hi), &r| (lo.min(r), hi.max(r)));
        assert!(lo > 0.0, "frozen: a stretch with no release ({lo})");
        assert!(hi < 1.05 * lo, "a jump: from {lo} to {hi} kg/s");
        close(tracker, store).await;
    }
}
