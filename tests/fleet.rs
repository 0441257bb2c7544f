//! `leaktally fleet` end to end, against a real broker (Debian's
//! mosquitto, started by the test on loopback with password
//! authentication and an access list): status documents that
//! `leaktally status EVENT --json` printed from a site's database are
//! published retained with `mosquitto_pub`, as a site's agent would, and
//! the view's `/api/fleet` must hold each site's figures bit for bit,
//! ignore an older document published after a newer one, and close an event
//! on its summary. A view given wrong credentials, or no broker at all,
//! keeps running, says why, and connects once the broker is there.
//!
//! The broker harness here is this file's own, small one; the publisher's
//! tests have theirs (tests/broker.rs once merged).
//!
//! Without mosquitto (and mosquitto_pub) the tests say SKIPPED and pass,
//! unless LEAKTALLY_REQUIRE_MOSQUITTO=1 (which `.ci/run` sets once it has
//! installed them) makes that a failure.

use crate::util::{Scratch, Server, binary, free_port, http, leaktally, skipped, wait_for};
use leaktally::acquire::sample::{Reading, TankSample};
use leaktally::estimate::LeakParams;
use leaktally::estimator::Estimator;
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::Duration;

/// How long the view may take to show what was published.
const SHOWN_WITHIN: Duration = Duration::from_secs(20);

const SITE: &str = r#"[site]
name = "Fennick Flats"
[[device]]
id = "d1"
address = "127.0.0.1:1502"
[[tank]]
id = "FF-T12"
device = "d1"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0, reportable_kg = [50.0, 5000.0] }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }
"#;

/// A mosquitto on loopback with two users: `fleet` (reads `leaktally/#`)
/// and `site-a` (writes under `leaktally/site-a/`); nobody else.
struct Broker {
    child: Child,
    port: u16,
}

impl Broker {
    /// Starts it on `port`, or says SKIPPED and returns `None` without
    /// mosquitto (a failure under LEAKTALLY_REQUIRE_MOSQUITTO=1).
    fn start(test: &str, scratch: &Scratch, port: u16) -> Option<Self> {
        Self::start_with(test, scratch, port, "")
    }

    /// As [`Broker::start`], with more lines for the listener (TLS).
    fn start_with(test: &str, scratch: &Scratch, port: u16, listener: &str) -> Option<Self> {
        let present = ["mosquitto_passwd", "mosquitto_pub"].iter().all(|tool| {
            Command::new("sh")
                .args(["-c", &format!("command -v {tool}")])
                .stdout(Stdio::null())
                .status()
                .is_ok_and(|s| s.success())
        }) && Path::new("/usr/sbin/mosquitto").exists();
        if !present {
            let why = "mosquitto is missing ('apt-get install -y mosquitto mosquitto-clients' as root; .ci/run does)";
            assert!(
                std::env::var("LEAKTALLY_REQUIRE_MOSQUITTO").as_deref() != Ok("1"),
                "{test}: {why}, and LEAKTALLY_REQUIRE_MOSQUITTO=1"
            );
            skipped(test, why);
            return None;
        }
        let passwords = scratch.path("passwords");
        if !passwords.exists() {
            for (n, (user, password)) in [("fleet", "fleet-secret"), ("site-a", "site-secret")]
                .iter()
                .enumerate()
            {
                let mut cmd = Command::new("mosquitto_passwd");
                cmd.arg("-b");
                if n == 0 {
                    cmd.arg("-c");
                }
                let done = cmd.arg(&passwords).args([user, password]).status().unwrap();
                assert!(done.success(), "mosquitto_passwd: {done}");
            }
        }
        let acl = scratch.write(
            "acl",
            "user fleet\ntopic read leaktally/#\n\nuser site-a\ntopic readwrite leaktally/site-a/#\n",
        );
        let config = scratch.write(
            "mosquitto.conf",
            &format!(
                "listener {port} 127.0.0.1\n{listener}allow_anonymous false\npassword_file {}\nacl_file {}\npersistence false\nlog_dest stderr\nuser root\n",
                passwords.display(),
                acl.display()
            ),
        );
        let child = Command::new("/usr/sbin/mosquitto")
            .arg("-c")
            .arg(&config)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(scratch.path("mosquitto.stderr")).unwrap())
            .spawn()
            .expect("starting mosquitto");
        let broker = Self { child, port };
        wait_for("mosquitto to listen", SHOWN_WITHIN, || {
            std::net::TcpStream::connect(("127.0.0.1", port)).is_ok()
        });
        Some(broker)
    }

    /// Publishes `file`'s bytes on `topic`, retained, QoS 1, as site-a.
    fn publish(&self, topic: &str, file: &Path) {
        let done = Command::new("mosquitto_pub")
            .args(["-h", "127.0.0.1", "-p", &self.port.to_string()])
            .args(["-u", "site-a", "-P", "site-secret", "-q", "1", "-r"])
            .args(["-t", topic, "-f"])
            .arg(file)
            .output()
            .unwrap();
        assert!(
            done.status.success(),
            "mosquitto_pub {topic}: {}",
            String::from_utf8_lossy(&done.stderr)
        );
    }
}

