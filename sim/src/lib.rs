//! leaktally-sim: a Modbus TCP server (or a Modbus RTU unit on a serial
//! port, with `--serial`) that stands in for the plant. It
//! simulates tanks with true draining physics in real time, plays a script
//! of events (a leak opening, pump transfers, sensor faults, dropped links),
//! serves the sensors' registers as the site config maps them, and writes
//! the ground truth to a CSV file for the agent's figures to be checked
//! against.
//!
//! Layout:
//!
//! * [`scenario`]: the scenario file and its validation.
//! * [`physics`]: one tank's level, released mass and, optionally, the gas
//!   in its ullage, by RK4. Pure.
//! * [`plant`]: all tanks, the event script and the sensor readings, on a
//!   clock of physics steps. Pure.
//! * [`noise`]: deterministic gaussian noise.
//! * [`registers`]: the devices' register tables and value encoding.
//! * [`service`]: the Modbus service (TCP, or RTU on a serial line) and its
//!   request counts.
//! * [`truth`]: the ground-truth CSV.
//!
//! This file joins them: [`Simulator::bind`] opens the listener, and
//! [`Simulator::run`] drives the plant from the clock and serves until told
//! to stop. All demo data is invented.

pub mod noise;
pub mod physics;
pub mod plant;
pub mod registers;
pub mod scenario;
pub mod service;
pub mod truth;

use anyhow::{Context, bail};
use leaktally::config::SerialLine;
use plant::{Applied, Plant, TruthRow};
use registers::RegisterImage;
use scenario::{EventKind, Scenario};
use service::{RequestCounts, Shared, SimService};
use std::collections::HashMap;
use std::io::Write;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::{Arc, Mutex, PoisonError};
use std::time::Duration;
use tokio::net::TcpListener;
use tokio::time::{Instant, MissedTickBehavior};
use tokio_util::sync::CancellationToken;
use truth::TruthWriter;

/// What the binary was asked to do.
#[derive(Debug, Clone)]
pub struct Options {
    pub scenario: PathBuf,
    /// host:port to listen on; the first device's address if absent.
    pub listen: Option<String>,
    /// Serve Modbus RTU on this serial port instead of TCP.
    pub serial: Option<PathBuf>,
    pub truth: Option<PathBuf>,
}

/// The whole binary after argument parsing: load, bind, announce the
/// address on stdout, run until `shutdown`, and log the request counts.
pub async fn launch(options: Options, shutdown: CancellationToken) -> anyhow::Result<()> {
    let scenario = scenario::load(&options.scenario).context("the scenario is not valid")?;
    let ids = scenario.site.tanks.iter().map(|t| t.id.clone()).collect();
    let sim = match &options.serial {
        Some(port) => Simulator::open_serial(scenario, port)?,
        None => Simulator::bind(scenario, options.listen.as_deref()).await?,
    };
    let truth = match &options.truth {
        Some(path) => {
            let file = std::fs::File::create(path)
                .with_context(|| format!("cannot create the truth file {}", path.display()))?;
            Some(
                TruthWriter::new(file, ids, jiff::Timestamp::now())
                    .with_context(|| format!("cannot write the truth file {}", path.display()))?,
            )
        }
        None => None,
    };
    let addr = sim.endpoint_name()?;
    // Tests that bind port 0 read this line to learn the port (or that the
    // serial port is open), so it goes to stdout alone, once, and flushed.
    {
        let mut stdout = std::io::stdout().lock();
        writeln!(stdout, "listening on {addr}").and_then(|()| stdout.flush())?;
    }
    let counts = sim.counts();
    let result = sim.run(truth, shutdown).await;
    eprintln!("{}", counts.summary_line());
    result
}

/// A bound simulator, not yet running.
pub struct Simulator {
    scenario: Scenario,
    endpoint: Endpoint,
    counts: Arc<RequestCounts>,
}

/// Where the simulator serves: a TCP listener, or an open serial port
/// with the line's settings.
enum Endpoint {
    Tcp(TcpListener),
    Serial {
        path: PathBuf,
        port: tokio_serial::SerialStream,
        line: SerialLine,
    },
}

