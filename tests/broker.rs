//! A real MQTT broker for the tests: Debian's `mosquitto`, started on a
//! free loopback port with a fixed configuration generated here, and
//! `mosquitto_sub` (Debian's `mosquitto-clients`) as an independent client
//! to see what arrives.
//!
//! The API, for any test that needs a broker:
//!
//! * [`Broker::start`] with [`Options`]: anonymous by default; a password
//!   file with one user ([`Options::password`]); TLS on the same port with
//!   a CA and a server certificate for 127.0.0.1 made at start with the
//!   `openssl` command ([`Options::tls`]), and a client certificate
//!   required of every client ([`Options::client_certificate`]; one is
//!   made for the agent and the subscribers). Persistence is on (retained
//!   messages and persistent sessions survive [`Broker::restart`]), in the
//!   broker's own folder.
//! * [`Broker::stop`] (SIGTERM, waited for) and [`Broker::restart`] (the
//!   same config, the same port).
//! * [`Broker::mqtt_section`]: the `[mqtt]` section of a site config that
//!   reaches this broker, with its CA and its user's password file.
//! * [`Broker::subscribe`]: a `mosquitto_sub` child collecting
//!   [`Message`]s (topic, payload, retained flag), ready once it has seen
//!   its own probe; [`Broker::subscribe_persistent`] keeps its session (and
//!   the broker queues QoS 1 messages for it) across the broker's restart
//!   and its own reconnection.
//! * [`Broker::client_args`]: the connection arguments for
//!   `mosquitto_sub` and `mosquitto_pub`, credentials included.
//!
//! Without mosquitto (or openssl for TLS) a test says SKIPPED and passes,
//! unless LEAKTALLY_REQUIRE_MOSQUITTO=1 (which `.ci/run` sets once it has
//! installed the packages) makes that a failure.

use crate::util::{Scratch, free_port, skipped};
use std::fs;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc::{Receiver, RecvTimeoutError, channel};
use std::time::{Duration, Instant};

/// How long the broker may take to accept connections.
const STARTUP: Duration = Duration::from_secs(10);

/// What the broker asks of its clients.
#[derive(Debug, Clone, Default)]
pub struct Options {
    /// One user (name, password) in a password file; anonymous clients are
    /// then refused.
    pub password: Option<(String, String)>,
    /// TLS (only) on the port, with a CA made for the test.
    pub tls: bool,
    /// With TLS: clients must show a certificate from the test's CA; one
    /// is made for the agent and the subscribers.
    pub client_certificate: bool,
}

impl Options {
    pub fn password(mut self, user: &str, password: &str) -> Self {
        self.password = Some((user.to_owned(), password.to_owned()));
        self
    }

    pub fn tls(mut self) -> Self {
        self.tls = true;
        self
    }

    /// TLS, and a client certificate required of every client.
    pub fn client_certificate(mut self) -> Self {
        self.tls = true;
        self.client_certificate = true;
        self
    }
}

/// The CA and the server's certificate and key, PEM files.
#[derive(Debug, Clone)]
pub struct Certificates {
    pub ca: PathBuf,
    pub server_cert: PathBuf,
    pub server_key: PathBuf,
    /// A client's certificate and key, when the broker requires one.
    pub client: Option<(PathBuf, PathBuf)>,
}

/// A running (or stopped) mosquitto.
pub struct Broker {
    pub port: u16,
    pub options: Options,
    pub certificates: Option<Certificates>,
    /// The broker's folder: its config, password file, persistence, log.
    pub dir: PathBuf,
    config: PathBuf,
    child: Option<Child>,
}

/// One message a subscriber received.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Message {
    pub topic: String,
    pub payload: String,
    /// The retained flag as delivered: set for what the broker held when
    /// the subscription was made; clear on what was forwarded live.
    pub retained: bool,
}