impl Drop for Broker {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A site's database with one event on FF-T12, and its estimates a second
/// apart, stored a slice at a time.
struct SiteDb {
    db: PathBuf,
    estimates: Vec<leaktally::estimate::Estimate>,
}

impl SiteDb {
    fn new(scratch: &Scratch) -> Self {
        let config = leaktally::config::parse(SITE, Path::new("site.toml")).unwrap();
        let db = scratch.path("site.db");
        let conn = leaktally::store::open_read_write(&db).unwrap();
        leaktally::store::register_tanks(&conn, ["FF-T12"]).unwrap();
        let start = crate::util::now_ms() - 125_000;
        let params = LeakParams {
            hole_diameter_m: Some(0.04),
            hole_height_m: 0.3,
            cd: 0.61,
            density_kg_m3: None,
            ..LeakParams::default()
        };
        let id = leaktally::store::create_event(&conn, "FF-T12", start, start, "operator", &params)
            .unwrap();
        assert_eq!(id, 1);
        let mut estimator = Estimator::new(&config.tanks[0], params, start, 1000).unwrap();
        let estimates = (0..120)
            .filter_map(|i| {
                estimator.push_and_estimate(&TankSample {
                    tank: 0,
                    tank_id: "FF-T12".into(),
                    at_ms: start + 1000 * i,
                    level: Reading::good(4.2 - 0.0008 * i as f64),
                    pressure: None,
                    transfer: None,
                    temperature: None,
                    leak_flag: None,
                })
            })
            .collect();
        Self { db, estimates }
    }

    fn store(&self, range: std::ops::Range<usize>) {
        let conn = leaktally::store::open_read_write(&self.db).unwrap();
        leaktally::store::insert_estimates(&conn, 1, 1, &self.estimates[range]).unwrap();
    }

    fn close(&self, at_ms: i64) {
        let conn = leaktally::store::open_read_write(&self.db).unwrap();
        leaktally::store::close_event(&conn, 1, at_ms).unwrap();
    }

