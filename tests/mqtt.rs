//! Publishing to a real MQTT broker (issue 18): the simulator, `leaktally
//! run` and mosquitto as real processes, what arrives seen by
//! `mosquitto_sub` (tests/broker.rs).
//!
//! An estimate is identified by (event, revision, sample time), the key a
//! subscriber dedupes QoS 1's repeats by; "every estimate" is every row of
//! figures the daemon stored for the event from its first published
//! document on (the rows an operator's `leak open` recomputes from the
//! history before that are stored in the same unit as the opening, not
//! published one by one).

use crate::broker::{self, Broker, Message, Options, Subscriber};
use crate::tracking::{Plant, event_id, three_leaks};
use crate::util::{LeakOpen, Server, free_port, http, wait_for, with_web};
use serde_json::Value;
use std::collections::BTreeSet;
use std::process::Command;
use std::time::Duration;

/// The site's topics under the default prefix: the demo site's name is
/// "Fairfield Fuel Terminal" or the like, slugged; read from the config.
fn site_topic(plant: &Plant) -> String {
    let config = leaktally::config::load(&plant.site).unwrap();
    let m = config.mqtt.unwrap();
    format!("{}/{}", m.topic_prefix, m.site_id)
}

/// A plant whose site publishes to `broker`, with `extra` `[mqtt]` lines
/// and its web page on a free port.
fn plant(label: &str, broker: &Broker, extra: &str) -> (Plant, String) {
    let web = format!("127.0.0.1:{}", free_port());
    let section = broker.mqtt_section(extra);
    let listen = web.clone();
    let plant = Plant::start_with(label, three_leaks(), move |site| {
        with_web(&site, &listen) + &section
    });
    (plant, web)
}

/// The state a state message says (`online` or `offline`), checked
/// against its layout: `{"format":1,"site":..,"state":..,"at":..,"at_ms":..}`.
fn state_of(payload: &str) -> String {
    let said: Value = serde_json::from_str(payload).expect("a JSON state message");
    assert_eq!(said["format"], 1, "{payload}");
    assert!(
        said["at_ms"].is_i64() && said["at"].is_string(),
        "{payload}"
    );
    said["state"].as_str().expect("a state").to_owned()
}

/// (event, revision, sample time) of a status document or summary.
fn key(payload: &str) -> (i64, i64, i64) {
    let doc: Value = serde_json::from_str(payload).expect("a JSON document");
    assert_eq!(doc["format"], 2, "{payload}");
    let event = &doc["events"][0];
    (
        event["event"].as_i64().unwrap(),
        event["revision"].as_i64().unwrap(),
        event["estimate"]["at_ms"].as_i64().unwrap_or(-1),
    )
}

/// The keys of `topic`'s messages, deduplicated, in the order of their
/// first arrival.
fn keys_on(messages: &[Message], topic: &str) -> Vec<(i64, i64, i64)> {
    let mut seen = BTreeSet::new();
    messages
        .iter()
        .filter(|m| m.topic == topic)
        .map(|m| key(&m.payload))
        .filter(|k| seen.insert(*k))
        .collect()
}

/// The sample times of the figures the daemon stored for the event's
/// revision 1.
fn stored_times(plant: &Plant, event: i64) -> Vec<i64> {
    let conn = leaktally::store::open_read_only(&plant.db).unwrap();
    leaktally::store::figures_of(&conn, event, 1)
        .unwrap()
        .iter()
        .map(|f| f.at_ms)
        .collect()
}

/// Messages waiting in the outbox, read from the database.
fn outbox_depth(plant: &Plant) -> i64 {
    let conn = rusqlite::Connection::open(&plant.db).unwrap();
    conn.query_row("SELECT COUNT(*) FROM outbox", [], |r| r.get(0))
        .unwrap()
}

/// A metric's value from the daemon's `/metrics`.
fn metric(web: &str, name: &str) -> Option<f64> {
    let reply = http(web, "GET", "/metrics").ok()?;
    reply.body.lines().find_map(|l| {
        let (n, v) = l.split_once(' ')?;
        (n == name).then(|| v.parse().ok())?
    })
}