/// Whether mosquitto (and, for TLS, openssl) is here; says SKIPPED when
/// not, and fails under LEAKTALLY_REQUIRE_MOSQUITTO=1.
pub fn available(test: &str, tls: bool) -> bool {
    let present = |program: &str, arg: &str| {
        Command::new(program)
            .arg(arg)
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status()
            .is_ok()
    };
    let mut missing = Vec::new();
    let broker = mosquitto();
    for (program, arg, package) in [
        (broker.to_str().unwrap_or("mosquitto"), "-h", "mosquitto"),
        ("mosquitto_sub", "--help", "mosquitto-clients"),
        ("mosquitto_passwd", "-h", "mosquitto"),
    ] {
        if !present(program, arg) {
            missing.push(package);
        }
    }
    if tls && !present("openssl", "version") {
        missing.push("openssl");
    }
    if missing.is_empty() {
        return true;
    }
    missing.dedup();
    let why = format!(
        "{} missing ('apt-get install -y {}' as root; .ci/run does)",
        missing.join(" and "),
        missing.join(" ")
    );
    assert!(
        std::env::var("LEAKTALLY_REQUIRE_MOSQUITTO").as_deref() != Ok("1"),
        "{test}: {why}, and LEAKTALLY_REQUIRE_MOSQUITTO=1"
    );
    skipped(test, &why);
    false
}

impl Broker {
    /// Writes the config (and the password file and certificates the
    /// options ask for) in `scratch`'s `broker` folder and starts the
    /// broker on a free loopback port; returns once it accepts connections.
    pub fn start(scratch: &Scratch, options: Options) -> Self {
        let dir = scratch.path("broker");
        fs::create_dir_all(&dir).unwrap();
        let port = free_port();
        let mut config = format!(
            "# leaktally's test broker (tests/broker.rs)\n\
             listener {port} 127.0.0.1\n\
             persistence true\n\
             persistence_location {dir}/\n\
             autosave_interval 1\n\
             max_queued_messages 100000\n\
             max_inflight_messages 100\n\
             log_dest file {dir}/mosquitto.log\n\
             log_type all\n",
            dir = dir.display()
        );
        // Run as root (CI), mosquitto would switch to its own user, who
        // cannot read this folder's files; keep the test's user.
        if is_root() {
            config += "user root\n";
        }
        match &options.password {
            Some((user, password)) => {
                let file = dir.join("passwords");
                let done = Command::new("mosquitto_passwd")
                    .args(["-b", "-c"])
                    .arg(&file)
                    .args([user, password])
                    .output()
                    .expect("running mosquitto_passwd");
                assert!(
                    done.status.success(),
                    "mosquitto_passwd: {}",
                    String::from_utf8_lossy(&done.stderr)
                );
                config += &format!("allow_anonymous false\npassword_file {}\n", file.display());
            }
            None => config += "allow_anonymous true\n",
        }
        let certificates = options
            .tls
            .then(|| make_certificates(&dir, options.client_certificate));
        if let Some(c) = &certificates {
            config += &format!(
                "cafile {}\ncertfile {}\nkeyfile {}\n",
                c.ca.display(),
                c.server_cert.display(),
                c.server_key.display()
            );
            if c.client.is_some() {
                config += "require_certificate true\n";
            }
        }
        let path = dir.join("mosquitto.conf");
        fs::write(&path, config).unwrap();
        let mut broker = Self {
            port,
            options,
            certificates,
            dir,
            config: path,
            child: None,
        };
        broker.launch();
        broker
    }

    /// `127.0.0.1:PORT`.
    pub fn address(&self) -> String {
        format!("127.0.0.1:{}", self.port)
    }

