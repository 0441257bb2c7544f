//! `leaktally run`: the daemon. Acquisition, tracking, the store and, when
//! the config has a `[web]` section, the read-only web page, until SIGINT or
//! SIGTERM.
//!
//! Tasks: the pollers (one per device) send sample batches on a bounded
//! channel to the main loop, which owns the tracker (samples, estimates,
//! operator actions) and the clock's step checks. Beside it, the heartbeat
//! task beats every second (so that a loop busy catching up still shows a
//! live daemon, and says what keeps it busy), and the housekeeping task
//! trims the rolling history in bounded chunks and checkpoints the WAL, in
//! the store's background lane, never in the loop's way.
//!
//! Shutdown always finishes, within [`STOP_WITHIN`] of the stop signal:
//! polling and serving stop; the loop drains the channel until every poller
//! has gone (a poller waiting to send is never abandoned, so every acquired
//! sample reaches the tracker); the tracker stores what it holds, retrying
//! a locked or full database for up to [`FINISH_WITHIN`]; the heartbeat is
//! marked stopped; the database is closed. Every wait on the database races
//! a deadline, so a database that never answers (a hung disk) ends the
//! daemon too, with an error that says how much was lost. The systemd unit
//! (config/leaktally.service) gives it [`STOP_WITHIN`] plus a margin.

