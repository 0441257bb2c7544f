//! Hostile neighbours on the web port, end to end: thousands of idle TCP
//! connections and slow-header sockets against a running daemon with the
//! simulator, while a normal client reads the page and the JSON, the
//! simulator restarts (so the pollers must reconnect), and every poll cycle
//! is still stored. Before the connection limit, 20,000 idle sockets filled
//! the daemon's file table, and after a simulator restart the pollers could
//! not reconnect ("Too many open files").

use crate::faults::{assert_running, get, longest_gap_s, metric, samples};
use crate::tracking::{Plant, three_leaks};
use crate::util::{free_port, http, start_sim, with_web};
use leaktally::web::server::{HEADER_TIMEOUT, MAX_CONNECTIONS};
use std::io::{Read, Write};
use std::net::TcpStream;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

/// Idle connections and slow-header sockets the test opens, at most; fewer
/// if this process may not open that many files.
const IDLE: usize = 3000;
const SLOW: usize = 500;

/// Descriptors a process has open.
fn open_files(pid: u32) -> usize {
    std::fs::read_dir(format!("/proc/{pid}/fd")).map_or(0, |d| d.count())
}

/// A GET that must answer 200 within a few seconds, however busy the port.
fn timed_get(web: &str, path: &str) -> Duration {
    let began = Instant::now();
    let reply =
        http(web, "GET", path).unwrap_or_else(|e| panic!("GET {path} during the flood: {e}"));
    assert_eq!(
        reply.status, 200,
        "GET {path} during the flood: {}",
        reply.body
    );
    let took = began.elapsed();
    assert!(took < Duration::from_secs(5), "GET {path} took {took:?}");
    took
}

/// Whether the server has closed a socket: its read ends (or fails)
/// instead of waiting.
fn closed_by_server(socket: &mut TcpStream) -> bool {
    let _ = socket.set_nonblocking(true);
    let mut buf = [0u8; 256];
    loop {
        match socket.read(&mut buf) {
            Ok(0) => return true,
            Ok(_) => continue, // a 503 or an answer, then the close
            Err(e) if e.kind() == std::io::ErrorKind::WouldBlock => return false,
            Err(_) => return true,
        }
    }
}

