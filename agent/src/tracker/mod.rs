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

//!
//! Files: this one holds the tracker and its loop over samples; `backlog`
//! the write-behind queue of what waits for the store; `build` how an
//! event's estimator is built from the stored history; `actions` how an
//! operator's request is applied; `watch` the suspected-loss watch over
//! the tanks with no open event; `outgoing` what goes in the outbox for the
//! MQTT broker (`crate::publish` sends it; the tracker knows no MQTT).

mod actions;
mod backlog;
mod build;
mod outgoing;
#[cfg(test)]
mod tests;
mod watch;

pub use actions::Refusal;

use crate::acquire::sample::TankSample;
use crate::clock::Clock;
use crate::config::Config;
use crate::estimate::Figures;
use crate::estimator::Estimator;
use crate::store::health::{StoreHealth, WriteFailure};
use crate::store::outbox::{Kind, OutboxState};
use crate::store::{Beat, EventRow, Lane, Store, StoreError, StoreResult};
use actions::{Change, Context, Handled, apply_action};
use backlog::{Backlog, Write};
use build::{open_flagged, rebuild};
use std::collections::{HashMap, HashSet, VecDeque};
use std::sync::Arc;
use std::time::Duration;
use tokio::time::Instant;
use tracing::{debug, error, info, warn};

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
/// How often the log repeats that the MQTT outbox is full.
const OUTBOX_FULL_WARN_EVERY: Duration = Duration::from_secs(600);

pub(super) struct OpenEvent {
    pub(super) row: EventRow,
    /// The tank's index in the config.
    pub(super) tank: usize,
    pub(super) estimator: Estimator,
}

