//! The Modbus service: one listener (or one serial line) for every device
//! of the site, requests routed by unit id, read function codes only, and a
//! count of every request by function code.
//!
//! It answers FC01, FC02, FC03 and FC04 from the shared register image. Every
//! other function code, and every write above all, gets IllegalFunction and
//! is counted, so a test can prove the agent never writes to the control
//! system. A unit id that no device has gets GatewayTargetDevice, the answer
//! of a gateway with nothing behind that id. While a device's link is down
//! its requests get no reply at all and the client times out, as when an
//! RTU's radio or serial link behind a gateway fails. While a device is
//! slowed, each of its replies waits out the delay first (requests on one
//! connection are answered in order, so later ones wait behind it). A
//! device the scenario makes refuse answers the reads it refuses with the
//! exception given; one it makes miscount answers with that many values
//! more (or fewer) than asked, as a faulty device or gateway can.
//!
//! On a serial line (Modbus RTU, [`serve_serial`]) the devices are units on
//! one line: a unit id no device has gets no answer (nothing is there to
//! answer), and each reply waits out the time the request and the reply
//! would take on the wire at the line's baud rate, because a pty pair, which
//! the tests use for a cable, carries bytes at once whatever the baud rate.
//! Requests are answered one at a time, as on a real line.
//!
//! Left out: the physics and the clock (they update the shared image from
//! outside), and per-connection state: every connection sees the same
//! image.

use crate::registers::{MAX_READ_BITS, MAX_READ_REGISTERS, ReadError, RegisterImage};
use crate::scenario::{Refusal, SimTable};
use leaktally::config::SerialLine;
use leaktally::registers::{BitKind, RegisterKind};
use std::collections::{BTreeMap, HashMap};
use std::future::Future;
use std::io;
use std::net::SocketAddr;
use std::pin::Pin;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, PoisonError};
use std::time::Duration;
use tokio::net::TcpListener;
use tokio_modbus::prelude::*;
use tokio_modbus::server::Terminated;
use tokio_modbus::server::tcp::{Server, accept_tcp_connection};

/// Function codes that change a device's state: write single and multiple
/// coils and registers, mask write, and read/write multiple registers.
pub const WRITE_CODES: [u8; 6] = [0x05, 0x06, 0x0F, 0x10, 0x16, 0x17];

/// What the physics side publishes and the service reads. A std mutex is
/// enough: it is held for a copy in or out, never across an await.
#[derive(Debug)]
pub struct Shared {
    pub image: RegisterImage,
    /// Per device: no replies while true.
    pub link_down: Vec<bool>,
    /// Per device: how long each reply waits before it is sent.
    pub reply_delay: Vec<Duration>,
    /// Per device: the refusals in force.
    pub refusals: Vec<Vec<Refusal>>,
    /// Per device: how many values its replies are off by (0: none).
    pub miscount: Vec<i16>,
}

/// Requests seen, by function code, across all connections.
#[derive(Debug)]
pub struct RequestCounts {
    by_code: [AtomicU64; 256],
}

impl Default for RequestCounts {
    fn default() -> Self {
        Self {
            by_code: std::array::from_fn(|_| AtomicU64::new(0)),
        }
    }
}

impl RequestCounts {
    pub fn record(&self, code: u8) {
        // Relaxed: each counter stands alone, and readers only want totals.
        self.by_code[usize::from(code)].fetch_add(1, Ordering::Relaxed);
    }

    pub fn get(&self, code: u8) -> u64 {
        self.by_code[usize::from(code)].load(Ordering::Relaxed)
    }

    /// The codes seen at least once, with their counts.
    pub fn snapshot(&self) -> BTreeMap<u8, u64> {
        (0..=255u8)
            .map(|c| (c, self.get(c)))
            .filter(|&(_, n)| n > 0)
            .collect()
    }

    /// Requests with a write function code.
    pub fn writes(&self) -> u64 {
        WRITE_CODES.iter().map(|&c| self.get(c)).sum()
    }

    /// One line for the log: `requests by function code: {"3": 120, ...}`;
    /// the part after the colon is JSON, keyed by the decimal code, so a
    /// test can parse it.
    pub fn summary_line(&self) -> String {
        let fields: Vec<String> = self
            .snapshot()
            .iter()
            .map(|(c, n)| format!("\"{c}\": {n}"))
            .collect();
        format!("requests by function code: {{{}}}", fields.join(", "))
    }
}

/// The service one connection gets. Cloning shares everything.
#[derive(Clone)]
pub struct SimService {
    shared: Arc<Mutex<Shared>>,
    counts: Arc<RequestCounts>,
    /// Unit id to device index.
    units: Arc<HashMap<u8, usize>>,
    /// On a serial line: its settings, for the wire time of each exchange.
    wire: Option<SerialLine>,
}

