//! The per-message costs of MQTT publishing, for the sizing in
//! BENCHMARKS.md ("MQTT: per-message costs and a fleet on paper"):
//!
//!     cargo run --release -p leaktally --example mqtt_cost -- [MESSAGES] [RUNS]
//!
//! Needs Debian's `mosquitto` (started here, on a free loopback port, with
//! a fixed minimal config and no persistence). It measures, and prints:
//!
//! 1. the size of an event's status document (the payload of
//!    `.../events/ID/status`), built by the daemon's own code from an
//!    estimate of FF-T12 of config/demo.toml ten minutes into a leak, and
//!    of a reading (`.../tanks/TANK/reading`: the line `leaktally poll`
//!    prints);
//! 2. the outbox's insert cost: MESSAGES status documents put in the
//!    outbox 100 to a transaction (a tick's commit carries its messages),
//!    the database in WAL mode with `synchronous = FULL` as the daemon's;
//! 3. the publisher's throughput: MESSAGES status documents in the outbox,
//!    the daemon's own publisher started, and the time until one
//!    subscriber (QoS 1) has received them all and the outbox is empty:
//!    read, publish at QoS 1, PUBACK, delete, and the broker's delivery.
//!
//! Each figure is the median of RUNS runs (default MESSAGES 20000, RUNS 5).

use leaktally::acquire::sample::{Reading, TankSample};
use leaktally::config::mqtt::Mqtt;
use leaktally::estimate::LeakParams;
use leaktally::estimator::Estimator;
use leaktally::publish::Publisher;
use leaktally::report::Presentation;
use leaktally::store::outbox::{Kind, Message, OutboxState};
use leaktally::store::{EventRow, Lane, Store};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::Arc;
use std::time::{Duration, Instant};

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let messages: usize = args.get(1).map_or(Ok(20_000), |a| a.parse())?;
    let runs: usize = args.get(2).map_or(Ok(5), |a| a.parse())?;
    let dir = std::env::temp_dir().join(format!("leaktally-mqtt-cost-{}", std::process::id()));
    std::fs::create_dir_all(&dir)?;

    let (doc, reading) = documents()?;
    println!(
        "status document: {} bytes; reading line: {} bytes",
        doc.len(),
        reading.len()
    );

    // Building and serialising a document, as the tracker does per estimate.
    let (row, estimate, people) = parts()?;
    let mut builds = Vec::new();
    for _ in 0..runs {
        let began = Instant::now();
        let n = 10_000;
        let mut bytes = 0;
        for i in 0..n {
            let doc = leaktally::status::published(
                &row,
                Some(estimate.clone()),
                None,
                estimate.at_ms + i,
                10_000,
                &people,
            );
            bytes += serde_json::to_string(&doc)?.len();
        }
        std::hint::black_box(bytes);
        builds.push(began.elapsed().as_secs_f64() / n as f64);
    }
    println!(
        "building and serialising a status document: {:.1} us (median of {runs})",
        median(&mut builds) * 1e6
    );

    let mut inserts = Vec::new();
    let mut marginal = Vec::new();
    for run in 0..runs {
        let db = dir.join(format!("insert-{run}.db"));
        let conn = leaktally::store::open_read_write(&db)?;
        let message = status(&doc);
        let batch: Vec<Message> = (0..100).map(|_| message.clone()).collect();
        let began = Instant::now();
        for _ in 0..messages.div_ceil(100) {
            let tx = conn.unchecked_transaction()?;
            leaktally::store::outbox::enqueue(&tx, &batch, usize::MAX)?;
            tx.commit()?;
        }
        inserts.push(began.elapsed().as_secs_f64() / (messages.div_ceil(100) * 100) as f64);
        // All in one transaction: the insert alone, the commit's fsync
        // spread to nothing (the daemon's tick commits anyway).
        let all: Vec<Message> = (0..messages).map(|_| message.clone()).collect();
        let began = Instant::now();
        let tx = conn.unchecked_transaction()?;
        leaktally::store::outbox::enqueue(&tx, &all, usize::MAX)?;
        tx.commit()?;
        marginal.push(began.elapsed().as_secs_f64() / messages as f64);
    }
    println!(
        "outbox insert, 100 to a transaction: {:.1} us per message (median of {runs})",
        median(&mut inserts) * 1e6
    );
    println!(
        "outbox insert, all in one transaction: {:.1} us per message (median of {runs})",
        median(&mut marginal) * 1e6
    );

    let broker = Broker::start(&dir)?;
    let runtime = tokio::runtime::Runtime::new()?;
    let mut rates = Vec::new();
    for run in 0..runs {
        let db = dir.join(format!("publish-{run}.db"));
        let rate = runtime.block_on(publish_run(&db, broker.port, &doc, messages))?;
        println!("  run {}: {rate:.0} messages/s", run + 1);
        rates.push(rate);
    }
    println!(
        "publisher, QoS 1, one subscriber: {:.0} messages/s, {:.1} us per message (median of {runs}, {messages} messages each)",
        median(&mut rates.clone()),
        1e6 / median(&mut rates)
    );
    drop(broker);
    let _ = std::fs::remove_dir_all(&dir);
    Ok(())
}

