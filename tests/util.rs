//! Helpers shared by the test modules.

use serde::de::DeserializeOwned;
use std::fs::{self, File};
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::atomic::{AtomicU32, Ordering};
use std::sync::mpsc::{Receiver, RecvTimeoutError, channel};
use std::time::{Duration, Instant};

/// The repository's root folder (the root package's manifest directory).
pub fn repo_root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Loads a JSON fixture from tests/fixtures.
pub fn fixture<T: DeserializeOwned>(name: &str) -> T {
    let path = repo_root().join("tests/fixtures").join(name);
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("reading {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("parsing {}: {e}", path.display()))
}

/// Relative error of `got` against `expected`.
pub fn rel_err(got: f64, expected: f64) -> f64 {
    if expected == 0.0 {
        got.abs()
    } else {
        ((got - expected) / expected).abs()
    }
}

/// Keeps the largest relative error seen and prints it at the end, so the
/// measured figures show with `cargo test -- --nocapture`.
pub struct WorstError {
    label: &'static str,
    worst: f64,
    at: String,
}

impl WorstError {
    pub fn new(label: &'static str) -> Self {
        Self {
            label,
            worst: 0.0,
            at: String::new(),
        }
    }

    /// Records one comparison and returns its relative error.
    pub fn record(&mut self, got: f64, expected: f64, at: impl FnOnce() -> String) -> f64 {
        let e = rel_err(got, expected);
        if e > self.worst || self.at.is_empty() {
            self.worst = e;
            self.at = at();
        }
        e
    }

    pub fn worst(&self) -> f64 {
        self.worst
    }
}

impl Drop for WorstError {
    fn drop(&mut self) {
        println!(
            "largest relative error, {}: {:.3e} ({})",
            self.label, self.worst, self.at
        );
    }
}

/// Says that a test skipped part or all of itself, and why, where the
/// person running the tests sees it: libtest captures what `println!` and
/// `eprintln!` print in a passing test and shows nothing of it, but a write
/// straight to the process's stderr is not captured, so the line shows in
/// a plain `cargo test` too. Every skip in tests/ goes through here, so
/// `grep SKIPPED` finds them all.
pub fn skipped(test: &str, why: &str) {
    use std::io::Write;
    let line = format!("SKIPPED: {test}: {why}\n");
    let _ = std::io::stderr().lock().write_all(line.as_bytes());
}

/// The path of one of the workspace's binaries (`leaktally`,
/// `leaktally-sim`), built on first use.
///
/// Cargo sets `CARGO_BIN_EXE_*` only for a package's own binaries, and these
/// tests live in the root package, so the first call runs `cargo build` for
/// both binaries (a no-op when they are fresh) with the cargo that runs the
/// tests, and later calls reuse the result.
pub fn binary(name: &str) -> PathBuf {
    static BUILT: std::sync::OnceLock<Result<PathBuf, String>> = std::sync::OnceLock::new();
    let dir = BUILT.get_or_init(|| {
        // The test executable sits in target/<profile>/deps/.
        let exe = std::env::current_exe().map_err(|e| e.to_string())?;
        let profile_dir = exe
            .parent()
            .and_then(|deps| deps.parent())
            .ok_or("cannot locate the target folder")?
            .to_owned();
        let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
        let mut build = std::process::Command::new(cargo);
        build.current_dir(repo_root()).args([
            "build",
            "--quiet",
            "-p",
            "leaktally",
            "-p",
            "leaktally-sim",
            "--bins",
        ]);
        if profile_dir.file_name().is_some_and(|p| p == "release") {
            build.arg("--release");
        }
        let status = build
            .status()
            .map_err(|e| format!("running cargo build: {e}"))?;
        if !status.success() {
            return Err(format!("cargo build of the binaries failed ({status})"));
        }
        Ok(profile_dir)
    });
    match dir {
        Ok(dir) => dir.join(name),
        Err(e) => panic!("{e}"),
    }
}

/// How long a server may take to print its `listening on` line.
pub const STARTUP: Duration = Duration::from_secs(10);
/// Longest any one command may run before the test gives up on it.
pub const COMMAND_LIMIT: Duration = Duration::from_secs(15);

/// A fresh folder under the system temp dir, removed when dropped unless
/// the test failed.
pub struct Scratch(pub PathBuf);

impl Scratch {
    pub fn new(label: &str) -> Self {
        static NEXT: AtomicU32 = AtomicU32::new(0);
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.subsec_nanos());
        let dir = std::env::temp_dir().join(format!(
            "leaktally-test-{label}-{}-{}-{nanos}",
            std::process::id(),
            NEXT.fetch_add(1, Ordering::Relaxed)
        ));
        fs::create_dir_all(&dir).unwrap_or_else(|e| panic!("creating {}: {e}", dir.display()));
        Self(dir)
    }

    pub fn path(&self, name: &str) -> PathBuf {
        self.0.join(name)
    }

    pub fn write(&self, name: &str, text: &str) -> PathBuf {
        let path = self.path(name);
        fs::write(&path, text).unwrap_or_else(|e| panic!("writing {}: {e}", path.display()));
        path
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        // A failed test keeps its folder (logs, database, truth) to look at.
        if std::thread::panicking() {
            eprintln!("kept {} for inspection", self.0.display());
        } else {
            let _ = fs::remove_dir_all(&self.0);
        }
    }
}