/// The keys of estimates up to `at_ms` (the closed estimate's time).
fn until(keys: Vec<(i64, i64, i64)>, at_ms: i64) -> Vec<(i64, i64, i64)> {
    keys.into_iter().filter(|k| k.2 <= at_ms).collect()
}

/// Every stored estimate from the first published one on arrived, once
/// each after deduplication, in order.
fn assert_every_estimate_arrived(plant: &Plant, event: i64, keys: &[(i64, i64, i64)]) {
    assert!(!keys.is_empty(), "no status document of event {event}");
    let times: Vec<i64> = keys.iter().map(|k| k.2).collect();
    assert!(
        times.windows(2).all(|w| w[0] < w[1]),
        "status documents out of order: {times:?}"
    );
    assert!(keys.iter().all(|k| k.0 == event && k.1 == 1), "{keys:?}");
    let first = times[0];
    let last = *times.last().unwrap();
    let stored: Vec<i64> = stored_times(plant, event)
        .into_iter()
        .filter(|&t| t >= first && t <= last)
        .collect();
    assert_eq!(
        times, stored,
        "the published estimates are not the stored ones"
    );
}

fn kill_9(server: &mut Server) {
    let pid = server.child.id().to_string();
    assert!(
        Command::new("kill")
            .args(["-KILL", &pid])
            .status()
            .unwrap()
            .success()
    );
    let _ = server.child.wait();
}

/// The agent says it is online; an event's status documents arrive in
/// order, one per estimate, retained (a late subscriber gets the newest at
/// once); closing it publishes the summary; thinned readings arrive; and
/// when the daemon is killed the broker publishes its last will, offline.
#[test]
fn an_events_documents_arrive_in_order_then_its_summary_and_the_last_will_says_offline() {
    let test =
        "an_events_documents_arrive_in_order_then_its_summary_and_the_last_will_says_offline";
    if !broker::available(test, false) {
        return;
    }
    let scratch = crate::util::Scratch::new("mqtt-broker");
    let broker = Broker::start(&scratch, Options::default());
    let (plant, _web) = plant("mqtt-docs", &broker, "readings_every_s = 5\n");
    let site = site_topic(&plant);
    let mut all = broker.subscribe(&format!("{site}/#"));
    let mut daemon = plant.daemon("daemon");
    let state = format!("{site}/state");
    all.wait_for("online", Duration::from_secs(15), |m| {
        m.iter()
            .any(|m| m.topic == state && state_of(&m.payload) == "online")
    });
    let event = event_id(&plant.open_leak(LeakOpen::tank("FF-T12").hole(40.0, 0.3, 0.61)));
    let status = format!("{site}/events/{event}/status");
    all.wait_for("8 status documents", Duration::from_secs(30), |m| {
        keys_on(m, &status).len() >= 8
    });
    plant.ok(&["leak", "close", &event.to_string()]);
    let summary = format!("{site}/events/{event}/summary");
    let received = all
        .wait_for("the summary", Duration::from_secs(15), |m| {
            m.iter().any(|m| m.topic == summary)
        })
        .to_vec();

    // Every estimate up to the close, in order (a close drops the estimates
    // of samples after its time, which may have been published already);
    // the last status document is the closed one.
    let local = plant.status(Some(event));
    let closed_at = local["events"][0]["estimate"]["at_ms"].as_i64().unwrap();
    let keys = until(keys_on(&received, &status), closed_at);
    assert_every_estimate_arrived(&plant, event, &keys);
    let docs: Vec<Value> = received
        .iter()
        .filter(|m| m.topic == status || m.topic == summary)
        .map(|m| serde_json::from_str(&m.payload).unwrap())
        .collect();
    let last = docs.last().unwrap();
    assert_eq!(last["events"][0]["state"], "closed", "{last}");
    // The summary is the document `status EVENT --json` shows, figures and
    // all.
    for field in ["state", "revision", "closed_at_ms", "start_ms"] {
        assert_eq!(
            last["events"][0][field], local["events"][0][field],
            "{field}"
        );
    }
    assert_eq!(
        last["events"][0]["estimate"]["released_best_kg"],
        local["events"][0]["estimate"]["released_best_kg"]
    );
    assert_eq!(local["events"][0]["estimate"]["at_ms"], closed_at);
    // Thinned readings: each tank's first, then one per 5 s at most.
    let readings: Vec<&Message> = received
        .iter()
        .filter(|m| m.topic == format!("{site}/tanks/FF-T12/reading"))
        .collect();
    assert!(!readings.is_empty(), "no reading of FF-T12");
    let times: Vec<i64> = readings
        .iter()
        .map(|m| {
            serde_json::from_str::<Value>(&m.payload).unwrap()["at_ms"]
                .as_i64()
                .unwrap()
        })
        .collect();
    assert!(times.windows(2).all(|w| w[1] - w[0] >= 5000), "{times:?}");
    // The suspected-loss watch started afresh on each watched tank, and
    // says so (a broker may retain an alert from before a restart).
    let fresh: Vec<Value> = received
        .iter()
        .filter(|m| m.topic == format!("{site}/tanks/FF-T12/suspected_loss"))
        .map(|m| serde_json::from_str(&m.payload).unwrap())
        .collect();
    assert!(
        fresh
            .iter()
            .any(|d| d["state"] == "cleared" && d["reason"] == "watch_started"),
        "{fresh:?}"
    );

    // A late subscriber gets the newest documents at once, retained.
    let mut late = broker.subscribe(&format!("{site}/events/{event}/+"));
    let retained = late
        .wait_for("the retained documents", Duration::from_secs(5), |m| {
            m.len() >= 2
        })
        .to_vec();
    for m in &retained {
        assert!(m.retained, "{} not retained", m.topic);
        assert_eq!(key(&m.payload).2, closed_at, "{}", m.topic);
    }
    let mut state_late = broker.subscribe(&state);
    let now = state_late.wait_for("the state", Duration::from_secs(5), |m| !m.is_empty());
    assert_eq!(
        (state_of(&now[0].payload).as_str(), now[0].retained),
        ("online", true)
    );

    // Killed: the broker says offline for it (the last will), retained.
    kill_9(&mut daemon);
    all.wait_for("the last will", Duration::from_secs(15), |m| {
        m.last()
            .is_some_and(|m| m.topic == state && state_of(&m.payload) == "offline")
    });
    let mut after = broker.subscribe(&state);
    let now = after.wait_for("the state", Duration::from_secs(5), |m| !m.is_empty());
    assert_eq!(
        (state_of(&now[0].payload).as_str(), now[0].retained),
        ("offline", true)
    );
}