impl SimService {
    pub fn new(
        shared: Arc<Mutex<Shared>>,
        counts: Arc<RequestCounts>,
        units: HashMap<u8, usize>,
    ) -> Self {
        Self {
            shared,
            counts,
            units: Arc::new(units),
            wire: None,
        }
    }

    /// The same service as units on a serial line with `line`'s settings.
    pub fn on_serial_line(mut self, line: SerialLine) -> Self {
        self.wire = Some(line);
        self
    }

    /// The reply to a request, and how long to hold it back.
    fn handle(
        &self,
        req: SlaveRequest<'static>,
    ) -> (Result<Option<Response>, ExceptionCode>, Duration) {
        let SlaveRequest { slave, .. } = &req;
        let delay = self
            .units
            .get(slave)
            .and_then(|&device| {
                let shared = self.shared.lock().unwrap_or_else(PoisonError::into_inner);
                shared.reply_delay.get(device).copied()
            })
            .unwrap_or(Duration::ZERO);
        let answer = self.answer(req);
        let wire = match (&self.wire, &answer) {
            // No reply: the master's timeout is all there is.
            (None, _) | (_, Ok(None)) => Duration::ZERO,
            (Some(line), reply) => line.transmission_time(READ_REQUEST_BYTES + reply_bytes(reply)),
        };
        (answer, delay + wire)
    }

    fn answer(&self, req: SlaveRequest<'static>) -> Result<Option<Response>, ExceptionCode> {
        let SlaveRequest { slave, request } = req;
        self.counts.record(request.function_code().value());
        let Some(&device) = self.units.get(&slave) else {
            // On a line, nobody is there to answer; behind a gateway, the
            // gateway says so.
            return if self.wire.is_some() {
                Ok(None)
            } else {
                Err(ExceptionCode::GatewayTargetDevice)
            };
        };
        // A poisoned lock means the physics task panicked mid-update; the
        // image is still whole words, so serving it beats going silent.
        let shared = self.shared.lock().unwrap_or_else(PoisonError::into_inner);
        if shared.link_down.get(device).copied().unwrap_or(false) {
            return Ok(None);
        }
        let asked = match &request {
            Request::ReadCoils(a, n) => Some((SimTable::Coil, *a, *n)),
            Request::ReadDiscreteInputs(a, n) => Some((SimTable::DiscreteInput, *a, *n)),
            Request::ReadHoldingRegisters(a, n) => Some((SimTable::Holding, *a, *n)),
            Request::ReadInputRegisters(a, n) => Some((SimTable::Input, *a, *n)),
            _ => None,
        };
        if let Some((table, start, count)) = asked
            && let Some(refusal) = shared
                .refusals
                .get(device)
                .and_then(|r| r.iter().find(|r| r.applies(table, start, count)))
        {
            return Err(ExceptionCode::new(refusal.code));
        }
        let extra = shared.miscount.get(device).copied().unwrap_or(0);
        let image = &shared.image;
        let response = match request {
            Request::ReadCoils(a, n) => image
                .read_bits(device, BitKind::Coil, a, n)
                .map(Response::ReadCoils),
            Request::ReadDiscreteInputs(a, n) => image
                .read_bits(device, BitKind::DiscreteInput, a, n)
                .map(Response::ReadDiscreteInputs),
            Request::ReadHoldingRegisters(a, n) => image
                .read_registers(device, RegisterKind::Holding, a, n)
                .map(Response::ReadHoldingRegisters),
            Request::ReadInputRegisters(a, n) => image
                .read_registers(device, RegisterKind::Input, a, n)
                .map(Response::ReadInputRegisters),
            _ => return Err(ExceptionCode::IllegalFunction),
        };
        response
            .map(|r| Some(miscounted(r, extra)))
            .map_err(|e| match e {
                ReadError::IllegalDataValue => ExceptionCode::IllegalDataValue,
                ReadError::IllegalDataAddress => ExceptionCode::IllegalDataAddress,
            })
    }
}

/// An RTU read request's bytes: unit, function, address, count, CRC.
const READ_REQUEST_BYTES: usize = 8;

/// An RTU reply's bytes: unit, function, byte count, the data, CRC (an
/// exception: unit, function, code, CRC).
fn reply_bytes(reply: &Result<Option<Response>, ExceptionCode>) -> usize {
    match reply {
        Ok(Some(Response::ReadHoldingRegisters(v) | Response::ReadInputRegisters(v))) => {
            5 + 2 * v.len()
        }
        Ok(Some(Response::ReadCoils(v) | Response::ReadDiscreteInputs(v))) => {
            5 + v.len().div_ceil(8)
        }
        Ok(Some(_)) => 8,
        Ok(None) => 0,
        Err(_) => 5,
    }
}