use crate::acquire;
use crate::acquire::sample::TankSample;
use crate::acquire::stats::Stats;
use crate::clock::{Clock, WallSource};
use crate::config::Config;
use crate::doorbell::Doorbell;
use crate::store::health::StoreHealth;
use crate::store::{Beat, Lane, Retention, Store};
use crate::tracker::{Counts, Tracker};
use crate::web;
use std::path::Path;
use std::sync::atomic::{AtomicI64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;
use tokio::time::{Instant, MissedTickBehavior};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::{debug, error, info, warn};

/// How often pending operator actions are looked for unasked while no tick
/// commits. The CLI rings the doorbell when it records one
/// (`crate::doorbell`), and the daemon looks at once; each tick's commit
/// looks too, in its own transaction; this look is for a ring that could
/// not be made on a daemon with nothing to commit. Four looks a second, as
/// before the bell, were most of the agent's fixed cost on a small site.
const ACTION_CHECK: Duration = Duration::from_secs(2);
/// How long the loop gathers poll cycles into one commit after the first
/// arrives, unless every device's cycle comes sooner (then it commits at
/// once): the devices of one tick answer within a few milliseconds of each
/// other, so a tick's cycles commit together, one fsync a tick rather than
/// one a device. A power cut loses at most what waits here and what
/// the pollers are reading: under one tick of samples (README, "The
/// database, and what a power cut can cost").
pub const GATHER: Duration = Duration::from_millis(100);
/// How often the heartbeat row is refreshed: each tick's commit carries a
/// beat (one transaction fewer a second), and the heartbeat task beats on
/// its own when the loop has not for [`HEARTBEAT_LATE`] (a loop that is busy,
/// or has no samples to commit), or every [`HEARTBEAT`] while it beats alone.
const HEARTBEAT: Duration = Duration::from_secs(1);
/// How long after the last beat the heartbeat task beats itself: a tick and
/// room for its gather and commit.
const HEARTBEAT_LATE: Duration = Duration::from_millis(1250);
/// How often the rolling history is trimmed, and the first time after start.
const TRIM_EVERY: Duration = Duration::from_secs(60);
const TRIM_FIRST_AFTER: Duration = Duration::from_secs(10);
/// The work one trim chunk does before it commits: the most a poll batch,
/// heartbeat or operator action waits behind trimming, with the commit's
/// fsync on top (a few milliseconds), well under the 200 ms allowed.
const TRIM_CHUNK_BUDGET: Duration = Duration::from_millis(50);
/// How often the WAL is checkpointed (passively) in the background lane:
/// each checkpoint copies about ten seconds of commits, a few hundred kB
/// on a 1,000-tank site, and syncs the database file once, instead of
/// SQLite's own checkpoint running inside whichever commit crosses its
/// threshold.
const CHECKPOINT_EVERY: Duration = Duration::from_secs(10);
/// A WAL file this large means checkpoints cannot restart it (a reader
/// holding an old snapshot); said in the log.
const WAL_WARN_BYTES: u64 = 4 * crate::store::WAL_SIZE_LIMIT_BYTES as u64;

/// The daemon ends within this time of the stop signal, whatever the
/// database does. config/leaktally.service's TimeoutStopSec is this plus a
/// margin for the process to exit.
pub const STOP_WITHIN: Duration = Duration::from_secs(25);
/// How long after the stop signal a locked or full database is retried
/// for what the daemon holds.
pub const FINISH_WITHIN: Duration = Duration::from_secs(20);
/// When the daemon stops waiting for a database that does not answer.
const GIVE_UP_AFTER: Duration = Duration::from_secs(22);
/// The margin the systemd unit's stop timeout adds to [`STOP_WITHIN`].
pub const SYSTEMD_STOP_MARGIN: Duration = Duration::from_secs(5);

/// How the daemon runs; the defaults are the real daemon's.
pub struct Options {
    /// Batches the sample channel holds before pollers wait.
    pub channel_slots: usize,
    /// The wall clock (the system's when `None`).
    pub wall: Option<WallSource>,
    pub retention: Retention,
    /// Poll statistics to count into (fresh ones when `None`).
    pub stats: Option<Arc<Stats>>,
    /// Called with the store once it is open, for tests to inject faults.
    #[cfg(test)]
    pub(crate) on_store: Option<StoreHook>,
}

/// What a test does with the store once it is open.
#[cfg(test)]
pub(crate) type StoreHook = Box<dyn FnOnce(&Store) + Send>;

impl Default for Options {
    fn default() -> Self {
        Self {
            channel_slots: acquire::CHANNEL_BATCHES,
            wall: None,
            retention: Retention::DEFAULT,
            stats: None,
            #[cfg(test)]
            on_store: None,
        }
    }
}

/// Runs the daemon until `stop` resolves.
pub async fn run(config: Config, db: &Path, stop: impl Future<Output = ()>) -> anyhow::Result<()> {
    run_with(config, db, stop, Options::default())
        .await
        .map(|_| ())
}

/// Runs the daemon until `stop` resolves; returns how many samples it
/// acquired and stored.
pub async fn run_with(
    config: Config,
    db: &Path,
    stop: impl Future<Output = ()>,
    options: Options,
) -> anyhow::Result<Counts> {
    let stopping = CancellationToken::new();
    let give_up = CancellationToken::new();
    let stopped_at = Arc::new(Mutex::new(None::<Instant>));
    let watcher = {
        let (stopping, give_up, stopped_at) =
            (stopping.clone(), give_up.clone(), Arc::clone(&stopped_at));
        async move {
            stop.await;
            *stopped_at.lock().unwrap_or_else(|p| p.into_inner()) = Some(Instant::now());
            stopping.cancel();
            tokio::time::sleep(GIVE_UP_AFTER).await;
            give_up.cancel();
            std::future::pending::<()>().await
        }
    };
    let signals = Signals {
        stopping,
        give_up,
        stopped_at,
    };
    tokio::select! {
        outcome = daemon(config, db, options, signals) => outcome,
        () = watcher => unreachable!("the watcher never ends"),
    }
}

/// The stop signal as the daemon's parts see it.
struct Signals {
    /// Cancelled on the stop signal.
    stopping: CancellationToken,
    /// Cancelled [`GIVE_UP_AFTER`] after it: stop waiting for the database.
    give_up: CancellationToken,
    stopped_at: Arc<Mutex<Option<Instant>>>,
}

impl Signals {
    /// `work`, unless the daemon gives up on the database first.
    async fn bounded<T>(&self, work: impl Future<Output = T>) -> Option<T> {
        tokio::select! {
            biased;
            out = work => Some(out),
            () = self.give_up.cancelled() => None,
        }
    }

    fn stopped_at(&self) -> Instant {
        self.stopped_at
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .unwrap_or_else(Instant::now)
    }
}

/// What the main loop is doing, for the heartbeat.
struct LoopState {
    turned_wall_ms: AtomicI64,
    activity: Mutex<String>,
}

impl LoopState {
    fn turn(&self, wall_ms: i64, activity: String) {
        self.turned_wall_ms.store(wall_ms, Ordering::Relaxed);
        *self.activity.lock().unwrap_or_else(|p| p.into_inner()) = activity;
    }

    fn activity(&self) -> String {
        self.activity
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .clone()
    }
}

async fn daemon(
    config: Config,
    db: &Path,
    mut options: Options,
    signals: Signals,
) -> anyhow::Result<Counts> {
    let config = Arc::new(config);
    refuse_a_second_daemon(db)?;
    // The integrity check runs here, before anything is written: seconds
    // for a large file, on the blocking pool so the stop signal is still
    // heard. Every wait at start is bounded like those at the end.
    let path = db.to_owned();
    let opened = signals
        .bounded(tokio::task::spawn_blocking(move || Store::open(&path)))
        .await
        .ok_or_else(starting_gave_up)?;
    let store = Arc::new(opened??);
    // Listening before anything else, so that no ring is missed from here
    // on; without the bell, actions are still looked for every ACTION_CHECK.
    let doorbell = match Doorbell::listen(db) {
        Ok(bell) => Some(bell),
        Err(e) => {
            warn!(
                "operator actions will be looked for every {} s, not at once: cannot listen for the CLI's doorbell ({e})",
                ACTION_CHECK.as_secs()
            );
            None
        }
    };
    // Bound before the heartbeat: a port in use is a startup error, before
    // the heartbeat says a daemon runs.
    let listener = match &config.web {
        Some(w) => Some(web::bind(w, &config.path).await?),
        None => None,
    };
    #[cfg(test)]
    if let Some(hook) = options.on_store.take() {
        hook(&store);
    }
    // The timeline starts after everything stored, whatever the wall
    // clock says.
    let floor = signals
        .bounded(store.read(|r| r.latest_stored_ms()))
        .await
        .ok_or_else(starting_gave_up)??;
    let wall = options
        .wall
        .take()
        .unwrap_or_else(|| Box::new(crate::clock::system_wall_ms));
    let clock = Arc::new(Clock::anchored(wall, floor));
    let started = clock.now_ms();
    let pulse = Arc::new(Pulse {
        identity: Identity {
            pid: std::process::id(),
            started,
            config: config.path.display().to_string(),
        },
        clock: Arc::clone(&clock),
        state: LoopState {
            turned_wall_ms: AtomicI64::new(clock.wall_ms()),
            activity: Mutex::new("resuming open events".into()),
        },
        last_ms: AtomicI64::new(i64::MIN),
        wake: tokio::sync::Notify::new(),
    });
    let state = &pulse.state;
    {
        let tags: Vec<String> = config.tanks.iter().map(|t| t.id.clone()).collect();
        let steps = clock.take_pending();
        for step in &steps {
            warn!("clock: {}", step.describe());
        }
        let beat = pulse.beat();
        let at_ms = beat.at_ms;
        let written = store.write(Lane::Urgent, move |tx| {
            tx.register_tanks(tags.iter().map(String::as_str))?;
            for step in &steps {
                tx.record_clock_step(step)?;
            }
            tx.beat(&beat)
        });
        signals
            .bounded(written)
            .await
            .ok_or_else(starting_gave_up)??;
        pulse.beaten(at_ms);
    }
    let health = Arc::new(StoreHealth::default());
    // Beating from here on: a start that resumes long events is busy, not
    // gone.
    let background = TaskTracker::new();
    background.spawn(heartbeat(
        Arc::clone(&store),
        Arc::clone(&health),
        Arc::clone(&pulse),
        signals.stopping.clone(),
    ));
    let resumed = Tracker::resume(
        Arc::clone(&config),
        Arc::clone(&store),
        Arc::clone(&clock),
        Arc::clone(&health),
    );
    let mut tracker = signals
        .bounded(resumed)
        .await
        .ok_or_else(starting_gave_up)??;
    info!(
        db = %db.display(),
        tanks = config.tanks.len(),
        devices = config.devices.len(),
        open_events = tracker.open_events(),
        not_tracked = tracker.untracked().len(),
        "leaktally daemon started"
    );
    // Requests that waited in their rows while no daemon ran are applied
    // first, at their own times, before any new sample.
    if let Some(Err(e)) = signals.bounded(tracker.on_actions()).await {
        warn!("operator actions: {e}");
    }

    let cancel = CancellationToken::new();
    let tasks = TaskTracker::new();
    // The pollers count into `stats`; the web server only reads it.
    let stats = options
        .stats
        .take()
        .unwrap_or_else(|| Arc::new(Stats::new(&config)));
    let mut samples = acquire::start_with_stats(
        Arc::clone(&config),
        Arc::clone(&stats),
        Arc::clone(&clock),
        options.channel_slots,
        &cancel,
        &tasks,
    );
    // Rung after each commit: the outbox may hold new messages.
    let outbox_bell = Arc::new(tokio::sync::Notify::new());
    if let Some(mqtt) = &config.mqtt {
        let publisher = crate::publish::Publisher {
            mqtt: mqtt.clone(),
            store: Arc::clone(&store),
            state: tracker.outbox(),
            bell: Arc::clone(&outbox_bell),
        };
        tasks.spawn(publisher.run(cancel.clone()));
    }
    if let Some(listener) = listener {
        // The server reads the database through read-only connections of
        // its own, never through `store`, so it holds no handle that would
        // keep the writer open at shutdown.
        let shared = Arc::new(
            web::Shared::new(
                db.to_owned(),
                Arc::clone(&config),
                stats,
                tracker.health(),
                started,
            )
            .with_losses(tracker.losses())
            .with_outbox(tracker.outbox()),
        );
        tasks.spawn(web::serve(listener, shared, cancel.clone()));
    }
    tasks.close();
    background.spawn(housekeeping(
        Arc::clone(&store),
        Arc::clone(&clock),
        Arc::clone(&health),
        options.retention,
        signals.stopping.clone(),
    ));
    background.close();

    let mut actions = tokio::time::interval(ACTION_CHECK);
    actions.set_missed_tick_behavior(MissedTickBehavior::Delay);
    let mut abandoned = false;
    // When the poll cycles taken so far are committed (see GATHER).
    let mut commit_at: Option<Instant> = None;
    // The devices whose cycle of this tick has come: once every device's
    // has, the tick commits at once rather than at the end of GATHER.
    let mut tick = TickCycles::new(&config);
    loop {
        state.turn(clock.wall_ms(), tracker.activity());
        tokio::select! {
            biased;
            () = signals.stopping.cancelled() => {
                info!("stop requested; finishing");
                break;
            }
            batch = samples.recv() => match batch {
                Some(batch) => {
                    tick.came(&batch);
                    tracker.take(batch);
                    // Whatever else is waiting joins the same commit.
                    while let Ok(more) = samples.try_recv() {
                        tick.came(&more);
                        tracker.take(more);
                    }
                    if !tick.all_came() {
                        commit_at.get_or_insert(Instant::now() + GATHER);
                        continue;
                    }
                    // (At once, not by a timer due now: tokio's timers
                    // round up to the next millisecond, a wake-up of its
                    // own.)
                    commit_at = None;
                    tick.committed();
                    if !commit_tick(&mut tracker, &pulse, &signals, &mut actions).await {
                        abandoned = true;
                        break;
                    }
                    outbox_bell.notify_one();
                }
                None => break,
            },
            () = tokio::time::sleep_until(commit_at.unwrap_or_else(Instant::now)), if commit_at.is_some() => {
                commit_at = None;
                tick.committed();
                if !commit_tick(&mut tracker, &pulse, &signals, &mut actions).await {
                    abandoned = true;
                    break;
                }
                outbox_bell.notify_one();
            }
            () = actions_wanted(doorbell.as_ref(), &mut actions) => {
                if !actions_done(&signals, tracker.on_actions()).await {
                    abandoned = true;
                    break;
                }
                outbox_bell.notify_one();
                // Also here: a loop without samples has no ticks.
                check_clock(&tracker, &pulse);
            }
        }
    }

    // Stop polling and serving, then take every batch the pollers made
    // until the last of them has gone and the channel closes.
    cancel.cancel();
    state.turn(clock.wall_ms(), "stopping: storing what is held".into());
    if !abandoned {
        loop {
            tokio::select! {
                biased;
                batch = samples.recv() => match batch {
                    Some(batch) => tracker.take(batch),
                    None => break,
                },
                () = signals.give_up.cancelled() => {
                    abandoned = true;
                    break;
                }
            }
        }
    }
    let waited = signals
        .bounded(async {
            tasks.wait().await;
            background.wait().await;
        })
        .await;
    abandoned |= waited.is_none();
    let held = tracker.counts().acquired - tracker.counts().stored;
    let lost = if abandoned {
        held
    } else {
        let finish_by = signals.stopped_at() + FINISH_WITHIN;
        match signals.bounded(tracker.finish(finish_by)).await {
            Some(lost) => lost as u64,
            None => {
                abandoned = true;
                tracker.counts().acquired - tracker.counts().stored
            }
        }
    };
    if !abandoned && lost == 0 {
        // Requests made in the last moments.
        if let Some(Err(e)) = signals.bounded(tracker.on_actions()).await {
            warn!("operator actions at shutdown: {e}");
        }
    }
    let counts = tracker.counts();
    let cause = tracker.health().snapshot().failing.map(|(_, why)| why);
    drop(tracker);
    if !abandoned {
        let (at, wall) = (clock.now_ms(), clock.wall_ms());
        match signals
            .bounded(store.write(Lane::Urgent, move |tx| tx.mark_stopped(at, wall)))
            .await
        {
            Some(Ok(())) => {}
            Some(Err(e)) => warn!("cannot mark the daemon stopped: {e}"),
            None => abandoned = true,
        }
    }
    let closed = match Arc::try_unwrap(store) {
        Ok(store) => {
            let left =
                (signals.stopped_at() + STOP_WITHIN).saturating_duration_since(Instant::now());
            store.close(left.max(Duration::from_millis(100))).await
        }
        Err(_) => false,
    };
    if abandoned || !closed {
        error!(
            "the database did not answer within {} s of the stop signal (a hung disk?); stopping without it",
            GIVE_UP_AFTER.as_secs()
        );
    }
    if lost > 0 {
        let why = match cause {
            Some(why) if !abandoned => why.describe(),
            _ => "the database did not answer (a hung or very slow disk); see the log above",
        };
        anyhow::bail!(
            "stopped with {lost} of the {} samples acquired in this run not stored: {why}",
            counts.acquired
        );
    }
    if abandoned || !closed {
        anyhow::bail!(
            "stopped without closing the database, which did not answer; every acquired sample was stored, but check the disk"
        );
    }
    info!(
        "leaktally daemon stopped: {} samples acquired in this run, all stored",
        counts.acquired
    );
    Ok(counts)
}

/// Commits the tick's cycles with a heartbeat, applies the operator
/// requests the commit found waiting, and looks at the clock; false when
/// the stop signal's deadline cut it short (the loop then abandons).
async fn commit_tick(
    tracker: &mut Tracker,
    pulse: &Pulse,
    signals: &Signals,
    actions: &mut tokio::time::Interval,
) -> bool {
    let beat = pulse.beat();
    let at_ms = beat.at_ms;
    let Some(done) = signals.bounded(tracker.commit(Some(beat))).await else {
        return false;
    };
    if done.beaten {
        pulse.beaten(at_ms);
        // The commit looked for operator requests: the periodic look
        // starts again from here.
        actions.reset();
    }
    // Once a tick: a wall-clock step is seen within a second.
    check_clock(tracker, pulse);
    !done.actions_waiting || actions_done(signals, tracker.apply_actions()).await
}

/// Waits for the operator actions' work, and logs what failed; false when
/// the stop signal's deadline cut it short (the loop then abandons).
async fn actions_done(
    signals: &Signals,
    work: impl std::future::Future<Output = crate::store::StoreResult<()>>,
) -> bool {
    match signals.bounded(work).await {
        None => false,
        Some(Err(e)) => {
            warn!("operator actions: {e}");
            true
        }
        Some(Ok(())) => true,
    }
}

/// Which devices' poll cycles have come since the last tick's commit.
struct TickCycles<'c> {
    config: &'c Config,
    /// By device.
    came: Vec<bool>,
}