impl Simulator {
    /// Binds `listen`, or the first device's address. Port 0 picks a free
    /// port; [`Simulator::local_addr`] says which.
    pub async fn bind(scenario: Scenario, listen: Option<&str>) -> anyhow::Result<Self> {
        let devices = &scenario.site.devices;
        let Some(first) = devices.first() else {
            bail!(
                "the site config {} defines no devices to serve",
                scenario.site.path.display()
            );
        };
        if listen.is_none() && first.serial.is_some() {
            bail!(
                "device \"{}\" is on a serial line; give --serial PATH (one end of the cable, or of a pty pair) or --listen HOST:PORT",
                first.id
            );
        }
        let addr = listen.unwrap_or(&first.address).to_owned();
        if listen.is_none() {
            for d in devices.iter().filter(|d| d.address != first.address) {
                tracing::warn!(
                    "device \"{}\" has address {}, but the simulator serves every device on {addr}, told apart by unit id",
                    d.id,
                    d.address
                );
            }
        }
        let listener = TcpListener::bind(&addr)
            .await
            .with_context(|| format!("cannot listen on {addr}"))?;
        Ok(Self {
            scenario,
            endpoint: Endpoint::Tcp(listener),
            counts: Arc::default(),
        })
    }

    /// Opens the serial port `path` to serve every device of the site as a
    /// unit on that line, told apart by unit id, with the line settings of
    /// the site's first serial device (the Modbus serial-line defaults,
    /// 19200 baud, 8E1, if it has none).
    pub fn open_serial(scenario: Scenario, path: &std::path::Path) -> anyhow::Result<Self> {
        let devices = &scenario.site.devices;
        if devices.is_empty() {
            bail!(
                "the site config {} defines no devices to serve",
                scenario.site.path.display()
            );
        }
        let mut line = devices
            .iter()
            .find_map(|d| d.serial.clone())
            .unwrap_or(SerialLine {
                port: String::new(),
                baud_rate: 19_200,
                parity: leaktally::config::Parity::Even,
                stop_bits: 1,
                data_bits: 8,
            });
        line.port = path.display().to_string();
        let port = service::open_serial(&line)
            .with_context(|| format!("cannot open the serial port {}", path.display()))?;
        Ok(Self {
            scenario,
            endpoint: Endpoint::Serial {
                path: path.to_owned(),
                port,
                line,
            },
            counts: Arc::default(),
        })
    }

    /// The TCP address listened on (an error when serving a serial port).
    pub fn local_addr(&self) -> std::io::Result<SocketAddr> {
        match &self.endpoint {
            Endpoint::Tcp(listener) => listener.local_addr(),
            Endpoint::Serial { .. } => Err(std::io::Error::other("serving a serial port")),
        }
    }

    /// Where it serves, as the `listening on` line says it: host:port, or
    /// the serial port's path.
    pub fn endpoint_name(&self) -> std::io::Result<String> {
        match &self.endpoint {
            Endpoint::Tcp(listener) => Ok(listener.local_addr()?.to_string()),
            Endpoint::Serial { path, .. } => Ok(path.display().to_string()),
        }
    }

    /// The request counts, live while the simulator runs.
    pub fn counts(&self) -> Arc<RequestCounts> {
        self.counts.clone()
    }

    /// Runs the plant in real time and serves Modbus until `shutdown` is
    /// cancelled, then writes the last truth rows and flushes the file.
    pub async fn run<W: Write + Send + 'static>(
        self,
        truth: Option<TruthWriter<W>>,
        shutdown: CancellationToken,
    ) -> anyhow::Result<()> {
        let plant = Plant::new(&self.scenario);
        let site = plant.site();
        let shared = Arc::new(Mutex::new(Shared {
            image: RegisterImage::new(site),
            link_down: vec![false; site.devices.len()],
            reply_delay: vec![std::time::Duration::ZERO; site.devices.len()],
            refusals: vec![Vec::new(); site.devices.len()],
            miscount: vec![0; site.devices.len()],
        }));
        // Unit ids are unique: the scenario checked.
        let units: HashMap<u8, usize> = site
            .devices
            .iter()
            .enumerate()
            .map(|(i, d)| (d.unit_id, i))
            .collect();
        let mut service = SimService::new(shared.clone(), self.counts.clone(), units);
        if let Endpoint::Serial { line, .. } = &self.endpoint {
            service = service.on_serial_line(line.clone());
        }
        tracing::info!(
            "serving {} tanks on {} devices; physics step {} ms",
            site.tanks.len(),
            site.devices.len(),
            plant.step_ms()
        );
        for (tank, setup) in site.tanks.iter().zip(&self.scenario.tanks) {
            if let Some(u) = &setup.ullage {
                tracing::info!(
                    "{}: gas space of {} g/mol vapour at {:.1} °C, {}, {}",
                    tank.id,
                    u.gas.molar_mass_kg_mol * 1000.0,
                    u.gas.temperature_k - 273.15,
                    u.thermal.name(),
                    if u.blanket_max_kg_s > 0.0 {
                        format!("blanket up to {} kg/s", u.blanket_max_kg_s)
                    } else {
                        "no blanket".to_owned()
                    }
                );
            }
        }
        // The first wake-up happens before the first request can arrive, so
        // no client sees the empty image or misses an event due at zero.
        let mut driver = Driver::new(plant, shared, truth);
        driver.wake()?;
        let physics = tokio::spawn(driver.drive(shutdown.clone()));
        let stop = shutdown.clone();
        let served = match self.endpoint {
            Endpoint::Tcp(listener) => {
                service::serve(listener, service, async move { stop.cancelled().await }).await
            }
            Endpoint::Serial { port, line, .. } => {
                service::serve_serial(port, &line, service, stop).await
            }
        };
        // If the server failed on its own, stop the physics too.
        shutdown.cancel();
        let driven = physics.await.context("the physics task failed")?;
        served.context("the Modbus server stopped")?;
        driven
    }
}

