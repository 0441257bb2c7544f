//! A read-only Modbus link to one device, with timeouts and reconnects:
//! over TCP, or as one unit on a shared serial line (Modbus RTU, through
//! [`serial`](super::serial)).
//!
//! The agent must never write to the control system. This type is the only
//! place that holds a tokio-modbus client, and it exposes the four read
//! function codes (01 to 04) and nothing else, so no other code can send a
//! write: the guarantee holds by construction, not by review.
//!
//! tokio-modbus has no timeouts and no reconnect of its own. Every connect
//! and request here is wrapped in a timeout, and after a timeout or any
//! transport or protocol error the connection is dropped: a late reply to a
//! timed-out request would otherwise be taken as the answer to the next one
//! (the transaction-id mismatch of tokio-modbus issue 324). After an
//! exception response the connection stays, since the device is fine and
//! merely refused that request.

use crate::acquire::plan::Read;
use crate::acquire::serial::{Buses, SerialBus};
use crate::config::Device;
use crate::registers::Table;
use crate::registers::{BitKind, RegisterKind};
use std::io;
use std::net::SocketAddr;
use std::pin::Pin;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::task::{Context as TaskContext, Poll};
use std::time::Duration;
use thiserror::Error;
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::TcpStream;
use tokio::time::timeout;
use tokio_modbus::client::{Client, Context};
use tokio_modbus::prelude::*;

/// Why a read failed. Follows tokio-modbus in keeping "the exchange failed"
/// apart from "the device said no": the first calls for a reconnect, the
/// second does not.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum LinkError {
    #[error("no connection to {0}")]
    NotConnected(String),
    #[error("cannot resolve {address}: {reason}")]
    Resolve { address: String, reason: String },
    #[error("connecting to {address} failed: {reason}")]
    Connect { address: String, reason: String },
    #[error("no answer within {} ms", .0.as_millis())]
    Timeout(Duration),
    /// The device (or a gateway, or something between) ended the TCP
    /// connection: an end of stream where a reply was due.
    #[error("the device closed the connection")]
    Closed,
    #[error("the exchange failed: {0}")]
    Transport(String),
    #[error("the device answered exception {code} ({})", exception_meaning(*.code))]
    Exception { code: u8 },
    /// A reply with more or fewer values than the request asked for: a
    /// device or gateway fault, never data to use.
    #[error("the device answered {got} {what} where {wanted} were asked for")]
    Malformed {
        got: usize,
        wanted: usize,
        what: &'static str,
    },
}

impl LinkError {
    /// Whether the connection is unusable after this error.
    pub fn needs_reconnect(&self) -> bool {
        !matches!(
            self,
            LinkError::Exception { .. } | LinkError::Malformed { .. }
        )
    }

    /// Whether the device refused the addresses (exception 02).
    pub fn is_illegal_address(&self) -> bool {
        matches!(self, LinkError::Exception { code: 2 })
    }

    /// Whether the device answered, even if only to refuse: the link works.
    pub fn device_answered(&self) -> bool {
        !self.needs_reconnect()
    }
}

/// What an exception code means, in the words of the Modbus Application
/// Protocol Specification V1.1b3, section 7, which defines codes 01 to 06,
/// 08, 0A and 0B.
pub fn exception_meaning(code: u8) -> &'static str {
    match code {
        1 => "illegal function",
        2 => "illegal data address",
        3 => "illegal data value",
        4 => "server device failure",
        5 => "acknowledge",
        6 => "server device busy",
        8 => "memory parity error",
        10 => "gateway path unavailable",
        11 => "gateway target device failed to respond",
        _ => "a code the Modbus specification does not define",
    }
}

/// What to do about an exception, for the log and `leaktally check`.
pub fn exception_hint(code: u8) -> &'static str {
    match code {
        1 => {
            "the device does not serve this function code: check register = \"holding\" or \"input\" (input = \"coil\" or \"discrete_input\" for a flag)"
        }
        2 => {
            "the device has no such register: check the address (0-based: a manual's 40001 is holding 0, 30001 input 0); for a read across unmapped registers, bridge_gaps = false avoids them"
        }
        3 => {
            "the device refused the quantity or range asked for: some limit a read below the protocol's 125 registers; bridge_gaps = false makes reads shorter"
        }
        4 => {
            "the device failed while answering; some devices also answer this to a unit id they do not have: check unit_id"
        }
        5 => "the device took the request but has not finished it; it should clear by itself",
        6 => {
            "the device is busy with other work; it should clear by itself (a longer poll_interval_ms helps a device that stays busy)"
        }
        8 => "the device found a parity error in its own memory; have the device checked",
        10 => "the gateway has no path to this unit id: check unit_id and the gateway's routing",
        11 => {
            "the gateway got no answer from the unit id behind it: check unit_id, and that the device behind the gateway is powered and wired"
        }
        _ => "see the device's manual for what this code means",
    }
}