/// The broker is stopped for 30 s in the middle of an event and started
/// again: the agent goes on estimating, the page and the metrics say the
/// outbox holds what waits, and after the restart every estimate arrives,
/// in order, none lost, and the outbox drains to nothing.
#[test]
fn a_broker_stopped_for_30_s_loses_no_estimate_and_the_outbox_drains() {
    let test = "a_broker_stopped_for_30_s_loses_no_estimate_and_the_outbox_drains";
    if !broker::available(test, false) {
        return;
    }
    let scratch = crate::util::Scratch::new("mqtt-outage");
    let mut broker = Broker::start(&scratch, Options::default().password("depot", "s3cret"));
    let (plant, web) = plant("mqtt-outage", &broker, "");
    let site = site_topic(&plant);
    let mut sub: Subscriber =
        broker.subscribe_persistent(&format!("{site}/events/#"), "outage-watch");
    let _daemon = plant.daemon("daemon");
    let event = event_id(&plant.open_leak(LeakOpen::tank("FF-T14").hole(40.0, 0.2, 0.61)));
    let status = format!("{site}/events/{event}/status");
    sub.wait_for("3 status documents", Duration::from_secs(20), |m| {
        keys_on(m, &status).len() >= 3
    });
    wait_for("connected", Duration::from_secs(5), || {
        metric(&web, "leaktally_mqtt_connected") == Some(1.0)
    });

    broker.stop();
    std::thread::sleep(Duration::from_secs(30));
    // Still estimating, and saying so plainly.
    let waiting = metric(&web, "leaktally_mqtt_outbox_messages").unwrap();
    assert!(waiting >= 20.0, "{waiting} messages wait after 30 s");
    assert_eq!(metric(&web, "leaktally_mqtt_connected"), Some(0.0));
    let age = metric(&web, "leaktally_mqtt_outbox_oldest_age_seconds").unwrap();
    assert!((25.0..60.0).contains(&age), "the oldest waits for {age} s");
    assert!(outbox_depth(&plant) >= 20);
    let page = http(&web, "GET", "/").unwrap().body;
    assert!(
        page.contains(&format!(
            "The broker {} cannot be reached",
            broker.address()
        )) && page.contains(
            "wait to be sent, kept in the database and sent in order when the broker is back"
        ),
        "the page does not say the broker is out of reach"
    );

    broker.restart();
    wait_for("the outbox to drain", Duration::from_secs(30), || {
        metric(&web, "leaktally_mqtt_outbox_messages") == Some(0.0)
            && metric(&web, "leaktally_mqtt_connected") == Some(1.0)
    });
    let stored_now = *stored_times(&plant, event).last().unwrap();
    let received = sub
        .wait_for(
            "every estimate stored so far",
            Duration::from_secs(15),
            |m| {
                keys_on(m, &status)
                    .last()
                    .is_some_and(|k| k.2 >= stored_now)
            },
        )
        .to_vec();
    let keys = keys_on(&received, &status);
    assert!(keys.len() >= 35, "{} estimates arrived", keys.len());
    assert_every_estimate_arrived(&plant, event, &keys);
    // Nothing from before the drain waits any more (the daemon goes on
    // estimating, so the newest document may be in flight).
    assert_eq!(
        waiting_from_before(&plant, stored_now),
        Vec::<String>::new()
    );
    assert!(metric(&web, "leaktally_mqtt_dropped_total") == Some(0.0));
}