impl<'c> TickCycles<'c> {
    fn new(config: &'c Config) -> Self {
        Self {
            config,
            came: vec![false; config.devices.len()],
        }
    }

    /// Notes a device's cycle (a batch is one device's).
    fn came(&mut self, batch: &[TankSample]) {
        let device = batch
            .first()
            .and_then(|s| self.config.tanks.get(s.tank))
            .map(|t| t.device);
        if let Some(came) = device.and_then(|d| self.came.get_mut(d)) {
            *came = true;
        }
    }

    /// Every device's cycle has come (devices on longer intervals than
    /// others make the tick wait for GATHER instead).
    fn all_came(&self) -> bool {
        self.came.iter().all(|&c| c)
    }

    fn committed(&mut self) {
        self.came.fill(false);
    }
}

/// When to look for operator actions: at a ring of the doorbell, or at the
/// periodic look (the only one without a bell).
async fn actions_wanted(doorbell: Option<&Doorbell>, every: &mut tokio::time::Interval) {
    match doorbell {
        Some(bell) => tokio::select! {
            () = bell.rung() => {}
            _ = every.tick() => {}
        },
        None => {
            every.tick().await;
        }
    }
}

/// Looks for a wall-clock step, realigning the timeline only while no event
/// is open, and logs what it saw.
fn check_clock(tracker: &Tracker, pulse: &Pulse) {
    let steps = pulse.clock.check(tracker.open_events() == 0);
    for step in &steps {
        warn!("clock: {}", step.describe());
    }
    if !steps.is_empty() {
        // The heartbeat task records them.
        pulse.wake.notify_one();
    }
}

