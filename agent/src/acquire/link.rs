//! A read-only Modbus TCP link to one device, with timeouts and reconnects.
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

use crate::acquire::decode::{BitKind, RegisterKind};
use crate::acquire::plan::Read;
use crate::config::Table;
use std::net::SocketAddr;
use std::time::Duration;
use thiserror::Error;
use tokio::time::timeout;
use tokio_modbus::client::{Context, Reader};
use tokio_modbus::prelude::*;

/// Why a read failed. Follows tokio-modbus in keeping "the exchange failed"
/// apart from "the device said no": the first calls for a reconnect, the
/// second does not.
#[derive(Debug, Error)]
pub enum LinkError {
    #[error("no connection to {0}")]
    NotConnected(String),
    #[error("cannot resolve {address}: {reason}")]
    Resolve { address: String, reason: String },
    #[error("connecting to {address} failed: {reason}")]
    Connect { address: String, reason: String },
    #[error("no answer within {0:?}")]
    Timeout(Duration),
    #[error("the exchange failed: {0}")]
    Transport(String),
    #[error("the device answered with exception {code} ({name})")]
    Exception { code: u8, name: String },
    #[error("the device answered {got} values where {wanted} were asked for")]
    Malformed { got: usize, wanted: usize },
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
        matches!(self, LinkError::Exception { code: 2, .. })
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
}

impl Link {
    pub fn new(address: &str, unit_id: u8, request_timeout: Duration) -> Self {
        Self {
            address: address.to_owned(),
            unit_id,
            request_timeout,
            context: None,
        }
    }

    pub fn is_connected(&self) -> bool {
        self.context.is_some()
    }

    /// Connects if not connected.
    pub async fn connect(&mut self) -> Result<(), LinkError> {
        if self.context.is_some() {
            return Ok(());
        }
        let addr = resolve(&self.address, self.request_timeout).await?;
        let attempt = timeout(
            self.request_timeout,
            tcp::connect_slave(addr, Slave(self.unit_id)),
        )
        .await;
        match attempt {
            Ok(Ok(ctx)) => {
                self.context = Some(ctx);
                Ok(())
            }
            Ok(Err(e)) => Err(LinkError::Connect {
                address: self.address.clone(),
                reason: e.to_string(),
            }),
            Err(_) => Err(LinkError::Connect {
                address: self.address.clone(),
                reason: format!("no answer within {:?}", self.request_timeout),
            }),
        }
    }

    /// Closes the connection; the next read reconnects.
    pub fn disconnect(&mut self) {
        // Dropping the context closes the socket.
        self.context = None;
    }

    /// Performs one planned read.
    pub async fn read(&mut self, read: &Read) -> Result<Words, LinkError> {
        let wait = self.request_timeout;
        let Some(ctx) = self.context.as_mut() else {
            return Err(LinkError::NotConnected(self.address.clone()));
        };
        let (start, count) = (read.start, read.count);
        let outcome = match read.table {
            Table::Registers(RegisterKind::Holding) => {
                flatten(wait, ctx.read_holding_registers(start, count))
                    .await
                    .map(Words::Registers)
            }
            Table::Registers(RegisterKind::Input) => {
                flatten(wait, ctx.read_input_registers(start, count))
                    .await
                    .map(Words::Registers)
            }
            Table::Bits(BitKind::Coil) => flatten(wait, ctx.read_coils(start, count))
                .await
                .map(Words::Bits),
            Table::Bits(BitKind::DiscreteInput) => {
                flatten(wait, ctx.read_discrete_inputs(start, count))
                    .await
                    .map(Words::Bits)
            }
        };
        let outcome = outcome.and_then(|words| {
            let got = match &words {
                Words::Registers(r) => r.len(),
                // Coil replies come padded to whole bytes; the client trims
                // to the count asked, but check rather than trust.
                Words::Bits(b) => b.len().min(usize::from(count)),
            };
            if got < usize::from(count) {
                Err(LinkError::Malformed {
                    got,
                    wanted: usize::from(count),
                })
            } else {
                Ok(words)
            }
        });
        if let Err(e) = &outcome
            && e.needs_reconnect()
        {
            self.disconnect();
        }
        outcome
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

/// Flattens tokio-modbus's nested result, under a timeout.
async fn flatten<T>(
    wait: Duration,
    request: impl std::future::Future<Output = tokio_modbus::Result<T>>,
) -> Result<T, LinkError> {
    match timeout(wait, request).await {
        Err(_) => Err(LinkError::Timeout(wait)),
        Ok(Err(e)) => Err(LinkError::Transport(e.to_string())),
        Ok(Ok(Err(code))) => Err(LinkError::Exception {
            code: u8::from(code),
            name: format!("{code:?}"),
        }),
        Ok(Ok(Ok(value))) => Ok(value),
    }
}