/// What one read returned.
#[derive(Debug, Clone, PartialEq)]
pub enum Words {
    Registers(Vec<u16>),
    Bits(Vec<bool>),
}

/// A lazily connected, read-only client for one device.
pub struct Link {
    address: String,
    unit_id: u8,
    request_timeout: Duration,
    context: Option<Context>,
    /// Set by the stream under the context when the peer ended it.
    peer_closed: Arc<AtomicBool>,
    /// For a device on a serial line: the line, shared with the other
    /// devices on it, and the silence kept before each request. The
    /// device counts as connected while `serial_up` is set.
    serial: Option<(Arc<SerialBus>, Duration)>,
    serial_up: bool,
}

impl Link {
    /// A Modbus TCP link to host:port.
    pub fn new(address: &str, unit_id: u8, request_timeout: Duration) -> Self {
        Self {
            address: address.to_owned(),
            unit_id,
            request_timeout,
            context: None,
            peer_closed: Arc::new(AtomicBool::new(false)),
            serial: None,
            serial_up: false,
        }
    }

    /// A link to one unit on a serial line, sharing `bus` with the other
    /// devices on it.
    pub fn on_bus(
        bus: Arc<SerialBus>,
        unit_id: u8,
        request_timeout: Duration,
        delay: Duration,
    ) -> Self {
        let mut link = Self::new(&bus.line().port, unit_id, request_timeout);
        link.serial = Some((bus, delay));
        link
    }

    /// The link to a configured device: over TCP, or on its serial port's
    /// bus from `buses` (made from the same config).
    pub fn for_device(device: &Device, buses: &Buses) -> Self {
        match device
            .serial
            .as_ref()
            .and_then(|line| buses.get(&line.port))
        {
            Some(bus) => Self::on_bus(
                bus,
                device.unit_id,
                device.request_timeout,
                device.inter_request_delay,
            ),
            None => Self::new(&device.address, device.unit_id, device.request_timeout),
        }
    }

    pub fn is_connected(&self) -> bool {
        self.context.is_some() || self.serial_up
    }

    /// Connects if not connected. The TCP stream is made here rather than
    /// by tokio-modbus, so that it can be watched for the peer closing it
    /// (see [`WatchedStream`]) and its errors said as they are. On a
    /// serial line, opens the port if no device on it has yet.
    pub async fn connect(&mut self) -> Result<(), LinkError> {
        if let Some((bus, _)) = &self.serial {
            bus.open().await?;
            self.serial_up = true;
            return Ok(());
        }
        if self.context.is_some() {
            return Ok(());
        }
        let addr = resolve(&self.address, self.request_timeout).await?;
        let failed = |reason: String| LinkError::Connect {
            address: self.address.clone(),
            reason,
        };
        let stream = match timeout(self.request_timeout, TcpStream::connect(addr)).await {
            Ok(Ok(stream)) => stream,
            Ok(Err(e)) => return Err(failed(connect_reason(&e))),
            Err(_) => {
                return Err(failed(format!(
                    "no answer within {} ms",
                    self.request_timeout.as_millis()
                )));
            }
        };
        // Requests are a few bytes each; waiting to fill a segment would
        // only add latency to every poll.
        let _ = stream.set_nodelay(true);
        let closed = Arc::new(AtomicBool::new(false));
        self.peer_closed = Arc::clone(&closed);
        let watched = WatchedStream {
            inner: stream,
            closed,
        };
        self.context = Some(tcp::attach_slave(watched, Slave(self.unit_id)));
        Ok(())
    }

    /// Closes the connection; the next read reconnects.
    pub fn disconnect(&mut self) {
        // Dropping the context closes the socket. A serial line stays open
        // for the other devices on it (the bus closes it after a failed
        // exchange itself); this device waits out its backoff.
        self.context = None;
        self.serial_up = false;
    }