    /// `leaktally status 1 --json`, written to `name` in the scratch folder.
    fn status(&self, scratch: &Scratch, name: &str) -> (PathBuf, Value) {
        let done = leaktally(scratch, &self.db, &["status", "1", "--json"]);
        // 4: no daemon runs on this database, which changes nothing here.
        assert!(matches!(done.status.code(), Some(0 | 4)), "{}", done.stderr);
        let doc: Value = serde_json::from_str(&done.stdout).unwrap();
        (scratch.write(name, &done.stdout), doc)
    }
}

/// `leaktally fleet` with `args`, and the address of its page.
fn start_view(scratch: &Scratch, name: &'static str, args: &[&str]) -> (Server, String) {
    let stderr = scratch.path(&format!("{name}.stderr"));
    let view = Server::start(
        name,
        Command::new(binary("leaktally"))
            .arg("fleet")
            .args(args)
            .args(["--listen", "127.0.0.1:0"]),
        stderr.clone(),
    );
    let mut address = String::new();
    wait_for("the view to listen", SHOWN_WITHIN, || {
        let log = std::fs::read_to_string(&stderr).unwrap_or_default();
        log.split("fleet view on http://")
            .nth(1)
            .and_then(|rest| rest.split_once('/'))
            .map(|(a, _)| address = a.to_owned())
            .is_some()
    });
    (view, address)
}

fn fleet_json(address: &str) -> Value {
    let reply = http(address, "GET", "/api/fleet").unwrap();
    assert_eq!(reply.status, 200, "{}", reply.body);
    serde_json::from_str(&reply.body).unwrap()
}

/// Waits until `/api/fleet` satisfies `ready`, and returns it.
fn fleet_when(address: &str, what: &str, ready: impl Fn(&Value) -> bool) -> Value {
    let mut last = Value::Null;
    wait_for(what, SHOWN_WITHIN, || {
        last = fleet_json(address);
        ready(&last)
    });
    last
}

fn password_file(scratch: &Scratch, password: &str) -> String {
    let path = scratch.write(&format!("password-{password}"), &format!("{password}\n"));
    path.display().to_string()
}

#[test]
fn the_view_shows_each_sites_documents_once_in_order_and_closes_on_the_summary() {
    let test = "fleet::the_view_shows_each_sites_documents_once_in_order_and_closes_on_the_summary";
    let scratch = Scratch::new("fleet-e2e");
    let Some(broker) = Broker::start(test, &scratch, free_port()) else {
        return;
    };
    let site = SiteDb::new(&scratch);
    site.store(0..60);
    let (first, _) = site.status(&scratch, "first.json");
    site.store(60..120);
    let (second, second_doc) = site.status(&scratch, "second.json");
    // As the agent publishes it (agent/src/publish/topics.rs).
    let state = scratch.write("state.txt", "online");
    broker.publish("leaktally/site-a/state", &state);
    broker.publish("leaktally/site-a/events/1/status", &first);
    broker.publish("leaktally/site-a/events/1/status", &second);

    // The view starts after: it learns everything from the retained
    // documents.
    let port = broker.port.to_string();
    let password = password_file(&scratch, "fleet-secret");
    let (mut view, address) = start_view(
        &scratch,
        "leaktally fleet",
        &[
            "--mqtt",
            &format!("127.0.0.1:{port}"),
            "--username",
            "fleet",
            "--password-file",
            &password,
        ],
    );
    let expected = &second_doc["events"][0]["estimate"];
    let doc = fleet_when(&address, "the second document", |d| {
        d["events"][0]["estimate"]["at_ms"] == expected["at_ms"]
    });
    assert_eq!(doc["format"], 1);
    assert_eq!(doc["broker"]["connected"], true, "{doc}");
    let event = &doc["events"][0];
    assert_eq!(
        (event["site"].as_str(), event["event"].as_i64()),
        (Some("site-a"), Some(1))
    );
    for field in [
        "released_best_kg",
        "released_low_kg",
        "released_high_kg",
        "rate_best_kg_s",
    ] {
        assert_eq!(event["estimate"][field], expected[field], "{field}");
        assert!(expected[field].as_f64().is_some_and(|x| x > 0.0), "{field}");
    }
    let site_view = &doc["sites"][0];
    assert_eq!(
        (site_view["site"].as_str(), site_view["state"].as_str()),
        (Some("site-a"), Some("online"))
    );

    // The first document again, live (a late duplicate): ignored.
    broker.publish("leaktally/site-a/events/1/status", &first);
    let doc = fleet_when(&address, "the late duplicate counted", |d| {
        d["messages"]["older_or_duplicate"].as_u64() >= Some(1)
    });
    assert_eq!(doc["events"][0]["estimate"]["at_ms"], expected["at_ms"]);

    // The summary closes it.
    site.close(site.estimates[119].at_ms);
    let (summary, summary_doc) = site.status(&scratch, "summary.json");
    broker.publish("leaktally/site-a/events/1/summary", &summary);
    let doc = fleet_when(&address, "the event closed", |d| {
        d["events"].as_array().is_some_and(Vec::is_empty)
            && d["closed"].as_array().is_some_and(|c| c.len() == 1)
    });
    let closed = &doc["closed"][0];
    assert_eq!(closed["state"], "closed");
    assert_eq!(
        closed["closed_at_ms"],
        summary_doc["events"][0]["closed_at_ms"]
    );
    assert_eq!(
        closed["estimate"]["released_best_kg"],
        summary_doc["events"][0]["estimate"]["released_best_kg"]
    );
    // The page shows the site, and the caution.
    let page = http(&address, "GET", "/").unwrap().body;
    assert!(
        page.contains(r#"data-site="site-a""#) && page.contains("estimates for emergency planning")
    );
    assert!(doc["messages"]["malformed"] == 0, "{doc}");
    view.stop_cleanly();
}

#[test]
fn a_view_refused_or_without_a_broker_says_why_and_keeps_trying() {
    let test = "fleet::a_view_refused_or_without_a_broker_says_why_and_keeps_trying";
    let scratch = Scratch::new("fleet-e2e-refused");
    let port = free_port();
    // No broker yet: the view starts anyway and says so.
    let (mut view, address) = start_view(
        &scratch,
        "leaktally fleet",
        &[
            "--mqtt",
            &format!("127.0.0.1:{port}"),
            "--username",
            "fleet",
            "--password-file",
            &password_file(&scratch, "fleet-secret"),
        ],
    );
    let doc = fleet_when(&address, "the outage said", |d| {
        d["broker"]["error"].is_string()
    });
    assert_eq!(doc["broker"]["connected"], false);
    let why = doc["broker"]["error"].as_str().unwrap();
    assert!(
        why.contains("unreachable") && why.contains("--mqtt"),
        "{why}"
    );
    let page = http(&address, "GET", "/").unwrap().body;
    assert!(page.contains("Broker unreachable since"), "{page}");

    let Some(broker) = Broker::start(test, &scratch, port) else {
        return;
    };
    fleet_when(&address, "the view connected once the broker ran", |d| {
        d["broker"]["connected"] == true
    });

    // Wrong credentials: refused, said, and the view goes on.
    let (mut wrong, wrong_address) = start_view(
        &scratch,
        "leaktally fleet (wrong password)",
        &[
            "--mqtt",
            &format!("127.0.0.1:{}", broker.port),
            "--username",
            "fleet",
            "--password-file",
            &password_file(&scratch, "not-the-password"),
        ],
    );
    let doc = fleet_when(&wrong_address, "the refusal said", |d| {
        d["broker"]["error"].is_string()
    });
    let why = doc["broker"]["error"].as_str().unwrap();
    assert!(
        why.contains("refused the credentials")
            && why.contains("--username (fleet)")
            && why.contains("password-not-the-password"),
        "{why}"
    );
    assert!(wrong.child.try_wait().unwrap().is_none(), "the view exited");
    wrong.stop_cleanly();

    view.stop_cleanly();
}

/// A CA, and a certificate it signed for 127.0.0.1, made with openssl;
/// `None` (SKIPPED) without openssl. Returns the CA's file.
fn certificates(test: &str, scratch: &Scratch, name: &str) -> Option<PathBuf> {
    let openssl = |args: &[&str]| {
        Command::new("openssl")
            .args(args)
            .current_dir(&scratch.0)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status()
            .is_ok_and(|s| s.success())
    };
    if !openssl(&["version"]) {
        let why =
            "openssl is missing, to make the test's certificates ('apt-get install -y openssl')";
        assert!(
            std::env::var("LEAKTALLY_REQUIRE_MOSQUITTO").as_deref() != Ok("1"),
            "{test}: {why}, and LEAKTALLY_REQUIRE_MOSQUITTO=1"
        );
        skipped(test, why);
        return None;
    }
    scratch.write("san.ext", "subjectAltName=IP:127.0.0.1,DNS:localhost\n");
    let (ca_key, ca) = (format!("{name}-ca.key"), format!("{name}-ca.pem"));
    let (key, csr, cert) = (
        format!("{name}-server.key"),
        format!("{name}-server.csr"),
        format!("{name}-server.pem"),
    );
    for args in [
        &[
            "req",
            "-x509",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-keyout",
            &ca_key,
            "-out",
            &ca,
            "-days",
            "2",
            "-subj",
            "/CN=leaktally test CA",
        ][..],
        &[
            "req",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-keyout",
            &key,
            "-out",
            &csr,
            "-subj",
            "/CN=127.0.0.1",
        ][..],
        &[
            "x509",
            "-req",
            "-in",
            &csr,
            "-CA",
            &ca,
            "-CAkey",
            &ca_key,
            "-CAcreateserial",
            "-out",
            &cert,
            "-days",
            "2",
            "-extfile",
            "san.ext",
        ][..],
    ] {
        assert!(openssl(args), "openssl {args:?} failed");
    }
    Some(scratch.path(&ca))
}

#[test]
fn tls_with_the_brokers_ca_connects_and_another_ca_is_said() {
    let test = "fleet::tls_with_the_brokers_ca_connects_and_another_ca_is_said";
    let scratch = Scratch::new("fleet-e2e-tls");
    let Some(ca) = certificates(test, &scratch, "broker") else {
        return;
    };
    let Some(other_ca) = certificates(test, &scratch, "other") else {
        return;
    };
    let listener = format!(
        "cafile {}\ncertfile {}\nkeyfile {}\n",
        ca.display(),
        scratch.path("broker-server.pem").display(),
        scratch.path("broker-server.key").display()
    );
    let Some(broker) = Broker::start_with(test, &scratch, free_port(), &listener) else {
        return;
    };
    let mqtt = format!("127.0.0.1:{}", broker.port);
    let password = password_file(&scratch, "fleet-secret");
    let args = |ca: &Path| {
        vec![
            "--mqtt".to_owned(),
            mqtt.clone(),
            "--tls-ca".to_owned(),
            ca.display().to_string(),
            "--username".to_owned(),
            "fleet".to_owned(),
            "--password-file".to_owned(),
            password.clone(),
        ]
    };
    let right = args(&ca);
    let right: Vec<&str> = right.iter().map(String::as_str).collect();
    let (mut view, address) = start_view(&scratch, "leaktally fleet (TLS)", &right);
    fleet_when(&address, "the view connected over TLS", |d| {
        d["broker"]["connected"] == true
    });
    view.stop_cleanly();

    let wrong = args(&other_ca);
    let wrong: Vec<&str> = wrong.iter().map(String::as_str).collect();
    let (mut view, address) = start_view(&scratch, "leaktally fleet (another CA)", &wrong);
    let doc = fleet_when(&address, "the TLS failure said", |d| {
        d["broker"]["error"].is_string()
    });
    let why = doc["broker"]["error"].as_str().unwrap();
    assert!(
        why.contains("TLS with the broker at") && why.contains("other-ca.pem"),
        "{why}"
    );
    view.stop_cleanly();
}