/// A long-running child (a server), killed when dropped. Its stdout lines
/// arrive on a channel from a thread that keeps draining the pipe, so the
/// child never blocks on a full pipe; its stderr goes to a file.
pub struct Server {
    pub name: &'static str,
    pub child: Child,
    pub lines: Receiver<String>,
    pub stderr: PathBuf,
}

impl Server {
    pub fn start(name: &'static str, command: &mut Command, stderr: PathBuf) -> Self {
        let err = File::create(&stderr).expect("creating the server's stderr file");
        let mut child = command
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(err)
            .spawn()
            .unwrap_or_else(|e| panic!("starting {name}: {e}"));
        let stdout = child.stdout.take().expect("piped stdout");
        let (tx, lines) = channel();
        std::thread::spawn(move || {
            for line in BufReader::new(stdout).lines().map_while(Result::ok) {
                if tx.send(line).is_err() {
                    break;
                }
            }
        });
        Self {
            name,
            child,
            lines,
            stderr,
        }
    }

    /// Waits for the `listening on HOST:PORT` line and returns HOST:PORT.
    pub fn address(&mut self) -> String {
        let deadline = Instant::now() + STARTUP;
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            match self.lines.recv_timeout(left) {
                Ok(line) => {
                    if let Some(address) = line.strip_prefix("listening on ") {
                        return address.trim().to_owned();
                    }
                }
                Err(RecvTimeoutError::Timeout) => panic!(
                    "{} printed no `listening on` line within {STARTUP:?}; its stderr:\n{}",
                    self.name,
                    self.stderr()
                ),
                Err(RecvTimeoutError::Disconnected) => panic!(
                    "{} exited before it listened ({:?}); its stderr:\n{}",
                    self.name,
                    self.child.try_wait(),
                    self.stderr()
                ),
            }
        }
    }

    /// Stops it as systemd does (SIGTERM), waits, and asserts that it
    /// exited 0; returns its log.
    pub fn stop_cleanly(&mut self) -> String {
        let pid = self.child.id().to_string();
        assert!(
            Command::new("kill")
                .args(["-TERM", &pid])
                .status()
                .unwrap()
                .success()
        );
        let exit = self.child.wait().unwrap();
        assert!(exit.success(), "the exit: {exit}\n{}", self.stderr());
        self.stderr()
    }

    pub fn stderr(&self) -> String {
        fs::read_to_string(&self.stderr).unwrap_or_default()
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// What a finished command printed.
pub struct Finished {
    pub status: ExitStatus,
    pub stdout: String,
    pub stderr: String,
}

/// Runs a command to completion with its output in files (so nothing can
/// block on a pipe), killing it after `COMMAND_LIMIT`.
pub fn run(name: &str, command: &mut Command, scratch: &Scratch) -> Finished {
    run_for(name, command, scratch, COMMAND_LIMIT)
}

/// Like [`run`], with a time limit of its own.
pub fn run_for(name: &str, command: &mut Command, scratch: &Scratch, limit: Duration) -> Finished {
    let out_path = scratch.path(&format!("{name}.stdout"));
    let err_path = scratch.path(&format!("{name}.stderr"));
    let mut child = command
        .stdin(Stdio::null())
        .stdout(File::create(&out_path).expect("creating a stdout file"))
        .stderr(File::create(&err_path).expect("creating a stderr file"))
        .spawn()
        .unwrap_or_else(|e| panic!("starting {name}: {e}"));
    let deadline = Instant::now() + limit;
    let status = loop {
        match child.try_wait().expect("waiting for a child") {
            Some(status) => break status,
            None if Instant::now() >= deadline => {
                let _ = child.kill();
                let _ = child.wait();
                panic!(
                    "{name} still ran after {limit:?}; its stderr:\n{}",
                    fs::read_to_string(&err_path).unwrap_or_default()
                );
            }
            None => std::thread::sleep(Duration::from_millis(20)),
        }
    };
    Finished {
        status,
        stdout: fs::read_to_string(&out_path).unwrap_or_default(),
        stderr: fs::read_to_string(&err_path).unwrap_or_default(),
    }
}

/// A TOML literal string holding a path (no escapes inside single quotes).
pub fn toml_path(path: &Path) -> String {
    let text = path.display().to_string();
    assert!(!text.contains('\''), "a path with a quote: {text}");
    format!("'{text}'")
}

/// The simulator's ground truth (its --truth CSV), by tank.
pub struct Truth {
    rows: std::collections::HashMap<String, Vec<TruthRow>>,
}

/// One truth row: UTC ms, level (m), headspace gauge (Pa), rate (kg/s),
/// released since the start (kg).
#[derive(Debug, Clone, Copy)]
pub struct TruthRow {
    pub at_ms: i64,
    pub level_m: f64,
    pub headspace_pa: f64,
    pub rate_kg_s: f64,
    pub released_kg: f64,
    pub leak_open: bool,
}

impl Truth {
    pub fn load(path: &Path) -> Self {
        let text =
            fs::read_to_string(path).unwrap_or_else(|e| panic!("reading {}: {e}", path.display()));
        let mut lines = text.lines();
        let header: Vec<&str> = lines.next().expect("a header").split(',').collect();
        let col = |name: &str| {
            header
                .iter()
                .position(|h| *h == name)
                .unwrap_or_else(|| panic!("no {name} column"))
        };
        let (utc, tank, level, headspace, rate, released, open) = (
            col("utc"),
            col("tank"),
            col("level_m"),
            col("headspace_pa"),
            col("rate_kg_s"),
            col("released_kg"),
            col("leak_open"),
        );
        let mut rows: std::collections::HashMap<String, Vec<TruthRow>> = Default::default();
        for line in lines {
            let f: Vec<&str> = line.split(',').collect();
            if f.len() < header.len() {
                continue; // a row being written as we read
            }
            let num = |i: usize| f[i].parse::<f64>().unwrap_or(f64::NAN);
            let at: jiff::Timestamp = f[utc]
                .parse()
                .unwrap_or_else(|e| panic!("truth time {:?}: {e}", f[utc]));
            rows.entry(f[tank].to_owned()).or_default().push(TruthRow {
                at_ms: at.as_millisecond(),
                level_m: num(level),
                headspace_pa: num(headspace),
                rate_kg_s: num(rate),
                released_kg: num(released),
                leak_open: f[open] == "true",
            });
        }
        Self { rows }
    }

    /// The truth of a tank at a UTC time, interpolated between rows.
    pub fn at(&self, tank: &str, at_ms: i64) -> TruthRow {
        let rows = &self.rows[tank];
        let i = rows.partition_point(|r| r.at_ms <= at_ms);
        if i > 0 && rows[i - 1].at_ms == at_ms {
            return rows[i - 1];
        }
        assert!(
            i > 0 && i < rows.len(),
            "time {at_ms} is outside the truth of {tank}"
        );
        let (a, b) = (rows[i - 1], rows[i]);
        let w = (at_ms - a.at_ms) as f64 / (b.at_ms - a.at_ms) as f64;
        let lerp = |x: f64, y: f64| x + (y - x) * w;
        TruthRow {
            at_ms,
            level_m: lerp(a.level_m, b.level_m),
            headspace_pa: lerp(a.headspace_pa, b.headspace_pa),
            rate_kg_s: lerp(a.rate_kg_s, b.rate_kg_s),
            released_kg: lerp(a.released_kg, b.released_kg),
            leak_open: b.leak_open,
        }
    }

    /// When the tank's leak opened (the last row before the first open one,
    /// to within the truth's 100 ms rows), UTC ms.
    pub fn leak_opened_at(&self, tank: &str) -> i64 {
        let rows = &self.rows[tank];
        let i = rows
            .iter()
            .position(|r| r.leak_open)
            .unwrap_or_else(|| panic!("{tank} never leaks"));
        rows[i.saturating_sub(1)].at_ms
    }
}

/// The demo site config with its devices pointed at `address`.
pub fn demo_site(address: &str) -> String {
    let text = fs::read_to_string(repo_root().join("config/demo.toml")).expect("config/demo.toml");
    text.replace("127.0.0.1:15020", address)
}

/// Starts the simulator on a free loopback port for `scenario`, writing its
/// truth to the scratch folder; returns it with its address.
pub fn start_sim(scratch: &Scratch, scenario: &Path, listen: &str) -> (Server, String) {
    let mut sim = Server::start(
        "leaktally-sim",
        Command::new(binary("leaktally-sim"))
            .arg("--scenario")
            .arg(scenario)
            .arg("--listen")
            .arg(listen)
            .arg("--truth")
            .arg(scratch.path("truth.csv")),
        scratch.path(&format!("sim-{}.stderr", listen.replace([':', '.'], "_"))),
    );
    let address = sim.address();
    (sim, address)
}

/// The current UTC time in milliseconds.
pub fn now_ms() -> i64 {
    jiff::Timestamp::now().as_millisecond()
}

/// A loopback port that was free a moment ago: bound on port 0 and closed
/// again, for a server that must be told its port in a config file.
pub fn free_port() -> u16 {
    let listener = std::net::TcpListener::bind("127.0.0.1:0").expect("binding 127.0.0.1:0");
    listener.local_addr().expect("a local address").port()
}

/// A site config with its `[web]` section listening on `listen` instead.
pub fn with_web(site: &str, listen: &str) -> String {
    let (before, after) = site
        .split_once("[web]\n")
        .expect("the site config has a [web] section");
    let rest = after
        .split_once('\n')
        .filter(|(first, _)| first.starts_with("listen = "))
        .map_or(after, |(_, rest)| rest);
    format!("{before}[web]\nlisten = \"{listen}\"\n{rest}")
}

/// Starts `leaktally run` and waits until its heartbeat is in the database.
pub fn start_daemon(scratch: &Scratch, name: &str, site: &Path, db: &Path) -> Server {
    let mut daemon = Server::start(
        "leaktally run",
        Command::new(binary("leaktally"))
            .arg("run")
            .arg("--config")
            .arg(site)
            .arg("--db")
            .arg(db),
        scratch.path(&format!("{name}.stderr")),
    );
    let deadline = Instant::now() + STARTUP;
    while Instant::now() < deadline {
        let alive = leaktally::store::open_read_only(db)
            .ok()
            .and_then(|c| leaktally::store::heartbeat(&c).ok().flatten())
            .is_some_and(|h| h.stopped_at_ms.is_none() && now_ms() - h.beat_at_ms < 3000);
        if alive {
            return daemon;
        }
        if let Ok(Some(status)) = daemon.child.try_wait() {
            panic!(
                "the daemon exited ({status}) before it started; its stderr:\n{}",
                daemon.stderr()
            );
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    panic!("the daemon did not start; its stderr:\n{}", daemon.stderr());
}

/// An HTTP answer: status, headers (names in lower case) and body.
#[derive(Debug)]
pub struct HttpReply {
    pub status: u16,
    pub headers: Vec<(String, String)>,
    pub body: String,
}

impl HttpReply {
    pub fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n == name)
            .map(|(_, v)| v.as_str())
    }
}

/// One HTTP/1.1 request to a server on this machine, with
/// `Connection: close`; enough of a client for the tests' few requests
/// (known lengths and chunked bodies).
pub fn http(address: &str, method: &str, path: &str) -> std::io::Result<HttpReply> {
    use std::io::{Read, Write};
    let mut stream = std::net::TcpStream::connect(address)?;
    stream.set_read_timeout(Some(COMMAND_LIMIT))?;
    write!(
        stream,
        "{method} {path} HTTP/1.1\r\nHost: {address}\r\nConnection: close\r\nContent-Length: 0\r\n\r\n"
    )?;
    let mut raw = Vec::new();
    stream.read_to_end(&mut raw)?;
    let text = String::from_utf8_lossy(&raw).into_owned();
    let bad = |what: &str| std::io::Error::new(std::io::ErrorKind::InvalidData, what.to_owned());
    let (head, body) = text
        .split_once("\r\n\r\n")
        .ok_or_else(|| bad("no header end"))?;
    let mut lines = head.split("\r\n");
    let status = lines
        .next()
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|s| s.parse().ok())
        .ok_or_else(|| bad("no status line"))?;
    let headers: Vec<(String, String)> = lines
        .filter_map(|l| l.split_once(':'))
        .map(|(n, v)| (n.trim().to_ascii_lowercase(), v.trim().to_owned()))
        .collect();
    let chunked = headers
        .iter()
        .any(|(n, v)| n == "transfer-encoding" && v.contains("chunked"));
    let body = if chunked {
        let mut out = String::new();
        let mut rest = body;
        while let Some((size, after)) = rest.split_once("\r\n") {
            let size = usize::from_str_radix(size.trim(), 16).map_err(|_| bad("chunk size"))?;
            if size == 0 {
                break;
            }
            out.push_str(after.get(..size).ok_or_else(|| bad("short chunk"))?);
            rest = after.get(size + 2..).unwrap_or("");
        }
        out
    } else {
        body.to_owned()
    };
    Ok(HttpReply {
        status,
        headers,
        body,
    })
}