/// The outbox's messages from samples up to `at_ms`, as "kind at_ms".
fn waiting_from_before(plant: &Plant, at_ms: i64) -> Vec<String> {
    let conn = rusqlite::Connection::open(&plant.db).unwrap();
    let mut stmt = conn
        .prepare("SELECT kind, at_ms FROM outbox WHERE at_ms <= ?1 ORDER BY seq")
        .unwrap();
    stmt.query_map([at_ms], |r| {
        Ok(format!(
            "{} {}",
            r.get::<_, String>(0)?,
            r.get::<_, i64>(1)?
        ))
    })
    .unwrap()
    .map(Result::unwrap)
    .collect()
}

/// A daemon killed with SIGKILL while the broker is down keeps its unsent
/// messages in the database; started again once the broker is back, it
/// publishes them, in order, before what it estimates next.
#[test]
fn a_daemon_killed_while_the_broker_is_down_publishes_its_outbox_after_restart() {
    let test = "a_daemon_killed_while_the_broker_is_down_publishes_its_outbox_after_restart";
    if !broker::available(test, false) {
        return;
    }
    let scratch = crate::util::Scratch::new("mqtt-kill");
    let mut broker = Broker::start(&scratch, Options::default());
    let (plant, _web) = plant("mqtt-kill", &broker, "");
    let site = site_topic(&plant);
    let mut sub = broker.subscribe_persistent(&format!("{site}/events/#"), "kill-watch");
    let mut daemon = plant.daemon("daemon");
    let event = event_id(&plant.open_leak(LeakOpen::tank("FF-T20").hole(35.0, 0.5, 0.61)));
    let status = format!("{site}/events/{event}/status");
    sub.wait_for("2 status documents", Duration::from_secs(20), |m| {
        keys_on(m, &status).len() >= 2
    });
    broker.stop();
    std::thread::sleep(Duration::from_secs(8));
    kill_9(&mut daemon);
    let unsent = outbox_depth(&plant);
    assert!(unsent >= 5, "{unsent} messages in the outbox");
    let last_before_kill = *stored_times(&plant, event).last().unwrap();

    broker.restart();
    let _daemon = plant.daemon("daemon-again");
    let received = sub
        .wait_for("what waited", Duration::from_secs(30), |m| {
            keys_on(m, &status).iter().any(|k| k.2 > last_before_kill)
        })
        .to_vec();
    let keys = keys_on(&received, &status);
    assert_every_estimate_arrived(&plant, event, &keys);
    wait_for("the outbox to drain", Duration::from_secs(15), || {
        outbox_depth(&plant) == 0
    });
}