    /// Performs one planned read.
    pub async fn read(&mut self, read: &Read) -> Result<Words, LinkError> {
        let wait = self.request_timeout;
        let (start, count) = (read.start, read.count);
        // The read requests are built here and nowhere else; `call` sends
        // whatever it is given, so this match is what keeps the link
        // read-only.
        let request = match read.table {
            Table::Registers(RegisterKind::Holding) => Request::ReadHoldingRegisters(start, count),
            Table::Registers(RegisterKind::Input) => Request::ReadInputRegisters(start, count),
            Table::Bits(BitKind::Coil) => Request::ReadCoils(start, count),
            Table::Bits(BitKind::DiscreteInput) => Request::ReadDiscreteInputs(start, count),
        };
        // `Client::call` rather than the `Reader` methods: those assert the
        // reply's length in debug builds (a panic on a device's bad reply)
        // and pass a wrong length on in release builds. Here the length is
        // checked against the request either way.
        let answer = if let Some((bus, delay)) = &self.serial {
            if !self.serial_up {
                return Err(LinkError::NotConnected(self.address.clone()));
            }
            bus.call(self.unit_id, *delay, wait, request).await
        } else {
            let Some(ctx) = self.context.as_mut() else {
                return Err(LinkError::NotConnected(self.address.clone()));
            };
            match timeout(wait, ctx.call(request)).await {
                Err(_) => Err(LinkError::Timeout(wait)),
                Ok(Err(e)) => Err(self.transport_error(&e)),
                Ok(Ok(reply)) => Ok(reply),
            }
        };
        let outcome = match answer {
            Err(e) => Err(e),
            Ok(Err(code)) => Err(LinkError::Exception {
                code: u8::from(code),
            }),
            Ok(Ok(response)) => checked(response, usize::from(count)),
        };
        if let Err(e) = &outcome
            && e.needs_reconnect()
        {
            self.disconnect();
        }
        outcome
    }

    /// Says what a failed exchange was. tokio-modbus 0.17 reports the end
    /// of the stream with whatever error number the thread last saw (often
    /// "Operation now in progress"), so the stream's own record of the peer
    /// closing comes first.
    fn transport_error(&self, e: &tokio_modbus::Error) -> LinkError {
        if self.peer_closed.load(Ordering::Relaxed) {
            return LinkError::Closed;
        }
        match e {
            tokio_modbus::Error::Transport(io) => match io.kind() {
                io::ErrorKind::ConnectionReset => {
                    LinkError::Transport("the device reset the connection".into())
                }
                io::ErrorKind::BrokenPipe | io::ErrorKind::ConnectionAborted => {
                    LinkError::Transport("the connection was closed while sending".into())
                }
                io::ErrorKind::InvalidData => {
                    LinkError::Transport(format!("a malformed reply ({io})"))
                }
                _ => LinkError::Transport(io.to_string()),
            },
            tokio_modbus::Error::Protocol(p) => LinkError::Transport(format!(
                "a reply that does not match the request ({p}); a late reply to an earlier request, or a second client on the same gateway"
            )),
        }
    }
}

/// Checks a reply against the request's count: registers must match it
/// exactly; bits come packed in whole bytes, so up to the next multiple of
/// eight is padding, and a whole byte more than needed is a wrong reply.
fn checked(response: Response, wanted: usize) -> Result<Words, LinkError> {
    match response {
        Response::ReadHoldingRegisters(words) | Response::ReadInputRegisters(words) => {
            if words.len() == wanted {
                Ok(Words::Registers(words))
            } else {
                Err(LinkError::Malformed {
                    got: words.len(),
                    wanted,
                    what: "registers",
                })
            }
        }
        Response::ReadCoils(mut bits) | Response::ReadDiscreteInputs(mut bits) => {
            let padded = wanted.div_ceil(8) * 8;
            if bits.len() < wanted || bits.len() > padded {
                Err(LinkError::Malformed {
                    got: bits.len(),
                    wanted,
                    what: "bits",
                })
            } else {
                bits.truncate(wanted);
                Ok(Words::Bits(bits))
            }
        }
        // tokio-modbus checks that the reply's function code is the
        // request's, so no other kind can come back; say so if it does.
        other => Err(LinkError::Transport(format!(
            "a reply of another kind than asked for ({other:?})"
        ))),
    }
}

/// A connect error as a person should read it.
fn connect_reason(e: &io::Error) -> String {
    match e.kind() {
        io::ErrorKind::ConnectionRefused => {
            "connection refused (nothing listens on that port, or a firewall refuses)".into()
        }
        io::ErrorKind::TimedOut => "the connection attempt timed out".into(),
        io::ErrorKind::HostUnreachable | io::ErrorKind::NetworkUnreachable => {
            format!("no route to the device ({e})")
        }
        _ => e.to_string(),
    }
}