/// A status document of FF-T12 ten minutes into a 10 mm leak, and a
/// reading line of it, as the daemon makes them.
fn documents() -> anyhow::Result<(String, String)> {
    let (row, estimate, people) = parts()?;
    let now = estimate.at_ms;
    let doc = leaktally::status::published(&row, Some(estimate), None, now, 10_000, &people);
    let sample = TankSample {
        tank: 0,
        tank_id: "FF-T12".into(),
        at_ms: now,
        level: Reading::good(4.1401),
        pressure: None,
        transfer: Some(Reading::good(0.0)),
        temperature: None,
        leak_flag: Some(Some(false)),
    };
    // FF-T12's index in config/demo.toml, so the line names its sensors.
    let config = leaktally::config::load(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"),
    )?;
    let sample = TankSample {
        tank: config
            .tanks
            .iter()
            .position(|t| t.id == "FF-T12")
            .unwrap_or(0),
        ..sample
    };
    let line = leaktally::acquire::line::Line::of(&sample, &config);
    Ok((serde_json::to_string(&doc)?, serde_json::to_string(&line)?))
}

/// The event's row, its estimate ten minutes in, and the site's
/// presentation.
fn parts() -> anyhow::Result<(EventRow, leaktally::estimate::Estimate, Presentation)> {
    let config = leaktally::config::load(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"),
    )?;
    let tank = config
        .tanks
        .iter()
        .find(|t| t.id == "FF-T12")
        .ok_or_else(|| anyhow::anyhow!("config/demo.toml has no FF-T12"))?;
    let start = 1_796_119_200_000i64;
    let params = LeakParams {
        hole_diameter_m: Some(0.01),
        hole_height_m: 0.3,
        cd: 0.61,
        ..LeakParams::default()
    };
    let mut estimator = Estimator::new(tank, params, start, 1000)?;
    for i in 0..600 {
        let s = TankSample {
            tank: 0,
            tank_id: "FF-T12".into(),
            at_ms: start + 1000 * i,
            level: Reading::good(4.2 - 0.0001 * i as f64),
            pressure: None,
            transfer: Some(Reading::good(0.0)),
            temperature: None,
            leak_flag: Some(Some(false)),
        };
        estimator.push(&s);
    }
    let estimate = estimator
        .estimate()
        .ok_or_else(|| anyhow::anyhow!("no estimate"))?;
    let row = EventRow {
        id: 1,
        tank: "FF-T12".into(),
        opened_at_ms: start,
        start_ms: start,
        closed_at_ms: None,
        source: "operator".into(),
        revision: 1,
        params,
    };
    Ok((row, estimate, Presentation::of(&config)))
}

fn status(doc: &str) -> Message {
    Message {
        kind: Kind::Status,
        event: Some(1),
        tank: Some("FF-T12".into()),
        at_ms: 0,
        payload: doc.to_owned(),
    }
}