/// TLS (the broker's certificate from a CA made for the test, trusted by
/// `ca_file`) and a password from a file: the agent connects and
/// publishes; a client without credentials cannot subscribe.
#[test]
fn tls_and_a_password_carry_the_messages_and_a_client_without_credentials_is_refused() {
    let test = "tls_and_a_password_carry_the_messages_and_a_client_without_credentials_is_refused";
    if !broker::available(test, true) {
        return;
    }
    let scratch = crate::util::Scratch::new("mqtt-tls");
    let broker = Broker::start(
        &scratch,
        Options::default().tls().password("depot", "s3cret"),
    );
    let (plant, web) = plant("mqtt-tls", &broker, "");
    let site = site_topic(&plant);
    let mut sub = broker.subscribe(&format!("{site}/#"));
    let _daemon = plant.daemon("daemon");
    let event = event_id(&plant.open_leak(LeakOpen::tank("FF-T12").hole(40.0, 0.3, 0.61)));
    let status = format!("{site}/events/{event}/status");
    let received = sub.wait_for(
        "online and a status document",
        Duration::from_secs(20),
        |m| {
            m.iter()
                .any(|m| m.topic == format!("{site}/state") && state_of(&m.payload) == "online")
                && !keys_on(m, &status).is_empty()
        },
    );
    assert!(received.iter().all(|m| m.topic.starts_with(&site)));
    assert_eq!(metric(&web, "leaktally_mqtt_connected"), Some(1.0));

    let (exit, said) = broker.subscribe_anonymously(&format!("{site}/#"));
    assert!(!exit.success(), "an anonymous client subscribed: {said}");
    assert!(
        said.to_lowercase().contains("not authori"),
        "mosquitto_sub said: {said}"
    );
    // Nor does a client that does not trust the broker's CA connect (the
    // system's roots do not hold the test's CA).
    let out = Command::new("mosquitto_sub")
        .args(["-h", "127.0.0.1", "-p", &broker.port.to_string()])
        .args(["--capath", "/etc/ssl/certs", "-u", "depot", "-P", "s3cret"])
        .args(["-t", "#", "-C", "1", "-W", "3"])
        .output()
        .unwrap();
    assert!(!out.status.success());
}

/// A broker that wants a client certificate (from its CA) takes the
/// agent's, given by `client_cert_file` and `client_key_file`.
#[test]
fn a_broker_that_wants_a_client_certificate_takes_the_agents() {
    let test = "a_broker_that_wants_a_client_certificate_takes_the_agents";
    if !broker::available(test, true) {
        return;
    }
    let scratch = crate::util::Scratch::new("mqtt-client-cert");
    let broker = Broker::start(&scratch, Options::default().client_certificate());
    let (plant, web) = plant("mqtt-client-cert", &broker, "");
    let site = site_topic(&plant);
    let mut sub = broker.subscribe(&format!("{site}/state"));
    let _daemon = plant.daemon("daemon");
    sub.wait_for("online", Duration::from_secs(20), |m| {
        m.iter().any(|m| state_of(&m.payload) == "online")
    });
    assert_eq!(metric(&web, "leaktally_mqtt_connected"), Some(1.0));
    // Without one, a client trusting the CA is refused all the same.
    let ca = broker.certificates.as_ref().unwrap().ca.clone();
    let out = Command::new("mosquitto_sub")
        .args(["-h", "127.0.0.1", "-p", &broker.port.to_string()])
        .arg("--cafile")
        .arg(&ca)
        .args(["-t", "#", "-C", "1", "-W", "3"])
        .output()
        .unwrap();
    assert!(
        !out.status.success(),
        "a client without a certificate subscribed"
    );
}