/// A rising leak flag (or a suspected loss the config says to open on),
/// waiting for every acquired sample to be stored.
#[derive(Debug, Clone)]
pub(super) struct FlagEdge {
    pub(super) tank: String,
    /// When it was seen, and where the event starts (the same for a flag;
    /// back-dated for a suspected loss).
    pub(super) at_ms: i64,
    pub(super) start_ms: i64,
    /// The event's source: "leak flag" or "suspected loss".
    pub(super) source: &'static str,
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

/// What a tick's commit did.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Committed {
    /// The heartbeat went in with the samples; then the waiting operator
    /// requests were also looked for, in the same transaction.
    pub beaten: bool,
    /// Operator requests wait to be applied.
    pub actions_waiting: bool,
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
    /// Per device, the sample set its poll cycles are stored as, and its
    /// tanks (config indices) in slot order.
    sets: Vec<Option<(i64, Vec<usize>)>>,
    /// Writes not yet committed (waiting, or failed: database locked, disk
    /// full), oldest first: nothing acquired is dropped while the process
    /// lives.
    backlog: Backlog,
    /// Set after a failed commit: no attempt before then.
    retry_at: Option<Instant>,
    /// [`MAX_HELD_SAMPLES`], smaller in tests.
    max_held_samples: usize,
    health: Arc<StoreHealth>,
    counts: Counts,
    /// The suspected-loss watch over tanks with no open event.
    watch: watch::Watch,
    /// What goes in the outbox for the MQTT broker; `None` when the config
    /// publishes nothing.
    outgoing: Option<outgoing::Outgoing>,
    /// The outbox as the page and the metrics show it.
    outbox: Arc<OutboxState>,
    /// When the log last said the outbox is full (then at most every
    /// [`OUTBOX_FULL_WARN_EVERY`]).
    outbox_full_warned: Option<Instant>,
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
        let watch = watch::Watch::new(&config);
        let outgoing = outgoing::Outgoing::of(&config);
        let outbox = Arc::new(if outgoing.is_some() {
            OutboxState::configured()
        } else {
            OutboxState::default()
        });
        let mut tracker = Self {
            watch,
            outgoing,
            outbox,
            outbox_full_warned: None,
            config,
            store,
            clock,
            open: HashMap::new(),
            untracked: HashMap::new(),
            flags: HashMap::new(),
            edges: VecDeque::new(),
            sets: Vec::new(),
            backlog: Backlog::default(),
            retry_at: None,
            max_held_samples: MAX_HELD_SAMPLES,
            health,
            counts: Counts::default(),
        };
        let devices: Vec<(Vec<usize>, Vec<String>)> = (0..tracker.config.devices.len())
            .map(|d| {
                let tanks: Vec<usize> = (0..tracker.config.tanks.len())
                    .filter(|&t| tracker.config.tanks[t].device == d)
                    .collect();
                let tags = tanks
                    .iter()
                    .map(|&t| tracker.config.tanks[t].id.clone())
                    .collect();
                (tanks, tags)
            })
            .collect();
        tracker.sets = tracker
            .store
            .write(Lane::Urgent, move |tx| {
                let mut sets = Vec::new();
                for (tanks, tags) in devices {
                    let tags: Vec<&str> = tags.iter().map(String::as_str).collect();
                    sets.push(if tanks.is_empty() {
                        None
                    } else {
                        Some((tx.sample_set(&tags)?, tanks))
                    });
                }
                Ok(sets)
            })
            .await?;
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
                .read(move |r| rebuild(r, &config, row, |_| Ok(())))
                .await;
            let why = match rebuilt {
                Ok(Ok((event, replayed))) => {
                    info!(event = id, tank = %tank, "resumed open event ({replayed} samples replayed)");
                    tracker.open.insert(id, event);
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

    /// The suspected losses standing, shared for the web server.
    pub fn losses(&self) -> Arc<crate::loss::Board> {
        self.watch.board()
    }

    /// The outbox's state, shared with the publisher and the web server.
    pub fn outbox(&self) -> Arc<OutboxState> {
        Arc::clone(&self.outbox)
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
        match (self.retry_at.is_some(), self.backlog.cycles()) {
            (true, n) => format!("holding {n} poll cycle(s) the database has not taken"),
            (false, n) if n > 1 => format!("storing {n} held poll cycle(s)"),
            _ => "polling".into(),
        }
    }

    /// Feeds one poll cycle's samples to the open events and commits both.
    pub async fn on_batch(&mut self, batch: Vec<TankSample>) {
        self.take(batch);
        self.commit(None).await;
    }

    /// Commits what has been taken (every device's cycle of a tick in one
    /// unit: see `daemon`), unless a failed commit is waiting out its
    /// retry; then opens the events of raised leak flags.
    ///
    /// `beat`, the daemon's heartbeat, goes in the first commit (one
    /// transaction a tick rather than two), and the same transaction looks
    /// for waiting operator requests, so that a daemon whose ticks commit
    /// needs no look of its own.
    pub async fn commit(&mut self, beat: Option<Beat>) -> Committed {
        if self.retry_at.is_some_and(|at| Instant::now() < at) {
            self.bound_backlog();
            self.health
                .set_held(self.backlog.cycles(), self.backlog.samples());
            return Committed::default();
        }
        let committed = self.flush(beat).await;
        self.open_on_flags().await;
        committed
    }

    /// Whether samples wait to be committed.
    pub fn has_uncommitted(&self) -> bool {
        !self.backlog.is_empty()
    }

    /// Feeds a batch (one device's poll cycle) to the estimators of its
    /// tanks and queues it, with their figures and latest estimates, for
    /// the store; notes rising leak flags. Touches nothing but memory, so
    /// the daemon can drain acquisition with it at shutdown whatever the
    /// database does.
    pub fn take(&mut self, batch: Vec<TankSample>) {
        for sample in &batch {
            let Some(Some(flag)) = sample.leak_flag else {
                continue;
            };
            let was = self.flags.insert(sample.tank, flag);
            if was == Some(false) && flag {
                self.edges.push_back(FlagEdge {
                    tank: sample.tank_id.to_string(),
                    at_ms: sample.at_ms,
                    start_ms: sample.at_ms,
                    source: "leak flag",
                });
            }
        }
        let open = &self.open;
        for opening in self
            .watch
            .take(&batch, |tank| open.values().any(|e| e.tank == tank))
        {
            if !self.edges.iter().any(|e| e.tank == opening.tank) {
                self.edges.push_back(FlagEdge {
                    tank: opening.tank,
                    at_ms: batch.first().map_or(opening.start_ms, |s| s.at_ms),
                    start_ms: opening.start_ms,
                    source: "suspected loss",
                });
            }
        }
        let mut write = Write {
            set: self.set_of(&batch),
            ..Write::default()
        };
        let now = self.clock.now_ms();
        for event in self.open.values_mut() {
            let figures: Vec<Figures> = batch
                .iter()
                .filter(|s| s.tank == event.tank)
                .filter_map(|s| event.estimator.push(s))
                .collect();
            if !figures.is_empty() {
                let (id, revision) = (event.row.id, event.row.revision);
                if let Some(latest) = event.estimator.estimate() {
                    if let Some(out) = &self.outgoing {
                        write.outbox.push(out.status(
                            &event.row,
                            Some(latest.clone()),
                            None,
                            now,
                            Kind::Status,
                        ));
                    }
                    write.latest.push((id, revision, latest));
                }
                write.figures.push((id, revision, figures));
            }
        }
        let alerts = self.watch.changes();
        if let Some(out) = &mut self.outgoing {
            write
                .outbox
                .extend(alerts.iter().map(|c| out.suspected_loss(c)));
            write.outbox.extend(out.readings(&batch, &self.config));
            write.outbox_limit = out.limit;
        }
        write.samples = batch;
        self.counts.acquired += write.samples.len() as u64;
        self.backlog.push(write);
        self.health
            .set_held(self.backlog.cycles(), self.backlog.samples());
    }

    /// The sample set of a batch that is one whole poll cycle of a device,
    /// in slot order (what pollers send); `None` for anything else, which
    /// is then stored under a set of its own.
    fn set_of(&self, batch: &[TankSample]) -> Option<i64> {
        let first = batch.first()?;
        let device = self.config.tanks.get(first.tank)?.device;
        let (set, tanks) = self.sets.get(device)?.as_ref()?;
        let whole = tanks.len() == batch.len()
            && tanks
                .iter()
                .zip(batch)
                .all(|(&t, s)| s.tank == t && s.at_ms == first.at_ms);
        whole.then_some(*set)
    }

    /// At shutdown: commits what is held, retrying until `until` if the
    /// database takes nothing; returns how many samples are lost (0 when
    /// all is stored), which the log says too.
    pub async fn finish(&mut self, until: Instant) -> usize {
        loop {
            if self.retry_at.is_none_or(|at| Instant::now() >= at) {
                self.flush(None).await;
            }
            if self.backlog.is_empty() {
                return 0;
            }
            if Instant::now() >= until {
                error!(
                    "{} poll cycle(s), {} samples, could not be stored before the daemon had to stop, and are lost",
                    self.backlog.cycles(),
                    self.backlog.samples(),
                );
                return self.backlog.samples();
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
    ///
    /// `beat` goes in with the first commit, and its transaction looks for
    /// waiting operator actions; returns what went in and what it saw.
    async fn flush(&mut self, mut beat: Option<Beat>) -> Committed {
        let mut done = Committed::default();
        if self.backlog.is_empty() {
            return done;
        }
        let held = self.backlog.cycles();
        for _ in 0..COMMITS_PER_FLUSH {
            // Shared, not copied: a poll cycle of a large site is thousands
            // of samples, and it stays in the backlog until it is committed.
            let chunk = self.backlog.oldest(CYCLES_PER_COMMIT);
            if chunk.is_empty() {
                break;
            }
            let committed = chunk.len();
            let beat = beat.take();
            let beating = beat.is_some();
            let result = self
                .store
                .write(Lane::Urgent, move |tx| {
                    let mut dropped = 0;
                    for write in &chunk {
                        dropped += write.store(tx)?;
                    }
                    let waiting = match &beat {
                        Some(beat) => {
                            tx.beat(beat)?;
                            tx.any_pending_action()?
                        }
                        None => false,
                    };
                    Ok((waiting, dropped))
                })
                .await;
            match result {
                Ok((waiting, dropped)) => {
                    if dropped > 0 {
                        self.outbox_full(dropped);
                    }
                    done.beaten |= beating;
                    done.actions_waiting |= waiting;
                }
                Err(e) => {
                    self.on_write_failure(&e);
                    return done;
                }
            }
            self.counts.stored += self.backlog.committed(committed) as u64;
        }
        if self.retry_at.take().is_some() {
            let since = self.health.snapshot().failing.map_or(0, |(ms, _)| ms);
            info!(
                "the database takes writes again after {:.1} s; storing {held} held poll cycle(s)",
                (self.clock.now_ms() - since) as f64 / 1000.0
            );
        }
        self.health.record_success();
        self.health
            .set_held(self.backlog.cycles(), self.backlog.samples());
        done
    }

    /// Counts the outbox messages given up to its bound, and says so in
    /// the log (at most every [`OUTBOX_FULL_WARN_EVERY`]: a full outbox
    /// gives up some every tick).
    fn outbox_full(&mut self, dropped: u64) {
        self.outbox.add_dropped(dropped);
        let message = format!(
            "the outbox for the MQTT broker is full ({} messages; the broker has not taken any for a long time): the oldest are being given up, readings first, then status documents a newer one of the same event replaces; {} so far",
            self.outgoing.as_ref().map_or(0, |o| o.limit),
            self.outbox.snapshot().dropped
        );
        if self
            .outbox_full_warned
            .is_none_or(|at| at.elapsed() >= OUTBOX_FULL_WARN_EVERY)
        {
            self.outbox_full_warned = Some(Instant::now());
            warn!("{message}");
        } else {
            debug!("{message}");
        }
    }

    fn on_write_failure(&mut self, e: &StoreError) {
        let why = WriteFailure::of(e);
        let first = self.retry_at.is_none();
        self.retry_at = Some(Instant::now() + RETRY_EVERY);
        self.health.record_failure(self.clock.now_ms(), why);
        self.bound_backlog();
        self.health
            .set_held(self.backlog.cycles(), self.backlog.samples());
        let attempts = self.health.snapshot().failed_attempts;
        let message = format!(
            "cannot store {} poll cycle(s) ({} samples) yet: {e}; {}; holding them in memory and retrying every {} s",
            self.backlog.cycles(),
            self.backlog.samples(),
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
        let tracked: HashSet<usize> = self.open.values().map(|e| e.tank).collect();
        let dropped = self.backlog.bound(self.max_held_samples, &tracked);
        if dropped > 0 {
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
            let what = if edge.source == "leak flag" {
                "leak flag raised"
            } else {
                "suspected loss (suspected_loss = \"open\")"
            };
            let opened = self
                .store
                .write(Lane::Urgent, move |tx| open_flagged(tx, &config, &edge))
                .await;
            match opened {
                Ok(Ok(event)) => {
                    let id = event.row.id;
                    info!(event = id, tank = %event.row.tank, "{what}: opened event");
                    self.open.insert(id, *event);
                }
                Ok(Err(why)) => warn!("{what} but no event opened: {why}"),
                Err(e) if WriteFailure::passes(&e) => {
                    self.on_write_failure(&e);
                    return;
                }
                Err(e) => warn!("{what} but no event opened: {e}"),
            }
            self.edges.pop_front();
        }
    }

    /// Looks for pending operator actions and applies them, each in a unit
    /// of its own.
    pub async fn on_actions(&mut self) -> StoreResult<()> {
        // Make sure every acquired sample is stored before an action reads
        // the history (back-dating, revisions). Until it is, actions wait
        // in their rows; none is refused for a locked or full disk.
        if self.retry_at.is_some_and(|at| Instant::now() < at) {
            return Ok(());
        }
        // Most looks find nothing to do: then the samples taken so far wait
        // for their tick's one commit (`daemon::GATHER`) instead of going in
        // early, in a commit and an fsync of their own. A failed commit
        // whose retry is due is retried whatever the look finds.
        if !self.store_failing() && !self.store.read(|r| r.any_pending_action()).await? {
            return Ok(());
        }
        self.apply_actions().await
    }

    /// Applies every pending operator action, each in a unit of its own,
    /// once what was taken is committed: for a caller that has seen
    /// actions waiting (a tick's commit looks; [`Tracker::on_actions`]
    /// looks first).
    pub async fn apply_actions(&mut self) -> StoreResult<()> {
        if self.retry_at.is_some_and(|at| Instant::now() < at) {
            return Ok(());
        }
        self.flush(None).await;
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