/// Runs `leaktally ARGS --db DB` in the scratch folder.
pub fn leaktally(scratch: &Scratch, db: &Path, args: &[&str]) -> Finished {
    let mut cmd = Command::new(binary("leaktally"));
    cmd.args(args).arg("--db").arg(db);
    run("leaktally", &mut cmd, scratch)
}

/// As [`leaktally`], failing the test unless it succeeds; its stdout.
pub fn leaktally_ok(scratch: &Scratch, db: &Path, args: &[&str]) -> String {
    let done = leaktally(scratch, db, args);
    assert!(
        done.status.success(),
        "leaktally {args:?} failed:\n{}\n{}",
        done.stdout,
        done.stderr
    );
    done.stdout
}

/// Polls `ready` every 100 ms until it holds; fails the test, naming
/// `what`, if it does not within `limit`.
pub fn wait_for(what: &str, limit: Duration, mut ready: impl FnMut() -> bool) {
    let deadline = Instant::now() + limit;
    while !ready() {
        assert!(
            Instant::now() < deadline,
            "gave up waiting for {what} after {limit:?}"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
}

/// A simulator scenario file, built from what a test varies: the site, the
/// seed, each tank's `[[tank]]` entry, and the `[[event]]` script in the
/// order given (the simulator keeps same-time events in file order). Each
/// event method is named after the action it writes and takes the time
/// first, seconds into the run; sim/scenarios/demo.toml explains the keys.
pub struct ScenarioBuilder {
    site: ScenarioSite,
    step_ms: Option<u64>,
    seed: Option<u64>,
    tanks: Vec<ScenarioTank>,
    events: Vec<Vec<(&'static str, String)>>,
}

enum ScenarioSite {
    /// config/demo.toml with its devices pointed at 127.0.0.1:1 (the
    /// simulator serves them all on its own listener), written beside the
    /// scenario by [`ScenarioBuilder::write`].
    Demo,
    /// A site config already on disk.
    File(PathBuf),
}

impl ScenarioBuilder {
    /// A scenario of the demo site; it needs a `[[tank]]` entry for each of
    /// FF-T12, FF-T14 and FF-T20.
    pub fn demo() -> Self {
        Self::new(ScenarioSite::Demo)
    }

    /// A scenario of the site config at `path` (relative to the scenario
    /// file, or absolute).
    pub fn for_site(path: &Path) -> Self {
        Self::new(ScenarioSite::File(path.to_owned()))
    }

    fn new(site: ScenarioSite) -> Self {
        Self {
            site,
            step_ms: None,
            seed: None,
            tanks: Vec::new(),
            events: Vec::new(),
        }
    }

    pub fn step_ms(mut self, step_ms: u64) -> Self {
        self.step_ms = Some(step_ms);
        self
    }

    /// The seed of the sensor noise.
    pub fn seed(mut self, seed: u64) -> Self {
        self.seed = Some(seed);
        self
    }

    pub fn tank(mut self, tank: ScenarioTank) -> Self {
        self.tanks.push(tank);
        self
    }

    fn event(mut self, at_s: f64, action: &str, keys: Vec<(&'static str, String)>) -> Self {
        let mut event = vec![("at_s", toml_number(at_s)), ("action", toml_text(action))];
        event.extend(keys);
        self.events.push(event);
        self
    }

    /// A hole of `diameter_mm` opens `height_m` above the tank's bottom,
    /// with discharge coefficient `cd`.
    pub fn leak_opens(
        self,
        at_s: f64,
        tank: &str,
        diameter_mm: f64,
        height_m: f64,
        cd: f64,
    ) -> Self {
        self.event(
            at_s,
            "leak_opens",
            vec![
                ("tank", toml_text(tank)),
                ("diameter_mm", toml_number(diameter_mm)),
                ("height_m", toml_number(height_m)),
                ("cd", toml_number(cd)),
            ],
        )
    }

    pub fn leak_closes(self, at_s: f64, tank: &str) -> Self {
        self.event(at_s, "leak_closes", vec![("tank", toml_text(tank))])
    }

    /// A pump starts moving `flow_m3_h` into the tank (negative: out of
    /// it), shown on the tank's transfer register.
    pub fn transfer_starts(self, at_s: f64, tank: &str, flow_m3_h: f64) -> Self {
        self.event(
            at_s,
            "transfer_starts",
            vec![
                ("tank", toml_text(tank)),
                ("flow_m3_h", toml_number(flow_m3_h)),
            ],
        )
    }

    pub fn transfer_stops(self, at_s: f64, tank: &str) -> Self {
        self.event(at_s, "transfer_stops", vec![("tank", toml_text(tank))])
    }

    /// Requests for `device` get no reply for `duration_s`.
    pub fn link_drops(self, at_s: f64, device: &str, duration_s: f64) -> Self {
        self.event(
            at_s,
            "link_drops",
            vec![
                ("device", toml_text(device)),
                ("duration_s", toml_number(duration_s)),
            ],
        )
    }

    /// For `duration_s`, `device` answers every request `reply_delay_ms` late.
    pub fn device_slows(
        self,
        at_s: f64,
        device: &str,
        duration_s: f64,
        reply_delay_ms: u64,
    ) -> Self {
        self.event(
            at_s,
            "device_slows",
            vec![
                ("device", toml_text(device)),
                ("duration_s", toml_number(duration_s)),
                ("reply_delay_ms", reply_delay_ms.to_string()),
            ],
        )
    }

    /// For `duration_s` (`None`: the rest of the run), `device` answers
    /// every read with Modbus exception `exception_code`.
    pub fn device_refuses(
        self,
        at_s: f64,
        device: &str,
        exception_code: u8,
        duration_s: Option<f64>,
    ) -> Self {
        let mut keys = vec![
            ("device", toml_text(device)),
            ("exception_code", exception_code.to_string()),
        ];
        keys.extend(duration_s.map(|d| ("duration_s", toml_number(d))));
        self.event(at_s, "device_refuses", keys)
    }

    /// For the rest of the run, `device` answers with Modbus exception
    /// `exception_code` the reads of `table` ("holding", "input", "coil",
    /// "discrete_input") that touch `address` and the `count` after it
    /// (`None`: the simulator's default, one).
    pub fn device_refuses_span(
        self,
        at_s: f64,
        device: &str,
        exception_code: u8,
        table: &str,
        address: u16,
        count: Option<u16>,
    ) -> Self {
        let mut keys = vec![
            ("device", toml_text(device)),
            ("exception_code", exception_code.to_string()),
            ("table", toml_text(table)),
            ("address", address.to_string()),
        ];
        keys.extend(count.map(|c| ("count", c.to_string())));
        self.event(at_s, "device_refuses", keys)
    }

    /// For `duration_s`, `device` answers reads with `extra_values` more
    /// values (fewer, negative) than asked.
    pub fn device_miscounts(
        self,
        at_s: f64,
        device: &str,
        extra_values: i16,
        duration_s: f64,
    ) -> Self {
        self.event(
            at_s,
            "device_miscounts",
            vec![
                ("device", toml_text(device)),
                ("extra_values", extra_values.to_string()),
                ("duration_s", toml_number(duration_s)),
            ],
        )
    }

    /// The tank's `sensor` ("level", "pressure", ...) freezes at its words.
    pub fn sensor_sticks(self, at_s: f64, tank: &str, sensor: &str) -> Self {
        self.sensor(at_s, "sensor_sticks", tank, sensor)
    }

    /// The tank's `sensor` shows NaN (the type's largest value for integers).
    pub fn sensor_garbage(self, at_s: f64, tank: &str, sensor: &str) -> Self {
        self.sensor(at_s, "sensor_garbage", tank, sensor)
    }

    /// The tank's `sensor` shows `value_si` (m, Pa, m³/s), as encoded.
    pub fn sensor_reads(self, at_s: f64, tank: &str, sensor: &str, value_si: f64) -> Self {
        self.event(
            at_s,
            "sensor_reads",
            vec![
                ("tank", toml_text(tank)),
                ("sensor", toml_text(sensor)),
                ("value_si", toml_number(value_si)),
            ],
        )
    }

    /// The tank's `sensor` shows the live value again.
    pub fn sensor_recovers(self, at_s: f64, tank: &str, sensor: &str) -> Self {
        self.sensor(at_s, "sensor_recovers", tank, sensor)
    }

    fn sensor(self, at_s: f64, action: &str, tank: &str, sensor: &str) -> Self {
        self.event(
            at_s,
            action,
            vec![("tank", toml_text(tank)), ("sensor", toml_text(sensor))],
        )
    }

    /// Sets the tank's leak flag bit.
    pub fn raise_flag(self, at_s: f64, tank: &str) -> Self {
        self.event(at_s, "raise_flag", vec![("tank", toml_text(tank))])
    }

    /// The scenario's text, for a site config already on disk.
    pub fn text(&self) -> String {
        match &self.site {
            ScenarioSite::File(site) => self.render(site),
            ScenarioSite::Demo => {
                panic!("a demo-site scenario is written with its site by `write`")
            }
        }
    }

    /// Writes the scenario to scenario.toml in the scratch folder (and the
    /// demo site, if it is one, to sim-site.toml beside it); its path.
    pub fn write(&self, scratch: &Scratch) -> PathBuf {
        let text = match &self.site {
            ScenarioSite::Demo => {
                self.render(&scratch.write("sim-site.toml", &demo_site("127.0.0.1:1")))
            }
            ScenarioSite::File(site) => self.render(site),
        };
        scratch.write("scenario.toml", &text)
    }

    fn render(&self, site: &Path) -> String {
        let mut text = format!("site = {}\n", toml_path(site));
        if let Some(step_ms) = self.step_ms {
            text += &format!("step_ms = {step_ms}\n");
        }
        if let Some(seed) = self.seed {
            text += &format!("seed = {seed}\n");
        }
        let tables = self.tanks.iter().map(|t| ("tank", &t.keys));
        for (table, keys) in tables.chain(self.events.iter().map(|e| ("event", e))) {
            text += &format!("[[{table}]]\n");
            for (key, value) in keys {
                text += &format!("{key} = {value}\n");
            }
        }
        text
    }
}

/// One `[[tank]]` entry of a [`ScenarioBuilder`]: the tank's id and
/// starting level, and the keys a test gives it besides.
pub struct ScenarioTank {
    keys: Vec<(&'static str, String)>,
}

impl ScenarioTank {
    pub fn new(id: &str, initial_level_m: f64) -> Self {
        Self {
            keys: vec![
                ("id", toml_text(id)),
                ("initial_level_m", toml_number(initial_level_m)),
            ],
        }
    }

    fn key(mut self, key: &'static str, value: f64) -> Self {
        self.keys.push((key, toml_number(value)));
        self
    }

    /// The headspace's gauge pressure, held for the whole run.
    pub fn headspace_kpa(self, kpa: f64) -> Self {
        self.key("headspace_kpa", kpa)
    }

    /// The standard deviation of the level reading's noise.
    pub fn level_noise_m(self, m: f64) -> Self {
        self.key("level_noise_m", m)
    }

    /// The standard deviation of the pressure reading's noise.
    pub fn pressure_noise_pa(self, pa: f64) -> Self {
        self.key("pressure_noise_pa", pa)
    }

    /// The ullage holds the site config's vapour, which a hole above the
    /// surface lets out; `thermal` is "isothermal" or "adiabatic".
    pub fn gas_ullage(mut self, thermal: &str) -> Self {
        self.keys.push(("ullage", toml_text("gas")));
        self.keys.push(("ullage_thermal", toml_text(thermal)));
        self
    }

    /// The liquid's temperature, held for the whole run.
    pub fn temperature_c(self, c: f64) -> Self {
        self.key("temperature_c", c)
    }

    /// A fixed offset of the pressure transmitter.
    pub fn pressure_bias_pa(self, pa: f64) -> Self {
        self.key("pressure_bias_pa", pa)
    }

    /// A fixed offset of the level gauge.
    pub fn level_bias_m(self, m: f64) -> Self {
        self.key("level_bias_m", m)
    }

    /// A drift of the level gauge, growing with time.
    pub fn level_drift_m_per_h(self, m_per_h: f64) -> Self {
        self.key("level_drift_m_per_h", m_per_h)
    }

    /// A daily temperature swing (peak to peak, K) and the liquid's
    /// volumetric expansion (1/K): the level breathes with it.
    pub fn thermal_swing(self, swing_k: f64, expansion_per_k: f64) -> Self {
        self.key("temperature_swing_k", swing_k)
            .key("expansion_per_k", expansion_per_k)
    }
}

/// A number as TOML writes it: Rust's `Debug` form, which reads back to
/// the same `f64` bit for bit ("40.0", "0.61", "1e-5").
fn toml_number(x: f64) -> String {
    assert!(x.is_finite(), "a scenario number must be finite: {x}");
    format!("{x:?}")
}

/// A TOML basic string (ids, actions, sensor and table names).
fn toml_text(text: &str) -> String {
    assert!(
        !text.chars().any(char::is_control),
        "a control character in {text:?}"
    );
    format!("\"{}\"", text.replace('\\', "\\\\").replace('"', "\\\""))
}

/// `leaktally leak open`'s arguments, built from what a test gives: the
/// tank, and as it chooses the hole (or only its height and Cd, to have
/// the diameter fitted), `--since` and a note. Numbers are written as
/// Rust's `Display` writes them ("40", "0.3", "0.61").
pub struct LeakOpen {
    tank: String,
    options: Vec<(&'static str, String)>,
}

impl LeakOpen {
    pub fn tank(id: &str) -> Self {
        Self {
            tank: id.to_owned(),
            options: Vec::new(),
        }
    }

    fn option(mut self, name: &'static str, value: String) -> Self {
        self.options.push((name, value));
        self
    }

    /// The whole hole: `--hole-diameter` (mm), `--hole-height` (m) and
    /// `--cd`, in the order [`ScenarioBuilder::leak_opens`] takes them.
    pub fn hole(self, diameter_mm: f64, height_m: f64, cd: f64) -> Self {
        self.option("--hole-diameter", diameter_mm.to_string())
            .height_m(height_m)
            .cd(cd)
    }

    /// The hole's height alone (its diameter then fitted).
    pub fn height_m(self, height_m: f64) -> Self {
        self.option("--hole-height", height_m.to_string())
    }

    pub fn cd(self, cd: f64) -> Self {
        self.option("--cd", cd.to_string())
    }

    /// `--since`: a time (RFC 3339) or how long ago ("30s").
    pub fn since(self, since: &str) -> Self {
        self.option("--since", since.to_owned())
    }

    pub fn note(self, note: &str) -> Self {
        self.option("--note", note.to_owned())
    }

    /// `leak open --tank TANK` and the options, in the order given.
    pub fn args(&self) -> Vec<&str> {
        let mut args = vec!["leak", "open", "--tank", self.tank.as_str()];
        for (name, value) in &self.options {
            args.extend([*name, value.as_str()]);
        }
        args
    }
}

/// The builders write what the simulator and the CLI read: every event
/// method's action, in the order given, and `leak open`'s options as
/// written by hand before.
#[test]
fn the_builders_write_what_the_simulator_and_the_cli_read() {
    use leaktally_sim::scenario::{EventKind, Fault, HoleSpec, Refusal, SensorRole, SimTable};
    let scratch = Scratch::new("builders");
    let path = ScenarioBuilder::demo()
        .step_ms(20)
        .seed(3)
        .tank(ScenarioTank::new("FF-T12", 4.2).level_noise_m(0.001))
        .tank(
            ScenarioTank::new("FF-T14", 1.6)
                .headspace_kpa(15.0)
                .pressure_noise_pa(30.0),
        )
        .tank(
            ScenarioTank::new("FF-T20", 5.1)
                .level_bias_m(-0.002)
                .level_drift_m_per_h(1e-5)
                .thermal_swing(3.0, 0.000_83),
        )
        .leak_opens(1.0, "FF-T12", 40.0, 0.3, 0.61)
        .link_drops(2.0, "rtu-west", 6.0)
        .device_slows(3.0, "rtu-east", 4.0, 1500)
        .device_refuses(4.0, "rtu-east", 6, Some(3.0))
        .device_refuses_span(4.0, "rtu-east", 2, "holding", 500, Some(2))
        .device_miscounts(5.0, "rtu-west", -1, 2.0)
        .sensor_sticks(6.0, "FF-T12", "level")
        .sensor_garbage(6.0, "FF-T14", "pressure")
        .sensor_reads(7.0, "FF-T12", "level", 9.5)
        .sensor_recovers(8.0, "FF-T12", "level")
        .raise_flag(9.0, "FF-T12")
        .leak_closes(10.0, "FF-T12")
        .transfer_starts(11.0, "FF-T12", -36.0)
        .transfer_stops(12.0, "FF-T12")
        .write(&scratch);
    let s = leaktally_sim::scenario::load(&path).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!((s.step_ms, s.seed), (20, 3));
    assert_eq!(
        (s.tanks[0].level_noise_m, s.tanks[1].headspace_pa),
        (0.001, 15_000.0)
    );
    assert_eq!(
        (s.tanks[2].level_bias_m, s.tanks[2].level_drift_m_per_h),
        (-0.002, 1e-5)
    );
    assert_eq!(
        (s.tanks[2].temperature_swing_k, s.tanks[2].expansion_per_k),
        (3.0, 0.000_83)
    );
    let level = |fault| EventKind::SensorFault {
        tank: 0,
        sensor: SensorRole::Level,
        fault,
    };
    let expected = [
        (
            1.0,
            EventKind::LeakOpens {
                tank: 0,
                hole: HoleSpec {
                    diameter_m: leaktally::model::Length::millimetres(40.0).si(),
                    height_m: 0.3,
                    cd: 0.61,
                },
            },
        ),
        (
            2.0,
            EventKind::LinkDrops {
                device: 1,
                duration_s: 6.0,
            },
        ),
        (
            3.0,
            EventKind::DeviceSlows {
                device: 0,
                duration_s: 4.0,
                reply_delay_ms: 1500,
            },
        ),
        (
            4.0,
            EventKind::DeviceRefuses {
                device: 0,
                duration_s: Some(3.0),
                refusal: Refusal {
                    code: 6,
                    only: None,
                },
            },
        ),
        (
            4.0,
            EventKind::DeviceRefuses {
                device: 0,
                duration_s: None,
                refusal: Refusal {
                    code: 2,
                    only: Some((SimTable::Holding, 500, 2)),
                },
            },
        ),
        (
            5.0,
            EventKind::DeviceMiscounts {
                device: 1,
                duration_s: Some(2.0),
                extra_values: -1,
            },
        ),
        (6.0, level(Fault::Stuck)),
        (
            6.0,
            EventKind::SensorFault {
                tank: 1,
                sensor: SensorRole::Pressure,
                fault: Fault::Garbage,
            },
        ),
        (7.0, level(Fault::Reads(9.5))),
        (8.0, level(Fault::None)),
        (
            9.0,
            EventKind::Flag {
                tank: 0,
                raised: true,
            },
        ),
        (10.0, EventKind::LeakCloses { tank: 0 }),
        (
            11.0,
            EventKind::TransferStarts {
                tank: 0,
                flow_m3_s: -0.01,
            },
        ),
        (12.0, EventKind::TransferStops { tank: 0 }),
    ];
    let got: Vec<(f64, EventKind)> = s.events.into_iter().map(|e| (e.at_s, e.kind)).collect();
    assert_eq!(got, expected);
    // The text itself, for a site on disk: keys in the order given.
    let text = ScenarioBuilder::for_site(Path::new("site.toml"))
        .seed(1)
        .tank(ScenarioTank::new("BC-1", 4.0).level_bias_m(0.001))
        .leak_closes(12.5, "BC-1")
        .text();
    assert_eq!(
        text,
        "site = 'site.toml'\nseed = 1\n[[tank]]\nid = \"BC-1\"\ninitial_level_m = 4.0\nlevel_bias_m = 0.001\n\
         [[event]]\nat_s = 12.5\naction = \"leak_closes\"\ntank = \"BC-1\"\n"
    );

    assert_eq!(
        LeakOpen::tank("FF-T12")
            .hole(40.0, 0.3, 0.61)
            .since("30s")
            .note("isolated")
            .args(),
        [
            "leak",
            "open",
            "--tank",
            "FF-T12",
            "--hole-diameter",
            "40",
            "--hole-height",
            "0.3",
            "--cd",
            "0.61",
            "--since",
            "30s",
            "--note",
            "isolated"
        ]
    );
    assert_eq!(
        LeakOpen::tank("FF-T14").height_m(0.2).cd(0.61).args(),
        [
            "leak",
            "open",
            "--tank",
            "FF-T14",
            "--hole-height",
            "0.2",
            "--cd",
            "0.61"
        ]
    );
}

/// splitmix64, for seeded draws (Steele, Lea and Flood, OOPSLA 2014).
pub struct Draw(pub u64);

impl Draw {
    pub fn uniform(&mut self, low: f64, high: f64) -> f64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        let unit = ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64;
        low + (high - low) * unit
    }
}
