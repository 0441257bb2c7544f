//! Modbus RTU serial lines: one port, opened once, shared by every device
//! on it, one request at a time.
//!
//! The Modbus serial line has a single master and at most one request
//! outstanding (Modbus over Serial Line Specification V1.02, 2.2): two
//! devices on one RS-485 pair cannot be asked at once, and a reply can only
//! be matched to its request by being the next frame on the wire. So each
//! port is a [`SerialBus`], and every device's [`Link`](super::link::Link)
//! on that port takes the bus's lock for the whole of one exchange: the
//! silence before it, the request and the reply (or the timeout). The
//! pollers of the devices on a port queue on that lock, which tokio's
//! mutex hands out first come, first served, so the devices are asked in
//! turn and a slow or silent device holds the line for at most its own
//! request timeout per request.
//!
//! After a timeout, a failed exchange or an exchange abandoned half-way
//! (a poller cancelled at shutdown), the port is closed and opened afresh
//! before the next request, its buffers cleared: a late reply must never
//! be read as the next device's answer.
//!
//! Left out: which reads to make (the poller's) and the read-only
//! guarantee (the link builds the requests; this module sends what it is
//! given).

use crate::acquire::link::LinkError;
use crate::acquire::plan::{Read, plan_reads};
use crate::config::{Config, Parity, SerialLine};
use std::collections::HashMap;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::Mutex;
use tokio::time::{Instant, sleep_until, timeout};
use tokio_modbus::client::{Client, Context};
use tokio_modbus::prelude::*;
use tokio_serial::{ClearBuffer, SerialPort, SerialPortBuilderExt};

/// The serial buses of a config, one per port, for the links of the
/// devices on them to share.
#[derive(Debug, Default, Clone)]
pub struct Buses {
    by_port: HashMap<String, Arc<SerialBus>>,
}

impl Buses {
    /// A bus for every serial port the config names (none for a site of
    /// Modbus TCP devices only). Opening waits for the first request.
    pub fn for_config(config: &Config) -> Self {
        let mut by_port = HashMap::new();
        for line in config.devices.iter().filter_map(|d| d.serial.as_ref()) {
            by_port
                .entry(line.port.clone())
                .or_insert_with(|| Arc::new(SerialBus::new(line.clone())));
        }
        Self { by_port }
    }

    /// The bus on `port`, if the config names it.
    pub fn get(&self, port: &str) -> Option<Arc<SerialBus>> {
        self.by_port.get(port).cloned()
    }
}

/// One serial port and its Modbus RTU client, shared by its devices.
pub struct SerialBus {
    line: SerialLine,
    state: Mutex<BusState>,
}

impl std::fmt::Debug for SerialBus {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SerialBus")
            .field("line", &self.line)
            .finish_non_exhaustive()
    }
}

struct BusState {
    /// The RTU client on the open port; `None` while closed.
    context: Option<Context>,
    /// When the line last fell silent (the end of the last exchange).
    quiet_since: Option<Instant>,
    /// Set while an exchange is under way; still set when a new one
    /// starts means the last was abandoned half-way.
    in_flight: bool,
}

impl SerialBus {
    pub fn new(line: SerialLine) -> Self {
        Self {
            line,
            state: Mutex::new(BusState {
                context: None,
                quiet_since: None,
                in_flight: false,
            }),
        }
    }

    pub fn line(&self) -> &SerialLine {
        &self.line
    }

    /// Opens the port if it is not open: what "connect" means on a line.
    pub async fn open(&self) -> Result<(), LinkError> {
        let mut state = self.state.lock().await;
        self.ensure_open(&mut state)
    }

    fn ensure_open(&self, state: &mut BusState) -> Result<(), LinkError> {
        if state.in_flight {
            // The last exchange was abandoned: its reply may still come.
            state.context = None;
            state.in_flight = false;
        }
        if state.context.is_none() {
            let port = open_port(&self.line)?;
            state.context = Some(rtu::attach_slave(port, Slave(1)));
        }
        Ok(())
    }

    /// One exchange with `unit` on the line: waits for the line, keeps
    /// `delay` of silence after the last exchange, sends `request` and
    /// waits up to `wait` for the reply. `Ok(Err(code))` is the device's
    /// exception.
    pub async fn call(
        &self,
        unit: u8,
        delay: Duration,
        wait: Duration,
        request: Request<'static>,
    ) -> Result<Result<Response, ExceptionCode>, LinkError> {
        let mut state = self.state.lock().await;
        self.ensure_open(&mut state)?;
        if let Some(quiet) = state.quiet_since {
            sleep_until(quiet + delay).await;
        }
        state.in_flight = true;
        let Some(context) = state.context.as_mut() else {
            return Err(LinkError::NotConnected(self.line.port.clone()));
        };
        context.set_slave(Slave(unit));
        let outcome = match timeout(wait, context.call(request)).await {
            Err(_) => Err(LinkError::Timeout(wait)),
            Ok(Err(e)) => Err(transport_error(&e)),
            Ok(Ok(reply)) => Ok(reply),
        };
        state.in_flight = false;
        state.quiet_since = Some(Instant::now());
        if outcome.is_err() {
            // A late or broken reply must not be read as the next one's.
            state.context = None;
        }
        outcome
    }
}