/// Issue 18 end to end: two simulated sites publish through one broker to
/// `leaktally fleet`; the broker is stopped for 30 s in the middle of their
/// events and started again; every estimate still arrives (dedupe key, in
/// order, none lost), both outboxes drain, and once the events close the
/// view's final totals are each site's `status ID --json`, bit for bit.
#[test]
fn two_sites_through_a_broker_outage_and_the_fleet_view_matches_each_sites_status() {
    let test = "two_sites_through_a_broker_outage_and_the_fleet_view_matches_each_sites_status";
    if !broker::available(test, false) {
        return;
    }
    let scratch = crate::util::Scratch::new("mqtt-fleet");
    let mut broker = Broker::start(&scratch, Options::default().password("depot", "s3cret"));
    let (north, _) = plant("mqtt-north", &broker, "site_id = \"north\"\n");
    let (south, _) = plant("mqtt-south", &broker, "site_id = \"south\"\n");
    let mut sub = broker.subscribe_persistent("leaktally/+/events/#", "fleet-e2e-watch");
    let password = broker.dir.join("agent-password");
    let stderr = scratch.path("fleet.stderr");
    let _view = Server::start(
        "leaktally fleet",
        Command::new(crate::util::binary("leaktally"))
            .arg("fleet")
            .args(["--mqtt", &broker.address(), "--username", "depot"])
            .arg("--password-file")
            .arg(&password)
            .args(["--listen", "127.0.0.1:0"]),
        stderr.clone(),
    );
    let mut view = String::new();
    wait_for("the view to listen", Duration::from_secs(15), || {
        let log = std::fs::read_to_string(&stderr).unwrap_or_default();
        log.split("fleet view on http://")
            .nth(1)
            .and_then(|rest| rest.split_once('/'))
            .map(|(a, _)| view = a.to_owned())
            .is_some()
    });
    let fleet = |view: &str| -> Value {
        serde_json::from_str(&http(view, "GET", "/api/fleet").unwrap().body).unwrap()
    };

    let _north_daemon = north.daemon("daemon");
    let _south_daemon = south.daemon("daemon");
    let a = event_id(&north.open_leak(LeakOpen::tank("FF-T12").hole(40.0, 0.3, 0.61)));
    let b = event_id(&south.open_leak(LeakOpen::tank("FF-T20").hole(35.0, 0.5, 0.61)));
    wait_for(
        "both sites' events in the view",
        Duration::from_secs(30),
        || {
            let doc = fleet(&view);
            doc["events"].as_array().is_some_and(|e| e.len() == 2)
                && doc["sites"]
                    .as_array()
                    .is_some_and(|s| s.len() == 2 && s.iter().all(|s| s["state"] == "online"))
        },
    );

    broker.stop();
    std::thread::sleep(Duration::from_secs(30));
    assert!(outbox_depth(&north) >= 20 && outbox_depth(&south) >= 20);
    broker.restart();
    wait_for("both outboxes to drain", Duration::from_secs(40), || {
        outbox_depth(&north) == 0 && outbox_depth(&south) == 0
    });
    north.ok(&["leak", "close", &a.to_string()]);
    south.ok(&["leak", "close", &b.to_string()]);
    let doc = {
        let mut last = Value::Null;
        wait_for(
            "both events closed in the view",
            Duration::from_secs(30),
            || {
                last = fleet(&view);
                last["closed"].as_array().is_some_and(|c| c.len() == 2)
                    && last["events"].as_array().is_some_and(|e| e.is_empty())
            },
        );
        last
    };
    for (plant, site, event) in [(&north, "north", a), (&south, "south", b)] {
        let local = plant.status(Some(event));
        let local = &local["events"][0];
        let shown = doc["closed"]
            .as_array()
            .unwrap()
            .iter()
            .find(|e| e["site"] == site && e["event"] == event)
            .unwrap_or_else(|| panic!("{site} event {event} not in {doc}"));
        for field in ["revision", "closed_at_ms", "start_ms"] {
            assert_eq!(shown[field], local[field], "{site} {field}");
        }
        for field in [
            "at_ms",
            "released_best_kg",
            "released_low_kg",
            "released_high_kg",
            "rate_best_kg_s",
        ] {
            assert_eq!(
                shown["estimate"][field], local["estimate"][field],
                "{site} {field}"
            );
        }
        // And every estimate of the event arrived, in order, none lost.
        let status = format!("leaktally/{site}/events/{event}/status");
        let stored_last = *stored_times(plant, event).last().unwrap();
        let received = sub
            .wait_for("every estimate", Duration::from_secs(15), |m| {
                keys_on(m, &status).iter().any(|k| k.2 >= stored_last)
            })
            .to_vec();
        let closed_at = local["estimate"]["at_ms"].as_i64().unwrap();
        let keys = until(keys_on(&received, &status), closed_at);
        assert_every_estimate_arrived(plant, event, &keys);
    }
}