/// The error of a start that the stop signal cut short while the database
/// did not answer.
fn starting_gave_up() -> anyhow::Error {
    anyhow::anyhow!(
        "stopped while starting: the database did not answer within {} s of the stop signal (a hung disk?); nothing was acquired",
        GIVE_UP_AFTER.as_secs()
    )
}

/// Who is beating.
struct Identity {
    pid: u32,
    started: i64,
    config: String,
}

/// The heartbeat's makings, shared by the main loop (whose tick commits
/// carry a beat) and the heartbeat task (which beats when the loop has not).
struct Pulse {
    identity: Identity,
    clock: Arc<Clock>,
    state: LoopState,
    /// The timeline's time of the last beat written, by either.
    last_ms: AtomicI64,
    /// Wakes the heartbeat task to look again: a beat was written (its
    /// wait starts again) or a clock step was seen (to be recorded).
    /// Without it the task would wake on a timer every second only to find
    /// the loop had beaten.
    wake: tokio::sync::Notify,
}

impl Pulse {
    fn beat(&self) -> Beat {
        Beat {
            pid: self.identity.pid,
            started_at_ms: self.identity.started,
            config: self.identity.config.clone(),
            at_ms: self.clock.now_ms(),
            wall_ms: self.clock.wall_ms(),
            loop_wall_ms: self.state.turned_wall_ms.load(Ordering::Relaxed),
            activity: self.state.activity(),
        }
    }

