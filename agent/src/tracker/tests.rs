//! The tracker's tests: held writes, actions during outages, units that
//! fail part way, requests that waited, events that cannot be resumed,
//! clock steps.

use super::*;
use crate::acquire::sample::Reading;
use crate::clock::testing::SteppedWall;
use crate::estimate::LeakParams;
use crate::store;

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
        tank_id: format!("T{}", tank + 1).into(),
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
        let dir =
            std::env::temp_dir().join(format!("leaktally-tracker-{label}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let db = dir.join("t.db");
        let conn = store::open_read_write(&db).unwrap();
        store::register_tanks(&conn, ["T1", "T2"]).unwrap();
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
        let id = store::request_action(
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
        store::create_event(&fx.conn(), "T1", start, start, "operator", &params).unwrap();
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
    let n = |tag: &str| store::sample_count(&conn, tag).unwrap().0;
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
    let events = store::events(&conn, false).unwrap();
    let pending = store::pending_actions(&conn).unwrap();
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
        store::insert_samples(&conn, &[sample(0, now - 5000 + 1000 * i)]).unwrap();
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
        store::events(&conn, false).unwrap().is_empty(),
        "no half-made event"
    );
    assert_eq!(
        store::action(&conn, first).unwrap().unwrap().state,
        "pending"
    );
    tracker.retry_at = Some(Instant::now());
    tracker.on_actions().await.unwrap();
    let events = store::events(&conn, false).unwrap();
    assert_eq!(events.len(), 1, "{events:?}");
    assert_eq!(store::action(&conn, first).unwrap().unwrap().state, "done");
    let id = events[0].id;

    // An I/O error after the first write: recorded as failed.
    let second = fx.request(open_request("T2", Some(0.02)), now);
    store
        .faults
        .fail_next_unit_after(1, rusqlite::ffi::SQLITE_IOERR);
    tracker.on_actions().await.unwrap();
    let action = store::action(&conn, second).unwrap().unwrap();
    assert_eq!(action.state, "refused");
    assert!(
        action.outcome.as_deref().unwrap().starts_with("failed:"),
        "{action:?}"
    );
    assert_eq!(store::events(&conn, false).unwrap().len(), 1);
    assert!(store::open_event_of_tank(&conn, "T2").unwrap().is_none());
    assert_eq!(tracker.open_events(), 1);

    // A revise failing after the revision's bump.
    let revise = serde_json::json!({"kind": "revise", "event": id, "hole_diameter_m": 0.03,
        "unknown_diameter": false, "hole_height_m": null, "cd": null, "density_kg_m3": null, "note": null});
    let third = fx.request(revise, now);
    store
        .faults
        .fail_next_unit_after(1, rusqlite::ffi::SQLITE_IOERR);
    tracker.on_actions().await.unwrap();
    assert_eq!(store::event(&conn, id).unwrap().unwrap().revision, 1);
    assert_eq!(tracker.open[&id].row.revision, 1);
    assert_eq!(
        store::action(&conn, third).unwrap().unwrap().state,
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
        store::sample_count(&conn, "T1").unwrap().0,
        5,
        "none of the cycle"
    );
    tracker.retry_at = Some(Instant::now());
    tracker.on_batch(vec![sample(0, now + 2000)]).await;
    assert!(!tracker.store_failing());
    assert_eq!(store::sample_count(&conn, "T1").unwrap(), (7, 0));
    let estimates = store::figures_of(&conn, id, 1).unwrap();
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
    store::insert_samples(&conn, &history).unwrap();
    let asked_at = now - 45_000;
    let opened = fx.request(open_request("T1", Some(0.02)), asked_at);
    let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
    tracker.on_actions().await.unwrap();
    let action = store::action(&conn, opened).unwrap().unwrap();
    assert_eq!(action.state, "done", "{action:?}");
    let text = action.outcome.unwrap();
    assert!(text.contains("with the time of the request"), "{text}");
    let event = store::open_event_of_tank(&conn, "T1").unwrap().unwrap();
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
    let live = store::figures_of(&conn, event.id, 1).unwrap();
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
    assert_eq!(store::action(&conn, closed).unwrap().unwrap().state, "done");
    let row = store::event(&conn, event.id).unwrap().unwrap();
    assert!((row.closed_at_ms.unwrap() - close_at).abs() <= 1);
    let kept = store::figures_of(&conn, event.id, 1).unwrap();
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
    store::register_tanks(&conn, ["T9"]).unwrap();
    let params = LeakParams {
        hole_diameter_m: Some(0.02),
        hole_height_m: 0.3,
        cd: 0.61,
        density_kg_m3: None,
        ..LeakParams::default()
    };
    let id = store::create_event(&conn, "T9", now - 1000, now - 1000, "operator", &params).unwrap();
    let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
    assert_eq!(tracker.open_events(), 1);
    assert!(tracker.untracked()[&id].contains("not in the config"));
    let marked = store::tracking_errors(&conn).unwrap();
    assert!(
        marked[&id].contains("tank T9 is not in the config"),
        "{marked:?}"
    );
    assert!(
        store::event(&conn, id)
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
    let refused = store::action(&conn, refused).unwrap().unwrap();
    assert_eq!(refused.state, "refused");
    assert!(refused.outcome.unwrap().contains("is not tracked"));
    assert_eq!(store::action(&conn, closed).unwrap().unwrap().state, "done");
    assert!(
        store::event(&conn, id)
            .unwrap()
            .unwrap()
            .closed_at_ms
            .is_some()
    );
    assert!(store::tracking_errors(&conn).unwrap().is_empty());
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
    let id = store::open_event_of_tank(&fx.conn(), "T1")
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
    let stored = store::samples_between(&conn, "T1", 0, i64::MAX).unwrap();
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
    let estimates = store::figures_of(&conn, id, 1).unwrap();
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

/// Plays `minutes` of 1 Hz samples of both tanks, from an hour ago: T2
/// steady, T1 steady until `fall_at_s` and then falling 6 mm a minute
/// (unmetered), committing once a minute.
async fn play_a_fall(tracker: &mut Tracker, t0: i64, fall_at_s: i64, minutes: i64) {
    for s in 0..minutes * 60 {
        let at_ms = t0 + 1000 * s;
        let fallen = 0.0001 * (s - fall_at_s).max(0) as f64;
        let mut t1 = sample(0, at_ms);
        t1.level = Reading::good(4.0 - fallen);
        let mut t2 = sample(1, at_ms);
        t2.level = Reading::good(3.0);
        tracker.take(vec![t1, t2]);
        if s % 60 == 59 {
            tracker.commit(None).await;
        }
    }
}

/// With the site's default (`alert`), a fall no transfer explains raises a
/// suspected loss on the board, back-dated to about where it began, and
/// opens nothing.
#[tokio::test(flavor = "multi_thread")]
async fn a_suspected_loss_is_shown_and_opens_nothing_by_default() {
    let fx = Fixture::new("loss-alert");
    let t0 = store::now_ms() - 3_600_000;
    let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
    play_a_fall(&mut tracker, t0, 600, 20).await;
    let standing = tracker.losses().snapshot();
    assert_eq!(standing.len(), 1, "{standing:?}");
    assert_eq!(standing[0].tank, "T1");
    let since = standing[0].suspicion.since_ms - t0;
    assert!((420_000..=600_000).contains(&since), "since {since} ms");
    assert_eq!(tracker.losses().raised_total(), 1);
    assert_eq!(tracker.open_events(), 0);
    close(tracker, store).await;
}

/// With `[mqtt]`, a suspected loss raised goes in the outbox once (not on
/// every sample of the standing alert), retained under the tank, with
/// where it began and the command that confirms it.
#[tokio::test(flavor = "multi_thread")]
async fn a_suspected_loss_goes_in_the_outbox_once() {
    use crate::store::outbox::Kind;
    let mut fx = Fixture::new("loss-outbox");
    fx.config = Arc::new(
        crate::config::parse(
            &format!("{}[mqtt]\nbroker = \"127.0.0.1:1\"\n", site()),
            std::path::Path::new("site.toml"),
        )
        .unwrap(),
    );
    let t0 = store::now_ms() - 3_600_000;
    let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
    play_a_fall(&mut tracker, t0, 600, 20).await;
    let messages = store.read(|r| r.outbox_next(0, 1000)).await.unwrap();
    let alerts: Vec<_> = messages
        .iter()
        .filter(|q| q.message.kind == Kind::SuspectedLoss)
        .collect();
    // First each watched tank's fresh start (a broker may retain an
    // alert from before a restart), then the one alert.
    let started: Vec<_> = alerts
        .iter()
        .filter(|q| q.message.payload.contains("\"reason\":\"watch_started\""))
        .map(|q| q.message.tank.clone().unwrap())
        .collect();
    assert_eq!(started, ["T1", "T2"]);
    assert!(
        started.len() == 2
            && alerts[..2]
                .iter()
                .all(|q| q.message.payload.contains("\"state\":\"cleared\""))
    );
    let alerts = &alerts[2..];
    assert_eq!(alerts.len(), 1, "{alerts:?}");
    let standing = tracker.losses().snapshot();
    let doc: serde_json::Value = serde_json::from_str(&alerts[0].message.payload).unwrap();
    assert_eq!(alerts[0].message.tank.as_deref(), Some("T1"));
    assert_eq!(doc["state"], "suspected");
    assert_eq!(doc["reason"], "raised");
    assert_eq!(doc["tank"], "T1");
    assert_eq!(doc["since_ms"], standing[0].suspicion.since_ms);
    assert!(
        doc["confirm_command"]
            .as_str()
            .unwrap()
            .starts_with("leaktally leak open --tank T1 --since "),
        "{doc}"
    );
    assert!(
        doc["caution"]
            .as_str()
            .unwrap()
            .contains("not measurements")
    );
    close(tracker, store).await;
}

/// With `suspected_loss = "open"`, the alert opens an event from the
/// start it offers, and the watch stands down on that tank.
#[tokio::test(flavor = "multi_thread")]
async fn a_suspected_loss_opens_a_back_dated_event_where_the_site_says_so() {
    let mut fx = Fixture::new("loss-open");
    let text = site().replace(
        "name = \"Test\"\n",
        "name = \"Test\"\nsuspected_loss = \"open\"\n",
    );
    fx.config = Arc::new(crate::config::parse(&text, std::path::Path::new("site.toml")).unwrap());
    let t0 = store::now_ms() - 3_600_000;
    let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
    play_a_fall(&mut tracker, t0, 600, 20).await;
    let event = store::open_event_of_tank(&fx.conn(), "T1")
        .unwrap()
        .expect("an event opened");
    assert_eq!(event.source, "suspected loss");
    let since = event.start_ms - t0;
    assert!((420_000..=600_000).contains(&since), "start {since} ms");
    assert!(
        store::open_event_of_tank(&fx.conn(), "T2")
            .unwrap()
            .is_none()
    );
    assert!(tracker.losses().snapshot().is_empty(), "stood down");
    close(tracker, store).await;
}

/// With `[mqtt]`, each cycle's estimate puts the event's status document
/// in the outbox in the same commit (held with the samples while the
/// database takes nothing, then stored with them, none lost), and a close
/// puts the closed document under both the status and the summary.
#[tokio::test(flavor = "multi_thread")]
async fn the_outbox_gets_a_document_per_estimate_and_the_closing_ones() {
    use crate::store::outbox::Kind;
    let mut fx = Fixture::new("outbox");
    fx.config = Arc::new(
        crate::config::parse(
            &format!("{}[mqtt]\nbroker = \"127.0.0.1:1\"\n", site()),
            std::path::Path::new("site.toml"),
        )
        .unwrap(),
    );
    let start = store::now_ms() - 60_000;
    let params = LeakParams {
        hole_diameter_m: Some(0.02),
        hole_height_m: 0.3,
        cd: 0.61,
        ..LeakParams::default()
    };
    let id = store::create_event(&fx.conn(), "T1", start, start, "operator", &params).unwrap();
    let (mut tracker, store) = fx.tracker(Arc::new(Clock::system())).await;
    let queued = |store: &Arc<Store>| {
        let store = Arc::clone(store);
        async move { store.read(|r| r.outbox_next(0, 1000)).await.unwrap() }
    };
    let holder = rusqlite::Connection::open(&fx.db).unwrap();
    holder.execute_batch("BEGIN IMMEDIATE").unwrap();
    for i in 1..=3 {
        let at = start + 1000 * i;
        tracker
            .on_batch(vec![draining(0, start, at), sample(1, at)])
            .await;
    }
    holder.execute_batch("COMMIT").unwrap();
    tracker.retry_at = Some(Instant::now());
    for i in 4..=5 {
        let at = start + 1000 * i;
        tracker
            .on_batch(vec![draining(0, start, at), sample(1, at)])
            .await;
    }
    // (Less the watch's fresh start on each tank: another test's.)
    let messages: Vec<_> = queued(&store)
        .await
        .into_iter()
        .filter(|q| q.message.kind != Kind::SuspectedLoss)
        .collect();
    let times: Vec<(Kind, Option<i64>, i64)> = messages
        .iter()
        .map(|q| (q.message.kind, q.message.event, q.message.at_ms))
        .collect();
    let expected: Vec<_> = (1..=5)
        .map(|i| (Kind::Status, Some(id), start + 1000 * i))
        .collect();
    assert_eq!(times, expected);
    let doc: serde_json::Value = serde_json::from_str(&messages[4].message.payload).unwrap();
    assert_eq!(doc["format"], crate::status::FORMAT);
    assert_eq!(doc["events"][0]["event"], id);
    assert_eq!(doc["events"][0]["revision"], 1);
    assert_eq!(doc["events"][0]["estimate"]["at_ms"], start + 5000);

    fx.request(
        serde_json::json!({"kind": "close", "event": id, "note": null}),
        start + 5500,
    );
    tracker.on_actions().await.unwrap();
    let messages = queued(&store).await;
    let [.., status, summary] = messages.as_slice() else {
        panic!("{messages:?}")
    };
    assert_eq!(
        (status.message.kind, summary.message.kind),
        (Kind::Status, Kind::Summary)
    );
    assert_eq!(status.message.payload, summary.message.payload);
    let doc: serde_json::Value = serde_json::from_str(&summary.message.payload).unwrap();
    assert_eq!(doc["events"][0]["state"], "closed");
    close(tracker, store).await;
}