/// The physics side: the plant, the clock it follows, the image it
/// publishes into and the truth file it writes.
struct Driver<W: Write> {
    plant: Plant,
    shared: Arc<Mutex<Shared>>,
    truth: Option<TruthWriter<W>>,
    start: Instant,
    rows: Vec<TruthRow>,
    applied: Vec<Applied>,
}

impl<W: Write> Driver<W> {
    fn new(plant: Plant, shared: Arc<Mutex<Shared>>, mut truth: Option<TruthWriter<W>>) -> Self {
        if let Some(t) = truth.as_mut() {
            t.set_start(jiff::Timestamp::now());
        }
        Self {
            plant,
            shared,
            truth,
            start: Instant::now(),
            rows: Vec::new(),
            applied: Vec::new(),
        }
    }

    /// Advances the plant to the wall clock in whole fixed steps (as many as
    /// the elapsed time needs, so a late wake-up catches up rather than
    /// slowing simulated time), publishes the registers and link states, and
    /// writes the truth rows.
    fn wake(&mut self) -> anyhow::Result<()> {
        let step_ms = u128::from(self.plant.step_ms());
        let target = (self.start.elapsed().as_millis() / step_ms) as u64;
        self.plant
            .advance_to(target, &mut self.rows, &mut self.applied);
        log_applied(&self.plant, &self.applied);
        self.applied.clear();
        {
            let mut s = self.shared.lock().unwrap_or_else(PoisonError::into_inner);
            self.plant.write_registers(&mut s.image);
            s.link_down = self.plant.links_down();
            s.reply_delay = self.plant.reply_delays();
            s.refusals = self.plant.refusals();
            s.miscount = self.plant.miscounts();
        }
        // The truth file is written from here directly: a few kilobytes a
        // second through a buffer, flushed once a second, cost less than a
        // channel to a writer thread would.
        if let Some(t) = self.truth.as_mut() {
            for row in &self.rows {
                t.write(row).context("cannot write the truth file")?;
            }
        }
        self.rows.clear();
        Ok(())
    }

    /// The loop: wake every step until `shutdown`, then once more so the
    /// file ends at the moment of the stop, and flush.
    async fn drive(mut self, shutdown: CancellationToken) -> anyhow::Result<()> {
        let mut tick = tokio::time::interval(Duration::from_millis(self.plant.step_ms()));
        // Skip, not Burst: the elapsed time decides how many steps to take,
        // so a burst of ticks after a stall would only wake the task for
        // nothing.
        tick.set_missed_tick_behavior(MissedTickBehavior::Skip);
        let result = loop {
            let stopping = tokio::select! {
                biased;
                () = shutdown.cancelled() => true,
                _ = tick.tick() => false,
            };
            if let Err(e) = self.wake() {
                // Tests depend on the truth file, so a failed write stops the run.
                shutdown.cancel();
                break Err(e);
            }
            if stopping {
                break Ok(());
            }
        };
        let flushed = match self.truth.as_mut() {
            Some(t) => t.flush().context("cannot flush the truth file"),
            None => Ok(()),
        };
        tracing::info!("stopped at {:.3} s of simulated time", self.plant.time_s());
        result.and(flushed)
    }
}