/// The TCP stream under a Modbus context, noting when the peer ends it: a
/// read that completes with no bytes into room for some is the end of the
/// stream. Everything else passes straight through.
#[derive(Debug)]
struct WatchedStream {
    inner: TcpStream,
    closed: Arc<AtomicBool>,
}

impl AsyncRead for WatchedStream {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut TaskContext<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        let room = buf.remaining() > 0;
        let polled = Pin::new(&mut self.inner).poll_read(cx, buf);
        if let Poll::Ready(Ok(())) = &polled
            && room
            && buf.filled().len() == before
        {
            self.closed.store(true, Ordering::Relaxed);
        }
        polled
    }
}

impl AsyncWrite for WatchedStream {
    fn poll_write(
        mut self: Pin<&mut Self>,
        cx: &mut TaskContext<'_>,
        data: &[u8],
    ) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.inner).poll_write(cx, data)
    }

    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut TaskContext<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_flush(cx)
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut TaskContext<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_shutdown(cx)
    }
}

/// Resolves host:port. A free function rather than a method: `Context` is
/// not `Sync`, so a `&Link` held across an await would make the poller's
/// future unsendable.
async fn resolve(address: &str, wait: Duration) -> Result<SocketAddr, LinkError> {
    if let Ok(addr) = address.parse::<SocketAddr>() {
        return Ok(addr);
    }
    let resolve_error = |reason: String| LinkError::Resolve {
        address: address.to_owned(),
        reason,
    };
    let mut found = timeout(wait, tokio::net::lookup_host(address))
        .await
        .map_err(|_| resolve_error("the name lookup timed out".into()))?
        .map_err(|e| resolve_error(e.to_string()))?;
    found
        .next()
        .ok_or_else(|| resolve_error("the name has no address".into()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn replies_are_checked_against_the_count_asked_for() {
        let regs = |n: usize| Response::ReadHoldingRegisters(vec![7; n]);
        assert_eq!(checked(regs(4), 4), Ok(Words::Registers(vec![7; 4])));
        for n in [3, 5, 6] {
            assert_eq!(
                checked(regs(n), 4),
                Err(LinkError::Malformed {
                    got: n,
                    wanted: 4,
                    what: "registers"
                }),
                "{n} registers for 4"
            );
        }
        // 3 bits come as one byte, 8 bits once unpacked: padding, trimmed.
        let bits = |n: usize| Response::ReadCoils(vec![true; n]);
        assert_eq!(checked(bits(8), 3), Ok(Words::Bits(vec![true; 3])));
        // A second byte for 3 bits, or a byte short for 9, is wrong.
        assert!(matches!(
            checked(bits(16), 3),
            Err(LinkError::Malformed { got: 16, .. })
        ));
        assert!(matches!(
            checked(bits(8), 9),
            Err(LinkError::Malformed { got: 8, .. })
        ));
        assert_eq!(checked(bits(16), 9), Ok(Words::Bits(vec![true; 9])));
    }

    #[test]
    fn every_exception_has_a_meaning_and_a_hint() {
        for code in 0..=255u8 {
            assert!(!exception_meaning(code).is_empty() && !exception_hint(code).is_empty());
        }
        let e = LinkError::Exception { code: 11 };
        assert_eq!(
            e.to_string(),
            "the device answered exception 11 (gateway target device failed to respond)"
        );
        assert!(!e.needs_reconnect() && e.device_answered());
        assert!(LinkError::Closed.needs_reconnect());
    }

    /// Against a listener that accepts and then closes, the first read says
    /// the device closed the connection (not tokio-modbus's leftover error
    /// number), and a connect to a closed port says it was refused.
    #[tokio::test]
    async fn a_closed_connection_and_a_refused_one_are_said_as_such() {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let address = listener.local_addr().unwrap().to_string();
        let closer = tokio::spawn(async move {
            let (socket, _) = listener.accept().await.unwrap();
            drop(socket);
            listener
        });
        let mut link = Link::new(&address, 1, Duration::from_secs(2));
        link.connect().await.unwrap();
        let listener = closer.await.unwrap();
        let read = Read {
            table: Table::Registers(RegisterKind::Holding),
            start: 0,
            count: 2,
            values: vec![],
        };
        assert_eq!(link.read(&read).await, Err(LinkError::Closed));
        assert!(!link.is_connected());
        drop(listener);
        let refused = link.connect().await.unwrap_err().to_string();
        assert!(refused.contains("connection refused"), "{refused}");
    }
}