/// How long one planned read takes on the line by the wire alone: the
/// request (8 bytes: unit, function, address, count, CRC) and the reply
/// (unit, function, byte count, the data, CRC), without the silence before
/// it or the device's own time to answer.
pub fn exchange_time(line: &SerialLine, read: &Read) -> Duration {
    let data = match read.table {
        crate::registers::Table::Registers(_) => 2 * usize::from(read.count),
        crate::registers::Table::Bits(_) => usize::from(read.count).div_ceil(8),
    };
    line.transmission_time(8 + 5 + data)
}

/// The least a round of `port` takes (every device on it read once), by
/// the wire and the silences alone, and the devices on it (config indices).
pub fn least_round(config: &Config, port: &str) -> (Duration, Vec<usize>) {
    let mut round = Duration::ZERO;
    let mut devices = Vec::new();
    for (index, device) in config.devices.iter().enumerate() {
        let Some(line) = device.serial.as_ref().filter(|l| l.port == port) else {
            continue;
        };
        devices.push(index);
        for read in plan_reads(config, index, device.bridge_gaps) {
            round += device.inter_request_delay + exchange_time(line, &read);
        }
    }
    (round, devices)
}

/// A failed exchange on a line, said as a person should read it.
fn transport_error(e: &tokio_modbus::Error) -> LinkError {
    match e {
        tokio_modbus::Error::Transport(io) if io.kind() == std::io::ErrorKind::InvalidData => {
            LinkError::Transport(format!(
                "a garbled reply ({io}); check the baud rate, parity and wiring (A/B swapped, termination)"
            ))
        }
        tokio_modbus::Error::Transport(io) => LinkError::Transport(io.to_string()),
        tokio_modbus::Error::Protocol(p) => LinkError::Transport(format!(
            "a reply that does not match the request ({p}); another master on the line, two devices with one unit id, or a late reply"
        )),
    }
}

/// The port with the line's settings, ready to open: shared with the
/// simulator, which serves the other end of the line.
pub fn port_builder(line: &SerialLine) -> tokio_serial::SerialPortBuilder {
    let parity = match line.parity {
        Parity::None => tokio_serial::Parity::None,
        Parity::Even => tokio_serial::Parity::Even,
        Parity::Odd => tokio_serial::Parity::Odd,
    };
    let stop_bits = if line.stop_bits == 2 {
        tokio_serial::StopBits::Two
    } else {
        tokio_serial::StopBits::One
    };
    let data_bits = match line.data_bits {
        5 => tokio_serial::DataBits::Five,
        6 => tokio_serial::DataBits::Six,
        7 => tokio_serial::DataBits::Seven,
        _ => tokio_serial::DataBits::Eight,
    };
    tokio_serial::new(&line.port, line.baud_rate)
        .parity(parity)
        .stop_bits(stop_bits)
        .data_bits(data_bits)
        .flow_control(tokio_serial::FlowControl::None)
}

/// Opens the port with the line's settings, its buffers emptied.
fn open_port(line: &SerialLine) -> Result<tokio_serial::SerialStream, LinkError> {
    let port = port_builder(line)
        .open_native_async()
        .map_err(|e| LinkError::Connect {
            address: line.port.clone(),
            reason: open_reason(&e),
        })?;
    // Whatever the port held from before (a reply to another program, the
    // end of an abandoned exchange) is not an answer to us.
    let _ = port.clear(ClearBuffer::All);
    Ok(port)
}

/// Why a port would not open, with what to do about it.
fn open_reason(e: &tokio_serial::Error) -> String {
    use tokio_serial::ErrorKind;
    match e.kind() {
        ErrorKind::NoDevice | ErrorKind::Io(std::io::ErrorKind::NotFound) => format!(
            "no such serial port ({}); check the path, and that the adapter is plugged in (/dev/serial/by-id/ names stay put across reboots)",
            e.description
        ),
        ErrorKind::Io(std::io::ErrorKind::PermissionDenied) => format!(
            "permission denied ({}); add the daemon's user to the port's group (often dialout)",
            e.description
        ),
        _ if e.description.contains("busy") => format!(
            "the port is in use ({}); another program (or a running daemon) holds it",
            e.description
        ),
        _ => e.description.clone(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::registers::{BitKind, RegisterKind, Table};

    #[test]
    fn an_exchange_takes_its_bytes_at_eleven_bits_each() {
        let line = SerialLine {
            port: "/dev/ttyUSB0".into(),
            baud_rate: 9600,
            parity: Parity::Even,
            stop_bits: 1,
            data_bits: 8,
        };
        let read = |table, count| Read {
            table,
            start: 0,
            count,
            values: vec![],
        };
        // 8 + 9 bytes of 11 bits at 9600 baud: 19.479 ms.
        let two = exchange_time(&line, &read(Table::Registers(RegisterKind::Input), 2));
        assert_eq!(two.as_micros(), 19_479);
        // 125 registers: 8 + 255 bytes, 301.35 ms.
        let most = exchange_time(&line, &read(Table::Registers(RegisterKind::Holding), 125));
        assert_eq!(most.as_micros(), 301_354);
        // 9 coils come in 2 bytes: 8 + 7 bytes.
        let bits = exchange_time(&line, &read(Table::Bits(BitKind::Coil), 9));
        assert_eq!(bits.as_micros(), 17_187);
    }
}