    fn launch(&mut self) {
        let log = fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(self.dir.join("mosquitto.stderr"))
            .unwrap();
        let child = Command::new(mosquitto())
            .arg("-c")
            .arg(&self.config)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .expect("starting mosquitto");
        self.child = Some(child);
        let deadline = Instant::now() + STARTUP;
        loop {
            if std::net::TcpStream::connect(("127.0.0.1", self.port)).is_ok() {
                return;
            }
            if let Some(Ok(Some(status))) = self.child.as_mut().map(Child::try_wait) {
                panic!("mosquitto exited ({status}):\n{}", self.log());
            }
            assert!(
                Instant::now() < deadline,
                "mosquitto did not listen within {STARTUP:?}:\n{}",
                self.log()
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// Stops the broker (SIGTERM, as systemd does: it saves its
    /// persistence) and waits for it to exit.
    pub fn stop(&mut self) {
        if let Some(mut child) = self.child.take() {
            let _ = Command::new("kill")
                .args(["-TERM", &child.id().to_string()])
                .status();
            let _ = child.wait();
        }
    }

    /// Starts it again with the same config on the same port.
    pub fn restart(&mut self) {
        self.stop();
        self.launch();
    }

    /// The broker's log (its config logs everything).
    pub fn log(&self) -> String {
        let mut text = fs::read_to_string(self.dir.join("mosquitto.log")).unwrap_or_default();
        text += &fs::read_to_string(self.dir.join("mosquitto.stderr")).unwrap_or_default();
        text
    }

    /// The `[mqtt]` section of a site config that reaches this broker:
    /// its address, its CA, its user with a password file (written beside
    /// the broker's), then `extra` lines.
    pub fn mqtt_section(&self, extra: &str) -> String {
        let mut section = format!("\n[mqtt]\nbroker = \"{}\"\n", self.address());
        if let Some(c) = &self.certificates {
            section += &format!("ca_file = '{}'\n", c.ca.display());
            if let Some((cert, key)) = &c.client {
                section += &format!(
                    "client_cert_file = '{}'\nclient_key_file = '{}'\n",
                    cert.display(),
                    key.display()
                );
            }
        }
        if let Some((user, password)) = &self.options.password {
            let file = self.dir.join("agent-password");
            fs::write(&file, format!("{password}\n")).unwrap();
            section += &format!(
                "username = \"{user}\"\npassword_file = '{}'\n",
                file.display()
            );
        }
        section += extra;
        section
    }

    /// The connection arguments of `mosquitto_sub` and `mosquitto_pub`
    /// for this broker, with its user's credentials when it has one.
    pub fn client_args(&self) -> Vec<String> {
        self.args(true)
    }

    fn args(&self, with_credentials: bool) -> Vec<String> {
        let mut args = vec![
            "-h".to_owned(),
            "127.0.0.1".to_owned(),
            "-p".to_owned(),
            self.port.to_string(),
        ];
        if let Some(c) = &self.certificates {
            args.push("--cafile".into());
            args.push(c.ca.display().to_string());
            if let Some((cert, key)) = &c.client {
                args.push("--cert".into());
                args.push(cert.display().to_string());
                args.push("--key".into());
                args.push(key.display().to_string());
            }
        }
        if let (Some((user, password)), true) = (&self.options.password, with_credentials) {
            args.extend(["-u".into(), user.clone(), "-P".into(), password.clone()]);
        }
        args
    }

    /// A subscriber to `filter` (QoS 1) with a clean session.
    pub fn subscribe(&self, filter: &str) -> Subscriber {
        Subscriber::start(self, filter, None)
    }

    /// A subscriber whose session (client id `id`) outlives its connection
    /// and the broker's restart: QoS 1 messages published while it is away
    /// wait for it.
    pub fn subscribe_persistent(&self, filter: &str, id: &str) -> Subscriber {
        Subscriber::start(self, filter, Some(id))
    }

    /// Tries to subscribe without credentials; returns `mosquitto_sub`'s
    /// exit status and what it printed.
    pub fn subscribe_anonymously(&self, filter: &str) -> (std::process::ExitStatus, String) {
        let out = Command::new("mosquitto_sub")
            .args(self.args(false))
            .args(["-t", filter, "-C", "1", "-W", "5"])
            .output()
            .expect("running mosquitto_sub");
        let text = String::from_utf8_lossy(&out.stdout).into_owned()
            + &String::from_utf8_lossy(&out.stderr);
        (out.status, text)
    }

    /// Publishes one message (QoS 1) with `mosquitto_pub`.
    pub fn publish(&self, topic: &str, payload: &str) {
        let done = Command::new("mosquitto_pub")
            .args(self.client_args())
            .args(["-q", "1", "-t", topic, "-m", payload])
            .output()
            .expect("running mosquitto_pub");
        assert!(
            done.status.success(),
            "mosquitto_pub: {}",
            String::from_utf8_lossy(&done.stderr)
        );
    }
}

impl Drop for Broker {
    fn drop(&mut self) {
        if let Some(mut child) = self.child.take() {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

/// A `mosquitto_sub` child and what it has received.
pub struct Subscriber {
    child: Child,
    lines: Receiver<String>,
    /// Everything received so far, in order, but the probes.
    pub received: Vec<Message>,
    probe: String,
}

/// The separator between the retained flag, the topic and the payload in
/// `mosquitto_sub`'s output (a control character no topic or JSON holds).
const SEP: char = '\u{1f}';

impl Subscriber {
    fn start(broker: &Broker, filter: &str, persistent: Option<&str>) -> Self {
        static NEXT: std::sync::atomic::AtomicU32 = std::sync::atomic::AtomicU32::new(0);
        let probe = format!(
            "leaktally-test/probe/{}-{}",
            std::process::id(),
            NEXT.fetch_add(1, std::sync::atomic::Ordering::Relaxed)
        );
        let mut command = Command::new("mosquitto_sub");
        command
            .args(broker.client_args())
            .args(["-q", "1", "-t", filter, "-t", &probe])
            .args(["-F", &format!("%r{SEP}%t{SEP}%p")]);
        if let Some(id) = persistent {
            command.args(["-c", "-i", id]);
        }
        let mut child = command
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .spawn()
            .expect("starting mosquitto_sub");
        let stdout = child.stdout.take().unwrap();
        let (tx, lines) = channel();
        std::thread::spawn(move || {
            for line in BufReader::new(stdout).lines().map_while(Result::ok) {
                if tx.send(line).is_err() {
                    break;
                }
            }
        });
        let mut subscriber = Self {
            child,
            lines,
            received: Vec::new(),
            probe,
        };
        // Subscribed once its own probe comes back.
        let deadline = Instant::now() + STARTUP;
        loop {
            broker.publish(&subscriber.probe, "probe");
            let until = Instant::now() + Duration::from_millis(500);
            while Instant::now() < until {
                if subscriber.collect(until - Instant::now()) {
                    return subscriber;
                }
            }
            assert!(
                Instant::now() < deadline,
                "mosquitto_sub did not subscribe within {STARTUP:?}:\n{}",
                broker.log()
            );
        }
    }

    /// Takes what arrived, waiting up to `wait` for the first line; true if
    /// a probe came.
    fn collect(&mut self, wait: Duration) -> bool {
        let mut probed = false;
        let mut next = self.lines.recv_timeout(wait);
        loop {
            match next {
                Ok(line) => {
                    let mut parts = line.splitn(3, SEP);
                    let (Some(retained), Some(topic), Some(payload)) =
                        (parts.next(), parts.next(), parts.next())
                    else {
                        panic!("mosquitto_sub printed {line:?}");
                    };
                    if topic == self.probe {
                        probed = true;
                    } else {
                        self.received.push(Message {
                            topic: topic.to_owned(),
                            payload: payload.to_owned(),
                            retained: retained == "1",
                        });
                    }
                }
                Err(RecvTimeoutError::Timeout) => return probed,
                Err(RecvTimeoutError::Disconnected) => return probed,
            }
            next = self.lines.try_recv().map_err(|_| RecvTimeoutError::Timeout);
        }
    }

    /// Collects until `done` holds for what was received, failing the test
    /// after `limit`.
    pub fn wait_for(
        &mut self,
        what: &str,
        limit: Duration,
        mut done: impl FnMut(&[Message]) -> bool,
    ) -> &[Message] {
        let deadline = Instant::now() + limit;
        loop {
            if done(&self.received) {
                return &self.received;
            }
            assert!(
                Instant::now() < deadline,
                "gave up waiting for {what} after {limit:?}; received {} messages",
                self.received.len()
            );
            self.collect(Duration::from_millis(200));
        }
    }
}

impl Drop for Subscriber {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// The broker's program: on the PATH, or where Debian puts it (/usr/sbin,
/// which a user's PATH may lack).
pub fn mosquitto() -> PathBuf {
    let sbin = Path::new("/usr/sbin/mosquitto");
    let on_path = std::env::var_os("PATH").is_some_and(|path| {
        std::env::split_paths(&path).any(|dir| dir.join("mosquitto").is_file())
    });
    if !on_path && sbin.is_file() {
        sbin.to_owned()
    } else {
        PathBuf::from("mosquitto")
    }
}

fn is_root() -> bool {
    Command::new("id")
        .arg("-u")
        .output()
        .is_ok_and(|o| String::from_utf8_lossy(&o.stdout).trim() == "0")
}

/// A CA and a server certificate it signed, for 127.0.0.1 and localhost,
/// and a client certificate when asked, made with the `openssl` command as
/// an operator would.
fn make_certificates(dir: &Path, client: bool) -> Certificates {
    let openssl = |args: &[&str]| {
        let done = Command::new("openssl")
            .args(args)
            .current_dir(dir)
            .output()
            .expect("running openssl");
        assert!(
            done.status.success(),
            "openssl {args:?}: {}",
            String::from_utf8_lossy(&done.stderr)
        );
    };
    openssl(&[
        "req",
        "-x509",
        "-newkey",
        "ec",
        "-pkeyopt",
        "ec_paramgen_curve:P-256",
        "-nodes",
        "-keyout",
        "ca.key",
        "-out",
        "ca.pem",
        "-days",
        "2",
        "-subj",
        "/CN=leaktally test CA",
    ]);
    openssl(&[
        "req",
        "-newkey",
        "ec",
        "-pkeyopt",
        "ec_paramgen_curve:P-256",
        "-nodes",
        "-keyout",
        "server.key",
        "-out",
        "server.csr",
        "-subj",
        "/CN=127.0.0.1",
    ]);
    fs::write(
        dir.join("server.ext"),
        "subjectAltName = IP:127.0.0.1, DNS:localhost\nbasicConstraints = CA:FALSE\nkeyUsage = digitalSignature\nextendedKeyUsage = serverAuth\n",
    )
    .unwrap();
    openssl(&[
        "x509",
        "-req",
        "-in",
        "server.csr",
        "-CA",
        "ca.pem",
        "-CAkey",
        "ca.key",
        "-CAcreateserial",
        "-out",
        "server.pem",
        "-days",
        "2",
        "-extfile",
        "server.ext",
    ]);
    let client = client.then(|| {
        openssl(&[
            "req", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes", "-keyout",
            "client.key", "-out", "client.csr", "-subj", "/CN=leaktally-agent",
        ]);
        fs::write(
            dir.join("client.ext"),
            "basicConstraints = CA:FALSE\nkeyUsage = digitalSignature\nextendedKeyUsage = clientAuth\n",
        )
        .unwrap();
        openssl(&[
            "x509", "-req", "-in", "client.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
            "-CAcreateserial", "-out", "client.pem", "-days", "2", "-extfile", "client.ext",
        ]);
        (dir.join("client.pem"), dir.join("client.key"))
    });
    Certificates {
        ca: dir.join("ca.pem"),
        server_cert: dir.join("server.pem"),
        server_key: dir.join("server.key"),
        client,
    }
}
