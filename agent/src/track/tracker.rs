//! The tracker: open events, operator actions, and what goes to the store.
//!
//! It owns one [`Estimator`] per open event. Every batch of samples from
//! acquisition is fed to the estimators of its tanks, and the samples and
//! the estimates they produced are committed in one transaction, so the two
//! can never disagree after a crash. Operator actions arrive as rows in the
//! store; the tracker applies them in order and records the outcome.
//!
//! On start it resumes every open event by replaying the event's stored
//! samples through a fresh estimator: the estimator is deterministic, so
//! this rebuilds exactly the state before the restart, with no double
//! counting, and the gap while the agent was down is bridged by the forecast
//! at the next sample.

use crate::acquire::sample::TankSample;
use crate::config::Config;
use crate::store::health::{StoreHealth, WriteFailure};
use crate::store::{self, EventRow, Store, StoreError, StoreResult};
use crate::track::estimator::{Estimate, Estimator, LeakParams};
use serde::{Deserialize, Serialize};
use std::collections::{HashMap, HashSet, VecDeque};
use std::sync::Arc;
use std::time::Duration;
use tokio::time::Instant;
use tracing::{debug, error, info, warn};

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
        /// Back-dated start, UTC ms; now if absent.
        since_ms: Option<i64>,
        note: Option<String>,
    },
    Revise {
        event: i64,
        hole_diameter_m: Option<f64>,
        /// Forget the hole diameter (back to the fitted hole).
        #[serde(default)]
        unknown_diameter: bool,
        hole_height_m: Option<f64>,
        cd: Option<f64>,
        #[serde(default)]
        cd_range: Option<(f64, f64)>,
        density_kg_m3: Option<f64>,
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

/// How far after a back-dated start the first logged sample may be.
const HISTORY_SLACK_MS: i64 = 60_000;

/// How long after a failed commit the next one is tried. Each attempt may
/// wait out the writer's busy timeout, and the daemon's loop waits with it,
/// so attempts are spaced to let the loop drain acquisition in between.
const RETRY_EVERY: Duration = Duration::from_secs(2);
/// Poll cycles committed in one transaction, and transactions in one
/// flush, when catching up on held cycles.
const CYCLES_PER_COMMIT: usize = 100;
const COMMITS_PER_FLUSH: usize = 5;
/// How long a stopping daemon keeps trying to store what it holds; well
/// inside systemd's default 90 s stop timeout.
const FINISH_WITHIN: Duration = Duration::from_secs(20);
/// Failed attempts between repeated warnings in the log (about a minute).
const WARN_EVERY_ATTEMPTS: u64 = 30;
/// Samples held in memory, while the database takes no writes, before the
/// oldest samples of tanks with no open event are given up: about half an
/// hour of a 1,000-tank site at 1 s, some 300 MB. Event samples and
/// estimates are never given up.
const MAX_HELD_SAMPLES: usize = 2_000_000;

/// What an applied action changes in memory once its transaction commits.
enum Change {
    /// An event opened, or revised (its new state replaces the old).
    Opened(Box<OpenEvent>),
    Closed(i64),
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

/// The tracker of every open event of a site.
pub struct Tracker {
    config: Arc<Config>,
    store: Arc<Store>,
    open: HashMap<i64, OpenEvent>,
    /// Last leak-flag state per tank index, for rising edges.
    flags: HashMap<usize, bool>,
    /// Writes that failed (database locked, disk full), retried first next
    /// time: nothing acquired is dropped while the process lives.
    backlog: VecDeque<Arc<Write>>,
    /// Samples in `backlog`.
    held_samples: usize,
    /// Set after a failed commit: no attempt before then.
    retry_at: Option<Instant>,
    /// [`MAX_HELD_SAMPLES`], smaller in tests.
    max_held_samples: usize,
    health: Arc<StoreHealth>,
}

impl Tracker {
    /// Resumes the open events stored in the database.
    pub async fn resume(config: Arc<Config>, store: Arc<Store>) -> StoreResult<Self> {
        let mut tracker = Self {
            config,
            store,
            open: HashMap::new(),
            flags: HashMap::new(),
            backlog: VecDeque::new(),
            held_samples: 0,
            retry_at: None,
            max_held_samples: MAX_HELD_SAMPLES,
            health: Arc::new(StoreHealth::default()),
        };
        let events = tracker.store.call(|c| store::events(c, true)).await?;
        for row in events {
            match tracker.rebuild(&row).await {
                Ok((estimator, replayed)) => {
                    info!(event = row.id, tank = %row.tank, "resumed open event ({} samples replayed)", replayed.len());
                    tracker.open.insert(row.id, OpenEvent { row, estimator });
                }
                Err(e) => warn!(event = row.id, "cannot resume event: {e}"),
            }
        }
        Ok(tracker)
    }

    /// How many events are open.
    pub fn open_events(&self) -> usize {
        self.open.len()
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

    /// Builds an estimator for an event and replays its stored samples.
    async fn rebuild(&self, row: &EventRow) -> StoreResult<(Estimator, Vec<Estimate>)> {
        let (tank_index, tank) = self
            .config
            .tanks
            .iter()
            .enumerate()
            .find(|(_, t)| t.id == row.tank)
            .ok_or_else(|| {
                StoreError::Refused(format!("tank {} is not in the config", row.tank))
            })?;
        let interval = self.config.devices[tank.device].poll_interval.as_millis() as i64;
        let mut estimator = Estimator::new(tank, row.params, row.start_ms, interval)
            .map_err(|e| StoreError::Refused(e.to_string()))?;
        // From one gap limit before the start: the estimator interpolates
        // the level at the start from the samples either side of it.
        let (tag, from) = (row.tank.clone(), row.start_ms - estimator.lookback_ms());
        let end = row.closed_at_ms.unwrap_or(i64::MAX);
        let samples = self
            .store
            .call(move |c| store::samples_between(c, &tag, from, end))
            .await?;
        let estimates = samples
            .into_iter()
            .filter_map(|mut s| {
                s.tank = tank_index;
                estimator.push(&s)
            })
            .collect();
        Ok((estimator, estimates))
    }

    /// Feeds one poll cycle's samples to the open events and commits both.
    pub async fn on_batch(&mut self, batch: Vec<TankSample>) {
        self.open_on_flags(&batch).await;
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
        self.held_samples += write.samples.len();
        self.backlog.push_back(Arc::new(write));
        if self.retry_at.is_some_and(|at| Instant::now() < at) {
            self.bound_backlog();
            self.health.set_held(self.backlog.len(), self.held_samples);
            return;
        }
        self.flush().await;
    }

    /// At shutdown: commits what is held, retrying for up to
    /// [`FINISH_WITHIN`] if the database takes nothing; returns how many
    /// samples are lost (0 when all is stored), which the log says too.
    pub async fn finish(&mut self) -> usize {
        let deadline = Instant::now() + FINISH_WITHIN;
        loop {
            self.flush().await;
            if self.backlog.is_empty() {
                return 0;
            }
            if Instant::now() >= deadline {
                error!(
                    "{} poll cycle(s), {} samples, could not be stored within {} s of stopping and are lost",
                    self.backlog.len(),
                    self.held_samples,
                    FINISH_WITHIN.as_secs()
                );
                return self.held_samples;
            }
            if self.retry_at.is_some() {
                tokio::time::sleep(Duration::from_millis(500)).await;
            }
        }
    }

    /// Commits the backlog, oldest first, up to [`CYCLES_PER_COMMIT`] poll
    /// cycles a transaction and [`COMMITS_PER_FLUSH`] transactions a call:
    /// after a long outage the catch-up spreads over the next cycles, and
    /// the daemon's loop keeps serving the pollers, the stop signal and the
    /// operators meanwhile.
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
                .call(move |c| {
                    let tx = c.transaction()?;
                    for write in &chunk {
                        store::insert_samples(&tx, &write.samples)?;
                        for (event, revision, e) in &write.estimates {
                            store::insert_estimates(&tx, *event, *revision, e)?;
                        }
                    }
                    tx.commit()?;
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
                }
            }
        }
        if self.retry_at.take().is_some() {
            let since = self.health.snapshot().failing.map_or(0, |(ms, _)| ms);
            info!(
                "the database takes writes again after {:.1} s; storing {held} held poll cycle(s)",
                (store::now_ms() - since) as f64 / 1000.0
            );
        }
        self.health.record_success();
        self.health.set_held(self.backlog.len(), self.held_samples);
    }

    fn on_write_failure(&mut self, e: &StoreError) {
        let why = WriteFailure::of(e);
        let first = self.retry_at.is_none();
        self.retry_at = Some(Instant::now() + RETRY_EVERY);
        self.health.record_failure(store::now_ms(), why);
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

    /// Opens an event on each tank whose leak flag has just risen. While
    /// the database takes no writes the flags are not looked at, so an edge
    /// in that time is still an edge when writes go through again.
    async fn open_on_flags(&mut self, batch: &[TankSample]) {
        if self.store_failing() {
            return;
        }
        for sample in batch {
            let Some(Some(flag)) = sample.leak_flag else {
                continue;
            };
            let was = self.flags.insert(sample.tank, flag);
            if was != Some(false) || !flag {
                continue;
            }
            if self.open.values().any(|e| e.row.tank == sample.tank_id) {
                continue;
            }
            let params = LeakParams::default();
            let opened = self
                .open_flagged(&sample.tank_id, sample.at_ms, params)
                .await;
            match opened {
                Ok(event) => {
                    let id = event.row.id;
                    info!(event = id, tank = %sample.tank_id, "leak flag raised: opened event");
                    self.open.insert(id, event);
                }
                Err(e) if WriteFailure::passes(&e) => {
                    // Not seen yet: the edge is taken again once writes go
                    // through.
                    self.flags.insert(sample.tank, false);
                    self.on_write_failure(&e);
                    return;
                }
                Err(e) => {
                    warn!(tank = %sample.tank_id, "leak flag raised but no event opened: {e}")
                }
            }
        }
    }

    /// Refuses a start that the logged history does not cover: the first
    /// sample after it must come within `HISTORY_SLACK_MS`, or the total
    /// would rest on a guess of what flowed before the record begins.
    async fn check_history(&self, tank: &str, start: i64, now: i64) -> StoreResult<()> {
        if now - start <= HISTORY_SLACK_MS {
            return Ok(());
        }
        let tag = tank.to_owned();
        let first = self
            .store
            .call(move |c| store::samples_between(c, &tag, start, start + HISTORY_SLACK_MS))
            .await?;
        if first.iter().any(|s| s.level.is_good()) {
            return Ok(());
        }
        let tag = tank.to_owned();
        let earliest = self
            .store
            .call(move |c| store::first_sample_ms(c, &tag))
            .await?;
        Err(StoreError::Refused(match earliest {
            Some(at) if at > start => format!(
                "the logged history of {tank} begins at {}, after the start asked for ({}); open it --since {} or later",
                crate::report::utc(at),
                crate::report::utc(start),
                jiff::Timestamp::from_millisecond(at)
                    .map(|t| t.to_string())
                    .unwrap_or_default()
            ),
            _ => format!(
                "there is no good level of {tank} logged within a minute after {}; choose a start the history covers",
                crate::report::utc(start)
            ),
        }))
    }

    /// Creates an event, builds its estimator from the stored history since
    /// `start_ms`, and logs the estimates of that history.
    async fn open_event(
        &self,
        tank: &str,
        opened_at_ms: i64,
        start_ms: i64,
        source: &'static str,
        params: LeakParams,
    ) -> StoreResult<OpenEvent> {
        let t = self
            .config
            .tanks
            .iter()
            .find(|t| t.id == tank)
            .ok_or_else(|| StoreError::Refused(format!("there is no tank {tank} in the config")))?;
        Estimator::new(t, params, start_ms, 1000)
            .map_err(|e| StoreError::Refused(e.to_string()))?;
        let tag = tank.to_owned();
        let id = self
            .store
            .call(move |c| store::create_event(c, &tag, opened_at_ms, start_ms, source, &params))
            .await?;
        let row = self
            .store
            .call(move |c| store::event(c, id))
            .await?
            .ok_or_else(|| StoreError::Corrupt("the new event vanished".into()))?;
        let (estimator, estimates) = self.rebuild(&row).await?;
        let revision = row.revision;
        self.store
            .call(move |c| store::insert_estimates(c, id, revision, &estimates))
            .await?;
        Ok(OpenEvent { row, estimator })
    }

    /// Opens an event for a raised leak flag, in a transaction of its own.
    async fn open_flagged(
        &self,
        tank: &str,
        at_ms: i64,
        params: LeakParams,
    ) -> StoreResult<OpenEvent> {
        self.begin().await?;
        match self
            .open_event(tank, at_ms, at_ms, "leak flag", params)
            .await
        {
            Ok(event) => self.commit().await.map(|()| event),
            Err(e) => {
                self.rollback().await;
                Err(e)
            }
        }
    }

    /// Starts a write transaction on the daemon's connection. The daemon's
    /// loop sends nothing else to the store until it ends, so every call in
    /// between belongs to it: an action's writes commit together or not at
    /// all, and the in-memory state changes only after the commit.
    async fn begin(&self) -> StoreResult<()> {
        self.store
            .call(|c| Ok(c.execute_batch("BEGIN IMMEDIATE")?))
            .await
    }

    async fn commit(&self) -> StoreResult<()> {
        let committed = self.store.call(|c| Ok(c.execute_batch("COMMIT")?)).await;
        if committed.is_err() {
            // A failed COMMIT (busy, full) may leave the transaction open.
            self.rollback().await;
        }
        committed
    }

    async fn rollback(&self) {
        let _ = self
            .store
            .call(|c| {
                if !c.is_autocommit() {
                    c.execute_batch("ROLLBACK")?;
                }
                Ok(())
            })
            .await;
    }

    /// Applies every pending operator action.
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
        let pending = self.store.call(|c| store::pending_actions(c)).await?;
        for action in pending {
            // The action's writes and its outcome commit together; on a
            // locked or full database nothing of it stays, in the file or
            // in memory, and it is tried again once writes go through.
            if let Err(e) = self.begin().await {
                self.on_write_failure(&e);
                return Ok(());
            }
            let outcome = match serde_json::from_value::<Request>(action.request.clone()) {
                Ok(request) => self.apply(request).await,
                Err(e) => Err(StoreError::Refused(format!(
                    "the request is not understood: {e}"
                ))),
            };
            let (event, done, text, change) = match outcome {
                Ok((event, text, change)) => (event, true, text, change),
                Err(StoreError::Refused(why)) => (action.event, false, why, None),
                Err(e) if WriteFailure::passes(&e) => {
                    self.rollback().await;
                    self.on_write_failure(&e);
                    return Ok(());
                }
                Err(e) => (action.event, false, format!("failed: {e}"), None),
            };
            let id = action.id;
            let finished = self
                .store
                .call(move |c| store::finish_action(c, id, event, done, &text).map(|()| text))
                .await;
            let committed = match finished {
                Ok(text) => self.commit().await.map(|()| text),
                Err(e) => {
                    self.rollback().await;
                    Err(e)
                }
            };
            let text = match committed {
                Ok(text) => text,
                Err(e) if WriteFailure::passes(&e) => {
                    self.on_write_failure(&e);
                    return Ok(());
                }
                Err(e) => return Err(e),
            };
            match change {
                Some(Change::Opened(event)) => {
                    self.open.insert(event.row.id, *event);
                }
                Some(Change::Closed(id)) => {
                    self.open.remove(&id);
                }
                None => {}
            }
            if done {
                info!(action = action.id, user = %action.os_user, "{}: {text}", action.kind);
            } else {
                warn!(action = action.id, user = %action.os_user, "{} refused: {text}", action.kind);
            }
        }
        Ok(())
    }

    /// Applies one request inside the caller's transaction; returns the
    /// event it concerns, what changed in words, and the change to make in
    /// memory once the transaction commits.
    async fn apply(&self, request: Request) -> StoreResult<(Option<i64>, String, Option<Change>)> {
        let now = store::now_ms();
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
                if let Some(e) = self.open.values().find(|e| e.row.tank == tank) {
                    return Err(StoreError::Refused(format!(
                        "tank {tank} already has open event {}; revise or close it first",
                        e.row.id
                    )));
                }
                let start = since_ms.unwrap_or(now);
                if start > now + 1000 {
                    return Err(StoreError::Refused(
                        "the leak cannot start in the future; check --since".into(),
                    ));
                }
                self.check_history(&tank, start, now).await?;
                let params = LeakParams {
                    hole_diameter_m,
                    hole_height_m: hole_height_m.unwrap_or(0.0),
                    cd: cd.unwrap_or(1.0),
                    cd_range,
                    density_kg_m3: None,
                    hole_height_assumed: hole_height_m.is_none(),
                    cd_assumed: cd.is_none(),
                };
                let event = self
                    .open_event(&tank, now, start, "operator", params)
                    .await?;
                let id = event.row.id;
                let used = event.estimator.last_sample_ms().map_or(0, |_| 1);
                Ok((
                    Some(id),
                    format!(
                        "opened event {id} on {tank} from {}{}; {}",
                        crate::report::utc(start),
                        if since_ms.is_some() {
                            " (back-dated)"
                        } else {
                            ""
                        },
                        describe_params(&params)
                    ) + if used == 0 {
                        "; no stored sample yet"
                    } else {
                        ""
                    },
                    Some(Change::Opened(Box::new(event))),
                ))
            }
            Request::Revise {
                event,
                hole_diameter_m,
                unknown_diameter,
                hole_height_m,
                cd,
                cd_range,
                density_kg_m3,
                note: _,
            } => {
                let open = self.open.get(&event).ok_or_else(|| not_open(event))?;
                let before = open.row.params;
                let mut params = before;
                if unknown_diameter {
                    params.hole_diameter_m = None;
                }
                if hole_diameter_m.is_some() {
                    params.hole_diameter_m = hole_diameter_m;
                }
                if let Some(h) = hole_height_m {
                    params.hole_height_m = h;
                    params.hole_height_assumed = false;
                }
                if let Some(c) = cd {
                    params.cd = c;
                    params.cd_assumed = false;
                }
                if cd_range.is_some() {
                    params.cd_range = cd_range;
                }
                if density_kg_m3.is_some() {
                    params.density_kg_m3 = density_kg_m3;
                }
                let tank = self
                    .config
                    .tanks
                    .iter()
                    .find(|t| t.id == open.row.tank)
                    .ok_or_else(|| not_open(event))?;
                Estimator::new(tank, params, open.row.start_ms, 1000)
                    .map_err(|e| StoreError::Refused(e.to_string()))?;
                let revision = self
                    .store
                    .call(move |c| store::revise_event(c, event, &params))
                    .await?;
                let row = self
                    .store
                    .call(move |c| store::event(c, event))
                    .await?
                    .ok_or_else(|| not_open(event))?;
                let (estimator, estimates) = self.rebuild(&row).await?;
                let count = estimates.len();
                self.store
                    .call(move |c| store::insert_estimates(c, event, revision, &estimates))
                    .await?;
                Ok((
                    Some(event),
                    format!(
                        "revision {revision} of event {event}: {} -> {}; recomputed {count} estimates from the start",
                        describe_params(&before),
                        describe_params(&params)
                    ),
                    Some(Change::Opened(Box::new(OpenEvent { row, estimator }))),
                ))
            }
            Request::Note { event, text } => {
                let exists = self.store.call(move |c| store::event(c, event)).await?;
                if exists.is_none() {
                    return Err(StoreError::Refused(format!("there is no event {event}")));
                }
                Ok((Some(event), format!("note on event {event}: {text}"), None))
            }
            Request::Close { event, note: _ } => {
                if !self.open.contains_key(&event) {
                    return Err(not_open(event));
                }
                self.store
                    .call(move |c| store::close_event(c, event, now))
                    .await?;
                Ok((
                    Some(event),
                    format!("closed event {event} at {}", crate::report::utc(now)),
                    Some(Change::Closed(event)),
                ))
            }
        }
    }
}