fn log_applied(plant: &Plant, applied: &[Applied]) {
    let site = plant.site();
    let tank = |i: usize| site.tanks.get(i).map_or("?", |t| t.id.as_str());
    for a in applied {
        let t = a.time_s;
        match &a.event.kind {
            EventKind::LeakOpens { tank: i, hole } => tracing::info!(
                "{t:.2} s: {} leak opens: {} mm hole at {} m, Cd {}",
                tank(*i),
                hole.diameter_m * 1000.0,
                hole.height_m,
                hole.cd
            ),
            EventKind::LeakCloses { tank: i } => {
                tracing::info!("{t:.2} s: {} leak closes", tank(*i))
            }
            EventKind::TransferStarts { tank: i, flow_m3_s } => {
                tracing::info!(
                    "{t:.2} s: {} transfer starts at {} m³/h",
                    tank(*i),
                    flow_m3_s * 3600.0
                )
            }
            EventKind::TransferStops { tank: i } => {
                tracing::info!("{t:.2} s: {} transfer stops", tank(*i))
            }
            EventKind::SensorFault {
                tank: i,
                sensor,
                fault,
            } => {
                tracing::info!("{t:.2} s: {} {} sensor: {fault:?}", tank(*i), sensor.name())
            }
            EventKind::LinkDrops { device, duration_s } => tracing::info!(
                "{t:.2} s: link to {} drops for {duration_s} s",
                site.devices.get(*device).map_or("?", |d| d.id.as_str())
            ),
            EventKind::DeviceSlows {
                device,
                duration_s,
                reply_delay_ms,
            } => tracing::info!(
                "{t:.2} s: {} answers {reply_delay_ms} ms late for {duration_s} s",
                site.devices.get(*device).map_or("?", |d| d.id.as_str())
            ),
            EventKind::DeviceRefuses {
                device,
                duration_s,
                refusal,
            } => tracing::info!(
                "{t:.2} s: {} answers exception {} to {} for {}",
                site.devices.get(*device).map_or("?", |d| d.id.as_str()),
                refusal.code,
                refusal
                    .only
                    .map_or("every read".to_owned(), |(table, start, count)| format!(
                        "reads of {table:?} {start}..{}",
                        u32::from(start) + u32::from(count) - 1
                    )),
                duration_s.map_or("the rest of the run".to_owned(), |d| format!("{d} s"))
            ),
            EventKind::DeviceMiscounts {
                device,
                duration_s,
                extra_values,
            } => tracing::info!(
                "{t:.2} s: {} answers {extra_values:+} values to every read for {}",
                site.devices.get(*device).map_or("?", |d| d.id.as_str()),
                duration_s.map_or("the rest of the run".to_owned(), |d| format!("{d} s"))
            ),
            EventKind::Flag { tank: i, raised } => tracing::info!(
                "{t:.2} s: {} leak flag {}",
                tank(*i),
                if *raised { "raised" } else { "lowered" }
            ),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;
    use tokio_modbus::prelude::*;

    fn demo() -> Scenario {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/demo.toml");
        scenario::load(&path).unwrap_or_else(|e| panic!("{e}"))
    }

    /// A simulator on a free loopback port, running in the background.
    async fn start() -> (
        SocketAddr,
        Arc<RequestCounts>,
        CancellationToken,
        tokio::task::JoinHandle<anyhow::Result<()>>,
    ) {
        let sim = Simulator::bind(demo(), Some("127.0.0.1:0")).await.unwrap();
        let addr = sim.local_addr().unwrap();
        let counts = sim.counts();
        let stop = CancellationToken::new();
        let handle = tokio::spawn(sim.run(None::<TruthWriter<Vec<u8>>>, stop.clone()));
        (addr, counts, stop, handle)
    }

    #[tokio::test]
    async fn a_client_reads_the_encoded_level_and_writes_are_refused_and_counted() {
        let (addr, counts, stop, handle) = start().await;
        let mut east = tcp::connect_slave(addr, Slave(1)).await.unwrap();
        // FF-T12 starts at 4.2 m with 1 mm of noise: 17440 counts, give or
        // take 3.2 counts per mm.
        let words = east.read_input_registers(0, 2).await.unwrap().unwrap();
        assert!((i32::from(words[0]) - 17_440).abs() < 20, "{words:?}");
        assert_eq!(words[1], 0, "no transfer");
        let coil = east.read_coils(0, 1).await.unwrap().unwrap();
        assert_eq!(coil, [false]);

        let refused = east.write_single_register(0, 1).await.unwrap();
        assert_eq!(refused, Err(ExceptionCode::IllegalFunction));
        let refused = east.write_single_coil(0, true).await.unwrap();
        assert_eq!(refused, Err(ExceptionCode::IllegalFunction));
        let too_many = east.read_holding_registers(0, 126).await.unwrap();
        assert_eq!(too_many, Err(ExceptionCode::IllegalDataValue));
        let past_end = east.read_holding_registers(65_500, 100).await.unwrap();
        assert_eq!(past_end, Err(ExceptionCode::IllegalDataAddress));

        // FF-T20 on unit 2: 5.1 m as whole millimetres, low word first.
        east.set_slave(Slave(2));
        let words = east.read_holding_registers(0, 2).await.unwrap().unwrap();
        let mm = u32::from(words[1]) << 16 | u32::from(words[0]);
        assert!((5090..=5110).contains(&mm), "{mm}");
        east.set_slave(Slave(9));
        let nobody = east.read_holding_registers(0, 1).await.unwrap();
        assert_eq!(nobody, Err(ExceptionCode::GatewayTargetDevice));

        assert_eq!(counts.get(0x04), 1);
        assert_eq!(counts.get(0x03), 4);
        assert_eq!(counts.get(0x01), 1);
        assert_eq!(counts.writes(), 2);
        assert_eq!(
            counts.summary_line(),
            r#"requests by function code: {"1": 1, "3": 4, "4": 1, "5": 1, "6": 1}"#
        );

        stop.cancel();
        handle.await.unwrap().unwrap();
        // Stopping closes open connections.
        let after =
            tokio::time::timeout(Duration::from_secs(1), east.read_input_registers(0, 1)).await;
        assert!(!matches!(after, Ok(Ok(Ok(_)))), "{after:?}");
    }

    #[tokio::test]
    async fn a_dropped_link_goes_silent_for_its_device_only() {
        let mut s = demo();
        s.events = vec![scenario::Event {
            at_s: 0.0,
            kind: EventKind::LinkDrops {
                device: 0,
                duration_s: 0.3,
            },
        }];
        let sim = Simulator::bind(s, Some("127.0.0.1:0")).await.unwrap();
        let addr = sim.local_addr().unwrap();
        let stop = CancellationToken::new();
        let handle = tokio::spawn(sim.run(None::<TruthWriter<Vec<u8>>>, stop.clone()));

        let mut west = tcp::connect_slave(addr, Slave(2)).await.unwrap();
        assert!(west.read_holding_registers(0, 2).await.unwrap().is_ok());
        let mut east = tcp::connect_slave(addr, Slave(1)).await.unwrap();
        let silent =
            tokio::time::timeout(Duration::from_millis(150), east.read_input_registers(0, 1)).await;
        assert!(silent.is_err(), "expected a timeout, got {silent:?}");
        // After the drop a fresh connection is answered again (the old one
        // would take the late reply, if there were one, for the next answer).
        tokio::time::sleep(Duration::from_millis(250)).await;
        let mut east = tcp::connect_slave(addr, Slave(1)).await.unwrap();
        assert!(east.read_input_registers(0, 1).await.unwrap().is_ok());

        stop.cancel();
        handle.await.unwrap().unwrap();
    }

    /// A refused span gets its exception (other reads do not), and a
    /// miscounting device's replies reach the agent's link as malformed.
    #[tokio::test]
    async fn a_device_refuses_a_span_and_then_miscounts_its_replies() {
        use leaktally::acquire::link::{Link, LinkError};
        use leaktally::acquire::plan::Read;
        use leaktally::registers::RegisterKind;
        use leaktally::registers::Table;
        let mut s = demo();
        s.events = vec![
            scenario::Event {
                at_s: 0.0,
                kind: EventKind::DeviceRefuses {
                    device: 0,
                    duration_s: Some(0.4),
                    refusal: scenario::Refusal {
                        code: 2,
                        only: Some((scenario::SimTable::Holding, 12, 2)),
                    },
                },
            },
            scenario::Event {
                at_s: 0.5,
                kind: EventKind::DeviceMiscounts {
                    device: 0,
                    duration_s: None,
                    extra_values: 2,
                },
            },
        ];
        let sim = Simulator::bind(s, Some("127.0.0.1:0")).await.unwrap();
        let addr = sim.local_addr().unwrap();
        let stop = CancellationToken::new();
        let handle = tokio::spawn(sim.run(None::<TruthWriter<Vec<u8>>>, stop.clone()));

        let read = |start: u16, count: u16| Read {
            table: Table::Registers(RegisterKind::Holding),
            start,
            count,
            values: vec![],
        };
        let mut link = Link::new(&addr.to_string(), 1, Duration::from_secs(1));
        link.connect().await.unwrap();
        assert_eq!(
            link.read(&read(10, 4)).await,
            Err(LinkError::Exception { code: 2 })
        );
        assert!(link.read(&read(10, 2)).await.is_ok(), "outside the span");
        assert!(link.is_connected(), "an exception keeps the connection");
        tokio::time::sleep(Duration::from_millis(700)).await;
        assert_eq!(
            link.read(&read(10, 4)).await,
            Err(LinkError::Malformed {
                got: 6,
                wanted: 4,
                what: "registers"
            })
        );

        stop.cancel();
        handle.await.unwrap().unwrap();
    }

    #[tokio::test]
    async fn a_slowed_device_answers_late_and_then_on_time_again() {
        let mut s = demo();
        s.events = vec![scenario::Event {
            at_s: 0.0,
            kind: EventKind::DeviceSlows {
                device: 0,
                duration_s: 0.5,
                reply_delay_ms: 300,
            },
        }];
        let sim = Simulator::bind(s, Some("127.0.0.1:0")).await.unwrap();
        let addr = sim.local_addr().unwrap();
        let stop = CancellationToken::new();
        let handle = tokio::spawn(sim.run(None::<TruthWriter<Vec<u8>>>, stop.clone()));

        let mut east = tcp::connect_slave(addr, Slave(1)).await.unwrap();
        let began = std::time::Instant::now();
        assert!(east.read_input_registers(0, 1).await.unwrap().is_ok());
        let late = began.elapsed();
        assert!(late >= Duration::from_millis(300), "{late:?}");
        // The other device is not slowed.
        east.set_slave(Slave(2));
        let began = std::time::Instant::now();
        assert!(east.read_holding_registers(0, 2).await.unwrap().is_ok());
        assert!(began.elapsed() < Duration::from_millis(200));
        tokio::time::sleep(Duration::from_millis(400)).await;
        east.set_slave(Slave(1));
        let began = std::time::Instant::now();
        assert!(east.read_input_registers(0, 1).await.unwrap().is_ok());
        assert!(began.elapsed() < Duration::from_millis(200));

        stop.cancel();
        handle.await.unwrap().unwrap();
    }

    #[tokio::test]
    async fn the_truth_file_gets_rows_while_running_and_on_stop() {
        let sim = Simulator::bind(demo(), Some("127.0.0.1:0")).await.unwrap();
        let stop = CancellationToken::new();
        let buffer = SharedBuffer::default();
        let writer = TruthWriter::new(
            buffer.clone(),
            vec!["FF-T12".into(), "FF-T14".into(), "FF-T20".into()],
            jiff::Timestamp::now(),
        )
        .unwrap();
        let handle = tokio::spawn(sim.run(Some(writer), stop.clone()));
        tokio::time::sleep(Duration::from_millis(250)).await;
        stop.cancel();
        handle.await.unwrap().unwrap();
        let text = String::from_utf8(buffer.0.lock().unwrap().clone()).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines[0], truth::HEADER);
        // Rows at 0.0, 0.1 and 0.2 s at least, three tanks each.
        assert!(lines.len() >= 10, "{text}");
        assert!(
            lines[1].starts_with("0.000,") && lines[1].contains(",FF-T12,4.2,0,0,0,0,false"),
            "{}",
            lines[1]
        );
    }

    /// A Write sink the test can read after the simulator has it.
    #[derive(Clone, Default)]
    struct SharedBuffer(Arc<Mutex<Vec<u8>>>);

    impl Write for SharedBuffer {
        fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
            self.0.lock().unwrap().extend_from_slice(buf);
            Ok(buf.len())
        }
        fn flush(&mut self) -> std::io::Result<()> {
            Ok(())
        }
    }
}