    /// A beat made at `at_ms` is in the database.
    fn beaten(&self, at_ms: i64) {
        self.last_ms.fetch_max(at_ms, Ordering::Relaxed);
        self.wake.notify_one();
    }

    /// How long since the last beat written.
    fn since_last(&self) -> Duration {
        let last = self.last_ms.load(Ordering::Relaxed);
        let ms = self.clock.now_ms().saturating_sub(last).max(0);
        Duration::from_millis(u64::try_from(ms).unwrap_or(u64::MAX))
    }
}

/// Beats with what the loop is doing, and records any clock steps seen,
/// whenever the loop's tick commits have not beaten for [`HEARTBEAT_LATE`]
/// (or every [`HEARTBEAT`] while they do not beat at all), until the stop
/// signal. While commits fail it waits: the tracker paces the retries, and
/// extra writes would only queue on the same lock or disk; a stale
/// heartbeat is then what readers see, rightly.
async fn heartbeat(
    store: Arc<Store>,
    health: Arc<StoreHealth>,
    pulse: Arc<Pulse>,
    stopping: CancellationToken,
) {
    let mut due = Instant::now();
    loop {
        tokio::select! {
            biased;
            () = stopping.cancelled() => return,
            () = pulse.wake.notified() => {}
            () = tokio::time::sleep_until(due) => {}
        }
        due = Instant::now() + HEARTBEAT;
        if health.snapshot().failing.is_some() {
            continue;
        }
        let steps = pulse.clock.take_pending();
        let since = pulse.since_last();
        if steps.is_empty() && since < HEARTBEAT_LATE {
            // The loop beat lately: look again when its next beat is late.
            due = Instant::now() + (HEARTBEAT_LATE - since);
            continue;
        }
        let kept = steps.clone();
        let beat = pulse.beat();
        let at_ms = beat.at_ms;
        let written = store
            .write_lax(Lane::Urgent, move |tx| {
                for step in &steps {
                    tx.record_clock_step(step)?;
                }
                tx.beat(&beat)
            })
            .await;
        match written {
            Ok(()) => pulse.beaten(at_ms),
            Err(e) => {
                pulse.clock.restore_pending(kept);
                warn!("heartbeat: {e}");
            }
        }
    }
}