fn not_open(event: i64) -> StoreError {
    StoreError::Refused(format!(
        "event {event} is not open; `leaktally status` lists the open events"
    ))
}

/// The parameters in words, for the audit trail.
pub fn describe_params(p: &LeakParams) -> String {
    let hole = match p.hole_diameter_m {
        Some(d) => format!("hole {:.1} mm", d * 1000.0),
        None => "hole size unknown (fitted)".to_owned(),
    };
    let density = p
        .density_kg_m3
        .map_or(String::new(), |d| format!(", density {d} kg/m³"));
    let (cd_low, cd_high) = p.cd_band();
    format!(
        "{hole} at {:.2} m{}, Cd {}{} (range {cd_low} to {cd_high}){density}",
        p.hole_height_m,
        if p.hole_height_assumed {
            " (assumed: the bottom)"
        } else {
            ""
        },
        p.cd,
        if p.cd_assumed { " (assumed)" } else { "" },
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::acquire::sample::Reading;

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

    /// A write lock held by another connection: commits fail and are held,
    /// the samples of the tank with no event are given up past the bound
    /// while every event sample is kept, and all that is held is stored
    /// once the lock goes.
    #[tokio::test(flavor = "multi_thread")]
    async fn held_writes_survive_a_lock_and_only_untracked_samples_are_given_up() {
        let dir = std::env::temp_dir().join(format!("leaktally-tracker-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let db = dir.join("t.db");
        let config =
            Arc::new(crate::config::parse(&site(), std::path::Path::new("site.toml")).unwrap());
        let start = store::now_ms() - 60_000;
        {
            let conn = store::open_read_write(&db).unwrap();
            store::register_tanks(&conn, ["T1", "T2"]).unwrap();
            let params = LeakParams {
                hole_diameter_m: Some(0.02),
                hole_height_m: 0.3,
                cd: 0.61,
                density_kg_m3: None,
                ..LeakParams::default()
            };
            store::create_event(&conn, "T1", start, start, "operator", &params).unwrap();
        }
        let store = Arc::new(Store::open(&db).unwrap());
        let mut tracker = Tracker::resume(Arc::clone(&config), Arc::clone(&store))
            .await
            .unwrap();
        assert_eq!(tracker.open_events(), 1);
        tracker.max_held_samples = 10;

        let holder = rusqlite::Connection::open(&db).unwrap();
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
        tracker.finish().await;
        assert!(!tracker.store_failing());
        assert_eq!(tracker.health().snapshot().failing, None);
        let counts = store
            .call(move |c| {
                let n = |tag: &str| -> rusqlite::Result<i64> {
                    c.query_row("SELECT count(*) FROM samples s JOIN tanks t ON t.id = s.tank WHERE t.tag = ?1", [tag], |r| r.get(0))
                };
                Ok((n("T1")?, n("T2")?))
            })
            .await
            .unwrap();
        assert_eq!(counts.0, 10, "every event sample is stored");
        assert_eq!(counts.1 as u64, 10 - h.dropped_samples);
        drop(tracker);
        if let Ok(store) = Arc::try_unwrap(store) {
            store.close();
        }
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// Operator actions made while another program holds the write lock
    /// wait, leave nothing behind, and are applied exactly once when the
    /// lock goes: an open makes one event, a close closes it.
    #[tokio::test(flavor = "multi_thread")]
    async fn actions_during_a_lock_are_applied_once_afterwards() {
        let dir = std::env::temp_dir().join(format!("leaktally-tracker-a-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let db = dir.join("t.db");
        let config =
            Arc::new(crate::config::parse(&site(), std::path::Path::new("site.toml")).unwrap());
        let who = ("op".to_owned(), "cr1".to_owned());
        let open = serde_json::json!({"kind": "open", "tank": "T2", "hole_diameter_m": 0.02,
            "hole_height_m": 0.3, "cd": 0.61, "since_ms": null, "note": null});
        {
            let conn = store::open_read_write(&db).unwrap();
            store::register_tanks(&conn, ["T1", "T2"]).unwrap();
            store::request_action(&conn, "open", None, &open, &who).unwrap();
        }
        let store = Arc::new(Store::open(&db).unwrap());
        let mut tracker = Tracker::resume(Arc::clone(&config), Arc::clone(&store))
            .await
            .unwrap();

        let holder = rusqlite::Connection::open(&db).unwrap();
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
        let (events, pending) = store
            .call(|c| Ok((store::events(c, false)?, store::pending_actions(c)?)))
            .await
            .unwrap();
        assert_eq!(events.len(), 1, "exactly one event: {events:?}");
        assert!(pending.is_empty(), "{pending:?}");
        drop(tracker);
        if let Ok(store) = Arc::try_unwrap(store) {
            store.close();
        }
        let _ = std::fs::remove_dir_all(&dir);
    }
}