/// One run of the publisher: fills the outbox, starts the publisher and a
/// subscriber, and returns messages per second until all arrived and the
/// outbox is empty.
async fn publish_run(db: &Path, port: u16, doc: &str, messages: usize) -> anyhow::Result<f64> {
    let store = Arc::new(Store::open(db)?);
    let message = status(doc);
    for _ in 0..messages.div_ceil(1000) {
        let batch: Vec<Message> = (0..1000).map(|_| message.clone()).collect();
        store
            .write(Lane::Urgent, move |tx| tx.enqueue(&batch, usize::MAX))
            .await?;
    }
    let total = messages.div_ceil(1000) * 1000;
    let mqtt = Mqtt {
        host: "127.0.0.1".into(),
        port,
        tls: false,
        ca_file: None,
        client_cert_file: None,
        client_key_file: None,
        username: None,
        password_file: None,
        client_id: format!("cost-{}", db.display()),
        topic_prefix: "leaktally".into(),
        site_id: "cost".into(),
        qos: 1,
        readings_every: None,
        outbox_limit: usize::MAX,
        keep_alive: Duration::from_secs(10),
    };
    // The subscriber, ready before the publisher starts.
    let mut options = rumqttc::MqttOptions::new(format!("sub-{}", db.display()), "127.0.0.1", port);
    options.set_max_packet_size(1 << 20, 1 << 20);
    let (client, mut eventloop) = rumqttc::AsyncClient::new(options, 100);
    client
        .subscribe("leaktally/cost/events/#", rumqttc::QoS::AtLeastOnce)
        .await?;
    loop {
        if let rumqttc::Event::Incoming(rumqttc::Packet::SubAck(_)) = eventloop.poll().await? {
            break;
        }
    }
    let state = Arc::new(OutboxState::configured());
    let stop = tokio_util::sync::CancellationToken::new();
    let publisher = Publisher {
        mqtt,
        store: Arc::clone(&store),
        state: Arc::clone(&state),
        bell: Arc::new(tokio::sync::Notify::new()),
    };
    let began = Instant::now();
    let task = tokio::spawn(publisher.run(stop.clone()));
    let mut received = 0;
    while received < total {
        if let rumqttc::Event::Incoming(rumqttc::Packet::Publish(_)) = eventloop.poll().await? {
            received += 1;
        }
    }
    while store.read(|r| r.outbox_depth()).await?.0 > 0 {
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    let took = began.elapsed().as_secs_f64();
    stop.cancel();
    let _ = task.await;
    if let Ok(store) = Arc::try_unwrap(store) {
        store.close(Duration::from_secs(5)).await;
    }
    Ok(total as f64 / took)
}

fn median(values: &mut [f64]) -> f64 {
    values.sort_by(f64::total_cmp);
    values[values.len() / 2]
}

/// mosquitto on a free loopback port, stopped when dropped.
struct Broker {
    port: u16,
    child: Child,
    _config: PathBuf,
}

impl Broker {
    fn start(dir: &Path) -> anyhow::Result<Self> {
        let port = std::net::TcpListener::bind("127.0.0.1:0")?
            .local_addr()?
            .port();
        let config = dir.join("mosquitto.conf");
        std::fs::write(
            &config,
            format!(
                "listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\nmax_queued_messages 1000000\nmax_inflight_messages 100\n"
            ),
        )?;
        // Debian puts it in /usr/sbin, which a user's PATH may lack.
        let program = if Path::new("/usr/sbin/mosquitto").is_file() {
            "/usr/sbin/mosquitto"
        } else {
            "mosquitto"
        };
        let child = Command::new(program)
            .arg("-c")
            .arg(&config)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .map_err(|e| anyhow::anyhow!("starting mosquitto (apt-get install mosquitto): {e}"))?;
        let deadline = Instant::now() + Duration::from_secs(10);
        while std::net::TcpStream::connect(("127.0.0.1", port)).is_err() {
            if Instant::now() > deadline {
                anyhow::bail!("mosquitto did not listen on {port}");
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        Ok(Self {
            port,
            child,
            _config: config,
        })
    }
}

impl Drop for Broker {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