/// Trims the rolling history every [`TRIM_EVERY`] and checkpoints the WAL
/// every [`CHECKPOINT_EVERY`], in the store's background lane, until the
/// stop signal. A chunk in progress then finishes (it is one transaction).
async fn housekeeping(
    store: Arc<Store>,
    clock: Arc<Clock>,
    health: Arc<StoreHealth>,
    retention: Retention,
    stopping: CancellationToken,
) {
    let mut tick = tokio::time::interval(CHECKPOINT_EVERY);
    tick.set_missed_tick_behavior(MissedTickBehavior::Delay);
    let mut next_trim = Instant::now() + TRIM_FIRST_AFTER;
    let mut wal = WalWatch::default();
    loop {
        tokio::select! {
            biased;
            () = stopping.cancelled() => return,
            _ = tick.tick() => {}
        }
        if health.snapshot().failing.is_some() {
            continue;
        }
        checkpoint(&store, &mut wal).await;
        if Instant::now() >= next_trim {
            next_trim = Instant::now() + TRIM_EVERY;
            trim(&store, &clock, &health, retention, &stopping, &mut wal).await;
        }
    }
}

/// What the housekeeping task knows of the WAL between trims.
#[derive(Default)]
struct WalWatch {
    warned: Option<Instant>,
    /// The longest checkpoint since the last trim round's log line.
    longest: Duration,
}

/// A passive checkpoint; warns (at most every 10 min) when the WAL stays
/// large because a reader keeps checkpoints from finishing.
async fn checkpoint(store: &Store, wal: &mut WalWatch) {
    let began = std::time::Instant::now();
    let done = store.checkpoint().await;
    wal.longest = wal.longest.max(began.elapsed());
    match done {
        Ok(c) => {
            let wal_bytes = c.wal_frames.max(0) as u64 * 4096;
            if c.busy || c.copied_frames < c.wal_frames {
                debug!(
                    "checkpoint: {} of {} WAL frames copied",
                    c.copied_frames, c.wal_frames
                );
            }
            if wal_bytes > WAL_WARN_BYTES
                && wal
                    .warned
                    .is_none_or(|at| at.elapsed() > Duration::from_secs(600))
            {
                wal.warned = Some(Instant::now());
                warn!(
                    "the database's WAL holds {} frames ({} MB) that checkpoints cannot clear: a program reading the database keeps an old snapshot open (a long query, or a shell left in a transaction); end it",
                    c.wal_frames,
                    wal_bytes / 1_000_000
                );
            }
        }
        Err(e) => debug!("checkpoint: {e}"),
    }
}

/// One round of trimming: chunks of [`TRIM_CHUNK_BUDGET`] until the history
/// is trimmed up to now, each one transaction in the background lane, with
/// a checkpoint after each.
async fn trim(
    store: &Store,
    clock: &Clock,
    health: &StoreHealth,
    retention: Retention,
    stopping: &CancellationToken,
    wal: &mut WalWatch,
) {
    let began = std::time::Instant::now();
    let (mut chunks, mut removed, mut longest) = (0usize, 0usize, Duration::ZERO);
    let mut state = None;
    while !stopping.is_cancelled() && health.snapshot().failing.is_none() {
        let now = clock.now_ms();
        let chunk_began = std::time::Instant::now();
        let step = store
            .write_lax(Lane::Background, move |tx| {
                tx.trim_step(now, retention, state, TRIM_CHUNK_BUDGET)
            })
            .await;
        let step = match step {
            Ok(step) => step,
            Err(e) => {
                warn!("trimming the history: {e}");
                break;
            }
        };
        if !step.worked {
            break;
        }
        chunks += 1;
        removed += step.removed;
        longest = longest.max(chunk_began.elapsed());
        state = step.next;
        checkpoint(store, wal).await;
    }
    if chunks > 0 {
        info!(
            "trimmed the rolling history: {removed} samples in {chunks} chunk(s) over {:.1} s, the longest {} ms; the longest WAL checkpoint since the last trim {} ms",
            began.elapsed().as_secs_f64(),
            longest.as_millis(),
            wal.longest.as_millis()
        );
    }
    wal.longest = Duration::ZERO;
}