#[test]
fn idle_and_slow_sockets_neither_lock_out_a_client_nor_starve_the_pollers() {
    // This process holds every socket it opens; give it room, as the
    // daemon gives itself.
    let files = leaktally::web::server::raise_open_file_limit().unwrap_or(1024);
    let room = usize::try_from(files)
        .unwrap_or(usize::MAX)
        .saturating_sub(200)
        / 2;
    let (idle_n, slow_n) = (IDLE.min(room), SLOW.min(room / 6));
    let web = format!("127.0.0.1:{}", free_port());
    let mut plant = Plant::start_with("flood", three_leaks(), |site| with_web(&site, &web));
    let sim_address = {
        let site = std::fs::read_to_string(&plant.site).unwrap();
        let line = site.lines().find(|l| l.starts_with("address = ")).unwrap();
        line.trim_start_matches("address = ")
            .trim_matches('"')
            .to_owned()
    };
    let mut daemon = plant.daemon("daemon");
    let pid = daemon.child.id();
    plant.wait_until(3.0);
    let calm_files = open_files(pid);
    timed_get(&web, "/");

    // Thousands of connections that send nothing...
    let opening = Instant::now();
    let mut idle: Vec<TcpStream> = (0..idle_n)
        .map(|i| TcpStream::connect(&web).unwrap_or_else(|e| panic!("idle socket {i}: {e}")))
        .collect();
    // ...and hundreds that send half a request head and then one byte a
    // second, never finishing it.
    let mut slow: Vec<TcpStream> = (0..slow_n)
        .map(|i| {
            let mut s = TcpStream::connect(&web).unwrap_or_else(|e| panic!("slow socket {i}: {e}"));
            let _ = write!(s, "GET / HTTP/1.1\r\nHost: {web}\r\nX-Slow: ");
            s
        })
        .collect();
    let opened = opening.elapsed();
    let trickling = Arc::new(AtomicBool::new(true));
    let trickler = {
        let sockets: Vec<TcpStream> = slow.iter().map(|s| s.try_clone().unwrap()).collect();
        let trickling = Arc::clone(&trickling);
        std::thread::spawn(move || {
            let mut sockets = sockets;
            while trickling.load(Ordering::Relaxed) {
                for s in &mut sockets {
                    let _ = s.write(b"x");
                }
                std::thread::sleep(Duration::from_secs(1));
            }
        })
    };

    // A normal client still gets the page and the JSON, at once.
    std::thread::sleep(Duration::from_secs(1));
    let mut waits = vec![timed_get(&web, "/"), timed_get(&web, "/api/status")];
    let flood_files = (0..5)
        .map(|_| {
            std::thread::sleep(Duration::from_millis(200));
            open_files(pid)
        })
        .max()
        .unwrap_or(0);

    // The simulator restarts during the flood; the pollers must reconnect,
    // which needs descriptors.
    let _ = plant.sim.child.kill();
    let _ = plant.sim.child.wait();
    std::thread::sleep(Duration::from_secs(2));
    let restarted_ms = crate::util::now_ms();
    let (sim, again) = start_sim(
        &plant.scratch,
        &plant.scratch.path("scenario.toml"),
        &sim_address,
    );
    assert_eq!(again, sim_address);
    plant.sim = sim;
    waits.push(timed_get(&web, "/api/status"));

    // Past the header timeout every one of those sockets has been closed.
    std::thread::sleep(HEADER_TIMEOUT + Duration::from_secs(3));
    waits.push(timed_get(&web, "/"));
    waits.push(timed_get(&web, "/api/status"));
    trickling.store(false, Ordering::Relaxed);
    trickler.join().unwrap();
    let idle_closed = idle.iter_mut().map(closed_by_server).filter(|&c| c).count();
    let slow_closed = slow.iter_mut().map(closed_by_server).filter(|&c| c).count();
    let after_files = open_files(pid);
    drop(idle);
    drop(slow);
    println!(
        "{idle_n} idle and {slow_n} slow sockets opened in {opened:.1?}; the daemon's open files: {calm_files} calm, {flood_files} at most during the flood, {after_files} after; the client's requests took {waits:?}; closed by the server: {idle_closed} idle, {slow_closed} slow"
    );
    assert!(
        flood_files <= calm_files + MAX_CONNECTIONS + 64,
        "{flood_files} files open during the flood (calm: {calm_files})"
    );
    assert_eq!(idle_closed, idle_n, "idle sockets left open");
    assert_eq!(slow_closed, slow_n, "slow-header sockets left open");
    assert!(
        after_files <= calm_files + 8,
        "{after_files} files after (calm: {calm_files})"
    );

    // Good readings again after the restart, and every poll cycle stored:
    // the samples per tank against the cycles the daemon counted (read a
    // moment apart: two cycles of slack), with no long gap.
    std::thread::sleep(Duration::from_secs(2));
    assert_running(&mut daemon);
    let counted = get(&web, "/metrics");
    for (tank, device) in [
        ("FF-T12", "rtu-east"),
        ("FF-T14", "rtu-east"),
        ("FF-T20", "rtu-west"),
    ] {
        let cycles = metric(
            &counted,
            &format!("leaktally_poll_successes_total{{device=\"{device}\"}}"),
        ) + metric(
            &counted,
            &format!("leaktally_poll_failures_total{{device=\"{device}\"}}"),
        );
        let all = samples(&plant.db, tank, 0);
        let stored = all.len() as f64;
        let gap = longest_gap_s(&all);
        let good_after = all
            .iter()
            .filter(|s| s.at_ms > restarted_ms && s.level.is_good())
            .count();
        println!(
            "{tank}: {stored} samples stored for {cycles} poll cycles, longest gap {gap:.2} s, {good_after} good since the restart"
        );
        assert!(
            (stored - cycles).abs() <= 2.0,
            "{tank}: {stored} samples for {cycles} cycles"
        );
        assert!(gap < 2.5, "{tank}: {gap} s without a stored sample");
        assert!(
            good_after >= 5,
            "{tank}: {good_after} good samples after the restart"
        );
    }
    let log = daemon.stderr();
    assert!(log.contains("closed the one idle longest"), "{log}");
    assert!(!log.contains("Too many open files"), "{log}");
    assert!(!log.contains("cannot accept"), "{log}");
}