/// A reply with `extra` values more (zeros) or fewer than it should have,
/// kept within the protocol's read limits: tokio-modbus's server drops the
/// connection on a reply it cannot encode, which would be another fault.
fn miscounted(response: Response, extra: i16) -> Response {
    fn resize<T: Clone + Default>(mut values: Vec<T>, extra: i16, max: u16) -> Vec<T> {
        let len = (values.len() as i64 + i64::from(extra)).clamp(0, i64::from(max));
        values.resize(len as usize, T::default());
        values
    }
    if extra == 0 {
        return response;
    }
    // Bits travel packed in bytes: a whole byte more or less is what the
    // client can see.
    let bits = extra.saturating_mul(8);
    match response {
        Response::ReadHoldingRegisters(v) => {
            Response::ReadHoldingRegisters(resize(v, extra, MAX_READ_REGISTERS))
        }
        Response::ReadInputRegisters(v) => {
            Response::ReadInputRegisters(resize(v, extra, MAX_READ_REGISTERS))
        }
        Response::ReadCoils(v) => Response::ReadCoils(resize(v, bits, MAX_READ_BITS)),
        Response::ReadDiscreteInputs(v) => {
            Response::ReadDiscreteInputs(resize(v, bits, MAX_READ_BITS))
        }
        other => other,
    }
}

impl tokio_modbus::server::Service for SimService {
    type Request = SlaveRequest<'static>;
    // None sends nothing: how a dropped link looks to the client.
    type Response = Option<Response>;
    type Exception = ExceptionCode;
    type Future = Pin<Box<dyn Future<Output = Result<Option<Response>, ExceptionCode>> + Send>>;

    fn call(&self, req: Self::Request) -> Self::Future {
        let (reply, delay) = self.handle(req);
        Box::pin(async move {
            if !delay.is_zero() {
                tokio::time::sleep(delay).await;
            }
            reply
        })
    }
}

/// Serves until `shutdown` completes; open connections close with it.
pub async fn serve(
    listener: TcpListener,
    service: SimService,
    shutdown: impl Future<Output = ()> + Send + Sync + 'static,
) -> io::Result<Terminated> {
    let server = Server::new(listener);
    let new_service = move |_peer: SocketAddr| Ok(Some(service.clone()));
    let on_connected = move |stream, peer| {
        let new_service = new_service.clone();
        async move { accept_tcp_connection(stream, peer, new_service) }
    };
    // A client that sends garbage or hangs up only loses its own connection.
    let on_process_error =
        |err: io::Error| tracing::debug!("connection closed with an error: {err}");
    server
        .serve_until(&on_connected, on_process_error, shutdown)
        .await
}

/// Opens a serial port with the line's settings.
/// (The agent's own settings for a line, so the two ends always agree.)
pub fn open_serial(line: &SerialLine) -> io::Result<tokio_serial::SerialStream> {
    use tokio_serial::SerialPortBuilderExt;
    leaktally::acquire::serial::port_builder(line)
        .open_native_async()
        .map_err(io::Error::from)
}

/// Serves the site's devices as units on the serial line `port` until
/// `shutdown` is cancelled. tokio-modbus's RTU server ends on a frame it
/// cannot decode (line noise, a master at another baud rate); the port is
/// then opened again and serving goes on, as a real device would.
pub async fn serve_serial(
    port: tokio_serial::SerialStream,
    line: &SerialLine,
    service: SimService,
    shutdown: tokio_util::sync::CancellationToken,
) -> io::Result<Terminated> {
    let mut port = Some(port);
    loop {
        let stream = match port.take() {
            Some(stream) => stream,
            None => {
                tokio::select! {
                    () = shutdown.cancelled() => return Ok(Terminated::Aborted),
                    () = tokio::time::sleep(Duration::from_millis(100)) => {}
                }
                open_serial(line)?
            }
        };
        let stop = shutdown.clone();
        let served = tokio_modbus::server::rtu::Server::new(stream)
            .serve_until(service.clone(), async move { stop.cancelled().await })
            .await;
        match served {
            Ok(Terminated::Aborted) => return Ok(Terminated::Aborted),
            Ok(Terminated::Finished) => {
                tracing::debug!("the serial line {} ended; opening it again", line.port)
            }
            Err(e) => tracing::warn!(
                "a frame on {} could not be read ({e}); opening the port again",
                line.port
            ),
        }
    }
}
