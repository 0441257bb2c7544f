//! `leaktally run`: the daemon. Acquisition, tracking, the store and, when
//! the config has a `[web]` section, the read-only web page, until SIGINT or
//! SIGTERM.
//!
//! Shape (after mini-redis): `run` takes its stop signal as a future, one
//! cancellation token fans out to the pollers and the web server, and
//! shutdown goes in order: stop polling and serving, feed the last batches
//! to the tracker, commit, mark the daemon stopped, close the database.

use crate::acquire;
use crate::acquire::stats::Stats;
use crate::config::Config;
use crate::store::{self, Retention, Store};
use crate::track::tracker::Tracker;
use crate::web;
use std::path::Path;
use std::sync::Arc;
use std::time::Duration;
use tokio::time::MissedTickBehavior;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::{info, warn};

/// How often pending operator actions are looked for: well inside one poll
/// cycle, so an action is picked up in the cycle it was made in.
const ACTION_CHECK: Duration = Duration::from_millis(250);
/// How often the heartbeat row is refreshed.
const HEARTBEAT: Duration = Duration::from_secs(1);
/// How often the rolling history is trimmed.
const TRIM_EVERY: Duration = Duration::from_secs(60);

/// Runs the daemon until `stop` resolves.
pub async fn run(config: Config, db: &Path, stop: impl Future<Output = ()>) -> anyhow::Result<()> {
    let config = Arc::new(config);
    // Bound first: a port in use is a startup error, before the heartbeat
    // says a daemon runs.
    let listener = match &config.web {
        Some(w) => Some(web::bind(w, &config.path).await?),
        None => None,
    };
    refuse_a_second_daemon(db)?;
    let store = Arc::new(Store::open(db)?);
    let started = store::now_ms();
    let pid = std::process::id();
    let config_path = config.path.display().to_string();
    let tags: Vec<String> = config.tanks.iter().map(|t| t.id.clone()).collect();
    store
        .call(move |c| {
            store::register_tanks(c, tags.iter().map(String::as_str))?;
            store::beat(c, pid, started, &config_path)
        })
        .await?;
    let mut tracker = Tracker::resume(Arc::clone(&config), Arc::clone(&store)).await?;
    info!(
        db = %db.display(),
        tanks = config.tanks.len(),
        devices = config.devices.len(),
        open_events = tracker.open_events(),
        "leaktally daemon started"
    );

    let cancel = CancellationToken::new();
    let tasks = TaskTracker::new();
    // The pollers count into `stats`; the web server only reads it.
    let stats = Arc::new(Stats::new(&config));
    let mut samples =
        acquire::start_with_stats(Arc::clone(&config), Arc::clone(&stats), &cancel, &tasks);
    if let Some(listener) = listener {
        // The server reads the database through read-only connections of
        // its own, never through `store`, so it holds no handle that would
        // keep the writer open at shutdown.
        let shared = Arc::new(web::Shared::new(
            db.to_owned(),
            Arc::clone(&config),
            stats,
            tracker.health(),
            started,
        ));
        tasks.spawn(web::serve(listener, shared, cancel.clone()));
    }
    tasks.close();

    let mut actions = tokio::time::interval(ACTION_CHECK);
    actions.set_missed_tick_behavior(MissedTickBehavior::Delay);
    let (mut last_beat, mut last_trim) = (tokio::time::Instant::now(), tokio::time::Instant::now());
    tokio::pin!(stop);
    loop {
        tokio::select! {
            _ = &mut stop => {
                info!("stop requested; finishing");
                break;
            }
            batch = samples.recv() => match batch {
                Some(batch) => tracker.on_batch(batch).await,
                None => break,
            },
            _ = actions.tick() => {
                if let Err(e) = tracker.on_actions().await {
                    warn!("operator actions: {e}");
                }
                // While commits fail the tracker paces the retries; extra
                // writes would only stall the loop on the same lock or disk.
                // A stale heartbeat is then what readers see, rightly.
                if tracker.store_failing() {
                    continue;
                }
                if last_beat.elapsed() >= HEARTBEAT {
                    last_beat = tokio::time::Instant::now();
                    let path = config.path.display().to_string();
                    if let Err(e) = store.call(move |c| store::beat(c, pid, started, &path)).await {
                        warn!("heartbeat: {e}");
                    }
                }
                if last_trim.elapsed() >= TRIM_EVERY {
                    last_trim = tokio::time::Instant::now();
                    let slice = 2 * TRIM_EVERY.as_millis() as i64;
                    let trimmed = store
                        .call(move |c| store::trim_history(c, store::now_ms(), Retention::DEFAULT, slice))
                        .await;
                    if let Err(e) = trimmed {
                        warn!("trimming the history: {e}");
                    }
                }
            }
        }
    }

    cancel.cancel();
    tasks.wait().await;
    while let Ok(batch) = samples.try_recv() {
        tracker.on_batch(batch).await;
    }
    let lost = tracker.finish().await;
    if let Err(e) = tracker.on_actions().await {
        warn!("operator actions at shutdown: {e}");
    }
    if let Err(e) = store.call(|c| store::mark_stopped(c)).await {
        warn!("cannot mark the daemon stopped: {e}");
    }
    // The tracker holds the other handle on the store; let it go first.
    drop(tracker);
    match Arc::try_unwrap(store) {
        Ok(store) => store.close(),
        Err(_) => warn!("the database is still in use at shutdown"),
    }
    if lost > 0 {
        anyhow::bail!(
            "stopped with {lost} acquired samples that the database did not take (locked by another program, or its disk full); see the log above"
        );
    }
    info!("leaktally daemon stopped");
    Ok(())
}

/// Two daemons on one database would both poll and both write; the one
/// that beat last may only be stalled (a locked or full database stops its
/// heartbeat, not its process), so a live process counts.
fn refuse_a_second_daemon(db: &Path) -> anyhow::Result<()> {
    let Ok(conn) = store::open_read_only(db) else {
        return Ok(()); // No database yet, or not one of ours: opening says.
    };
    if let Some(h) = store::heartbeat(&conn)?
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