/// Two daemons on one database would both poll and both write; the one
/// that beat last may only be stalled (a locked or full database stops its
/// heartbeat, not its process), so a live process counts.
fn refuse_a_second_daemon(db: &Path) -> anyhow::Result<()> {
    let Ok(conn) = crate::store::open_read_only(db) else {
        return Ok(()); // No database yet, or not one of ours: opening says.
    };
    // A damaged file is refused by the integrity check that follows.
    let Ok(heartbeat) = crate::store::heartbeat(&conn) else {
        return Ok(());
    };
    if let Some(h) = heartbeat
        && h.process_alive()
        && u32::try_from(h.pid).ok() != Some(std::process::id())
    {
        anyhow::bail!(
            "another leaktally daemon (pid {}, config {}) is running on {}; stop it first (or give this one its own --db)",
            h.pid,
            h.config,
            db.display()
        );
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store as records;

    /// Two devices nobody answers for (every cycle's samples are flagged
    /// communication_lost, but they are acquired samples all the same), with
    /// two tanks each.
    fn site() -> String {
        let mut site = String::from("[site]\nname = \"Test\"\n");
        for d in 1..=2 {
            site += &format!(
                "[[device]]\nid = \"d{d}\"\naddress = \"127.0.0.1:1\"\npoll_interval_ms = 1000\nrequest_timeout_ms = 200\n"
            );
        }
        for t in 0..4 {
            site += &format!(
                r#"[[tank]]
id = "T{t}"
device = "d{}"
geometry = {{ shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }}
substance = {{ name = "diesel", density_kg_m3 = 840.0 }}
level = {{ register = "input", address = {}, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }}
"#,
                1 + t % 2,
                t / 2
            );
        }
        site
    }

    #[test]
    fn a_tick_is_whole_once_every_device_has_sent_its_cycle() {
        let config = crate::config::parse(&site(), Path::new("site.toml")).unwrap();
        let sample = |tank: usize| TankSample {
            tank,
            tank_id: config.tanks[tank].id.as_str().into(),
            at_ms: 0,
            level: crate::acquire::sample::Reading::good(1.0),
            pressure: None,
            transfer: None,
            temperature: None,
            leak_flag: None,
        };
        let mut tick = TickCycles::new(&config);
        // Tanks 0 and 2 are on d1, 1 and 3 on d2.
        tick.came(&[sample(0), sample(2)]);
        assert!(!tick.all_came());
        // A second cycle of the same device does not make the tick whole.
        tick.came(&[sample(2)]);
        assert!(!tick.all_came());
        tick.came(&[]);
        assert!(!tick.all_came());
        tick.came(&[sample(1), sample(3)]);
        assert!(tick.all_came());
        tick.committed();
        assert!(!tick.all_came());
        tick.came(&[sample(3)]);
        tick.came(&[sample(0)]);
        assert!(tick.all_came());
    }

    struct Run {
        dir: std::path::PathBuf,
        db: std::path::PathBuf,
        stats: Arc<Stats>,
        faults: Arc<Mutex<Option<Arc<crate::store::unit::Faults>>>>,
        stop: Option<tokio::sync::oneshot::Sender<()>>,
        daemon: tokio::task::JoinHandle<anyhow::Result<Counts>>,
    }

    /// Starts `run_with` on a one-slot channel, in this (paused) runtime.
    fn start(label: &str) -> Run {
        let dir =
            std::env::temp_dir().join(format!("leaktally-daemon-{label}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let db = dir.join("t.db");
        let config = crate::config::parse(&site(), &dir.join("site.toml")).unwrap();
        let stats = Arc::new(Stats::new(&config));
        let faults = Arc::new(Mutex::new(None));
        let slot = Arc::clone(&faults);
        let options = Options {
            channel_slots: 1,
            stats: Some(Arc::clone(&stats)),
            on_store: Some(Box::new(move |store: &Store| {
                *slot.lock().unwrap() = Some(Arc::clone(&store.faults));
            })),
            ..Options::default()
        };
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let path = db.clone();
        let daemon = tokio::spawn(async move {
            run_with(
                config,
                &path,
                async move {
                    let _ = stopped.await;
                },
                options,
            )
            .await
        });
        Run {
            dir,
            db,
            stats,
            faults,
            stop: Some(stop),
            daemon,
        }
    }

    impl Run {
        fn faults(&self) -> Arc<crate::store::unit::Faults> {
            Arc::clone(
                self.faults
                    .lock()
                    .unwrap()
                    .as_ref()
                    .expect("the store is open"),
            )
        }

        fn stop(&mut self) -> Instant {
            let _ = self.stop.take().unwrap().send(());
            Instant::now()
        }

        /// Samples acquired by the pollers' own count: every cycle makes
        /// one sample per tank of its device (two each here).
        fn cycles(&self) -> u64 {
            self.stats
                .devices()
                .iter()
                .map(|d| d.successes + d.failures)
                .sum::<u64>()
        }
    }

    impl Drop for Run {
        fn drop(&mut self) {
            if !std::thread::panicking() {
                let _ = std::fs::remove_dir_all(&self.dir);
            }
        }
    }

    /// The database hangs (a disk that does not answer) while the daemon
    /// runs, so the loop waits on a commit, the one-slot channel fills and
    /// the pollers wait to send; the stop signal comes; the database comes
    /// back 5 s later. The daemon ends within its bound, and every sample
    /// the pollers acquired is stored, once.
    #[tokio::test(start_paused = true)]
    async fn a_stop_with_a_full_channel_and_a_hung_store_ends_in_time_with_every_sample_stored() {
        let mut run = start("hung");
        tokio::time::sleep(Duration::from_secs(5)).await;
        let faults = run.faults();
        faults.hang(true);
        tokio::time::sleep(Duration::from_secs(10)).await;
        let stopped = run.stop();
        tokio::time::sleep(Duration::from_secs(5)).await;
        faults.hang(false);
        let counts = (&mut run.daemon).await.unwrap().unwrap();
        let took = stopped.elapsed();
        assert!(took <= STOP_WITHIN, "stopped after {took:?}");
        // Five seconds of cycles before the hang, then a batch in the
        // channel's slot and one waiting to be sent per device: the
        // pollers wait, as backpressure has them do.
        let acquired = 2 * run.cycles();
        assert!(acquired >= 2 * 2 * 6, "{acquired} samples acquired");
        assert_eq!(
            counts.acquired, acquired,
            "every batch made reached the tracker"
        );
        assert_eq!(counts.stored, acquired);
        let conn = crate::store::open_read_only(&run.db).unwrap();
        let mut stored = 0;
        for t in 0..4 {
            let (n, twice) = records::sample_count(&conn, &format!("T{t}")).unwrap();
            assert_eq!(twice, 0);
            stored += n as u64;
        }
        assert_eq!(stored, acquired, "every acquired sample is in the database");
        let beat = records::heartbeat(&conn).unwrap().unwrap();
        assert!(beat.stopped_at_ms.is_some(), "marked stopped");
    }

    /// The same, with a database that never comes back: the daemon still
    /// ends within its bound, and says how many samples it could not store.
    #[tokio::test(start_paused = true)]
    async fn a_store_that_never_answers_still_stops_in_time_and_says_what_was_lost() {
        let mut run = start("gone");
        tokio::time::sleep(Duration::from_secs(3)).await;
        let faults = run.faults();
        faults.hang(true);
        tokio::time::sleep(Duration::from_secs(5)).await;
        let stopped = run.stop();
        let outcome = (&mut run.daemon).await.unwrap();
        let took = stopped.elapsed();
        faults.hang(false);
        assert!(took <= STOP_WITHIN, "stopped after {took:?}");
        let err = outcome.expect_err("samples were lost").to_string();
        assert!(
            err.contains("not stored") && err.contains("did not answer"),
            "{err}"
        );
    }

    /// A locked database (writes fail at once) during the stop: the daemon
    /// retries what it holds until the lock goes, within its bound.
    #[tokio::test(start_paused = true)]
    async fn a_locked_store_at_stop_is_retried_until_it_takes_the_samples() {
        let mut run = start("locked");
        tokio::time::sleep(Duration::from_secs(3)).await;
        let faults = run.faults();
        faults.set_busy(true);
        tokio::time::sleep(Duration::from_secs(6)).await;
        let stopped = run.stop();
        tokio::time::sleep(Duration::from_secs(8)).await;
        faults.set_busy(false);
        let counts = (&mut run.daemon).await.unwrap().unwrap();
        assert!(stopped.elapsed() <= STOP_WITHIN);
        assert_eq!(counts.acquired, 2 * run.cycles());
        assert_eq!(counts.stored, counts.acquired);
    }

    /// The systemd unit's stop timeout is the daemon's bound plus the
    /// margin, so systemd never kills a daemon that is still within it.
    #[test]
    fn the_systemd_unit_waits_as_long_as_the_daemon_may_take() {
        let unit = std::fs::read_to_string(
            Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/leaktally.service"),
        )
        .unwrap();
        let timeout = unit
            .lines()
            .find_map(|l| l.trim().strip_prefix("TimeoutStopSec="))
            .expect("the unit sets TimeoutStopSec");
        let seconds: u64 = timeout.trim_end_matches('s').parse().unwrap();
        assert_eq!(seconds, (STOP_WITHIN + SYSTEMD_STOP_MARGIN).as_secs());
        assert!(GIVE_UP_AFTER > FINISH_WITHIN && GIVE_UP_AFTER < STOP_WITHIN);
    }
}
