//! The web page's HTTP server: accepting connections with a bound on how
//! many are open, timeouts for the slow and the silent, and file
//! descriptors always left over for Modbus and SQLite.
//!
//! `axum::serve` accepts every connection and keeps it as long as the peer
//! likes; 20,000 idle sockets then fill the process's file table and the
//! pollers cannot reconnect to a device. So connections are served here, one
//! hyper HTTP/1 connection per task, under these rules:
//!
//! * At most [`connection_limit`] are open at once, well below the
//!   open-file limit (see there). A connection that arrives at the limit
//!   closes the one that has been idle longest (no request being answered),
//!   since that is a browser tab someone left open or a socket someone
//!   opened to hold a slot; only if every connection is busy answering is
//!   the newcomer refused, at once, with a 503.
//! * A request's head must arrive within [`HEADER_TIMEOUT`] of the server
//!   waiting for it: a new connection that sends nothing, one that trickles
//!   its headers a byte at a time, and a keep-alive connection that stays
//!   quiet after its last answer are closed then. (hyper's header timer
//!   covers all three.)
//! * A connection on which no byte has moved either way for
//!   [`STALL_TIMEOUT`] is closed: a peer that stopped reading its answer,
//!   or one gone without a FIN (half-open).
//! * A connection is asked to close after [`MAX_AGE`] however busy, and
//!   closed [`SHUTDOWN_GRACE`] later, so none can be held forever by
//!   trickling just enough; browsers reconnect by themselves.
//! * Read buffers are capped at [`MAX_BUFFER`], so a flood of headers costs
//!   16 KiB a connection at most.
//!
//! Left out: HTTP/2 and TLS (a reverse proxy's job), and the routes (see
//! the parent module).

use axum::Router;
use axum::body::Body;
use hyper::body::Incoming;
use hyper_util::rt::{TokioIo, TokioTimer};
use std::collections::HashMap;
use std::io;
use std::net::SocketAddr;
use std::pin::Pin;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, PoisonError};
use std::task::{Context, Poll};
use std::time::{Duration, Instant};
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tower::ServiceExt;
use tracing::{debug, info, warn};

/// The most connections served at once, whatever the file limit allows: a
/// command post has a few browsers and a scraper, and 256 leaves room for
/// a room full of phones.
pub const MAX_CONNECTIONS: usize = 256;
/// The fewest, on a machine with a tiny open-file limit.
pub const MIN_CONNECTIONS: usize = 8;
/// Descriptors kept for everything but the web side, besides a few per
/// device: standard streams, the runtime's epoll and wake-up descriptors,
/// the database's writer (database, WAL and shared-memory files) and the
/// short-lived read-only connections of status and the page, the log, and
/// room for a simulator or a restart of every poller at once.
pub const RESERVED_DESCRIPTORS: u64 = 256;
/// Descriptors kept per device: its connection, and one more while a
/// reconnect overlaps the old socket's close.
pub const DESCRIPTORS_PER_DEVICE: u64 = 2;
/// How long the server waits for a request's head.
pub const HEADER_TIMEOUT: Duration = Duration::from_secs(10);
/// How long a connection may move no byte either way.
pub const STALL_TIMEOUT: Duration = Duration::from_secs(30);
/// How long a connection may live.
pub const MAX_AGE: Duration = Duration::from_secs(300);
/// How long connections get to finish once asked to close.
pub const SHUTDOWN_GRACE: Duration = Duration::from_secs(2);
/// Connections the kernel may complete before the server accepts them.
/// Past it, new connection attempts wait for the peer to retry (a second
/// later), which is how a flood is slowed without costing descriptors.
pub const BACKLOG: u32 = 1024;
/// The most a connection buffers of a request, bytes (hyper's minimum is
/// 8 KiB; a browser's headers are one or two).
pub const MAX_BUFFER: usize = 16 * 1024;

/// Raises this process's soft limit on open files to its hard limit, and
/// returns the soft limit now in force (`None` if it cannot be read). The
/// hard limit is what the administrator allows; the soft limit is often
/// left at 1024 by login shells and service managers, which a daemon that
/// holds a socket per device and per browser may outgrow.
pub fn raise_open_file_limit() -> Option<u64> {
    let mut limit = libc::rlimit {
        rlim_cur: 0,
        rlim_max: 0,
    };
    // SAFETY: getrlimit writes one rlimit through a valid pointer to a
    // local; setrlimit reads one.
    unsafe {
        if libc::getrlimit(libc::RLIMIT_NOFILE, &mut limit) != 0 {
            return None;
        }
        if limit.rlim_cur < limit.rlim_max {
            let raised = libc::rlimit {
                rlim_cur: limit.rlim_max,
                rlim_max: limit.rlim_max,
            };
            if libc::setrlimit(libc::RLIMIT_NOFILE, &raised) == 0 {
                limit.rlim_cur = limit.rlim_max;
            }
        }
    }
    Some(rlim_to_u64(limit.rlim_cur))
}

/// `rlim_t` is u64 on 64-bit Linux, but not on every target libc serves.
#[allow(clippy::useless_conversion)]
fn rlim_to_u64(value: libc::rlim_t) -> u64 {
    u64::try_from(value).unwrap_or(u64::MAX)
}

/// How many web connections to serve at once: half of what the open-file
/// limit leaves after the reserve for the rest of the daemon, within
/// [`MIN_CONNECTIONS`] and [`MAX_CONNECTIONS`]. Half, so that even a full
/// web side leaves the daemon as many spare descriptors as it uses, and a
/// descriptor accepted only to be closed again never takes the last one.
pub fn connection_limit(open_files: Option<u64>, devices: usize) -> usize {
    let Some(open_files) = open_files else {
        return MAX_CONNECTIONS;
    };
    let reserve = RESERVED_DESCRIPTORS + DESCRIPTORS_PER_DEVICE * devices as u64;
    let spare = open_files.saturating_sub(reserve) / 2;
    usize::try_from(spare)
        .unwrap_or(usize::MAX)
        .clamp(MIN_CONNECTIONS, MAX_CONNECTIONS)
}

/// The local address a request came in on, for the `Host` check.
#[derive(Debug, Clone, Copy)]
pub struct ConnectedTo(pub SocketAddr);

/// The open connections, for the limit and for eviction.
struct Registry {
    limit: usize,
    epoch: Instant,
    next_id: AtomicU64,
    open: Mutex<HashMap<u64, Arc<Slot>>>,
}

/// What the server knows of one open connection.
struct Slot {
    /// Milliseconds after the registry's epoch when a byte last moved.
    last_active_ms: AtomicU64,
    /// Requests being answered now.
    busy: AtomicUsize,
    /// Closes the connection at once (eviction).
    close: CancellationToken,
    epoch: Instant,
}

impl Slot {
    fn touch(&self) {
        let ms = u64::try_from(self.epoch.elapsed().as_millis()).unwrap_or(u64::MAX);
        self.last_active_ms.store(ms, Ordering::Relaxed);
    }

    fn idle_for(&self) -> Duration {
        let last = Duration::from_millis(self.last_active_ms.load(Ordering::Relaxed));
        self.epoch.elapsed().saturating_sub(last)
    }
}

/// Counts a request as being answered while it lives.
struct Busy(Arc<Slot>);

impl Busy {
    fn new(slot: &Arc<Slot>) -> Self {
        slot.busy.fetch_add(1, Ordering::Relaxed);
        Self(Arc::clone(slot))
    }
}

impl Drop for Busy {
    fn drop(&mut self) {
        self.0.busy.fetch_sub(1, Ordering::Relaxed);
        self.0.touch();
    }
}

impl Registry {
    /// A slot for a new connection: directly below the limit, else by
    /// closing the connection idle longest; `None` when all are busy.
    fn admit(&self) -> Option<(u64, Arc<Slot>)> {
        let mut open = self.open.lock().unwrap_or_else(PoisonError::into_inner);
        if open.len() >= self.limit {
            let evict = open
                .iter()
                .filter(|(_, s)| s.busy.load(Ordering::Relaxed) == 0)
                .max_by_key(|(_, s)| s.idle_for())
                .map(|(&id, _)| id)?;
            if let Some(slot) = open.remove(&evict) {
                slot.close.cancel();
            }
        }
        let slot = Arc::new(Slot {
            last_active_ms: AtomicU64::new(0),
            busy: AtomicUsize::new(0),
            close: CancellationToken::new(),
            epoch: self.epoch,
        });
        slot.touch();
        let id = self.next_id.fetch_add(1, Ordering::Relaxed);
        open.insert(id, Arc::clone(&slot));
        Some((id, slot))
    }

    fn release(&self, id: u64) {
        self.open
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .remove(&id);
    }
}

/// Serves `router` on `listener` until `cancel` fires, then gives open
/// connections [`SHUTDOWN_GRACE`] to finish and closes the rest.
pub async fn serve(listener: TcpListener, router: Router, limit: usize, cancel: CancellationToken) {
    let registry = Arc::new(Registry {
        limit,
        epoch: Instant::now(),
        next_id: AtomicU64::new(0),
        open: Mutex::new(HashMap::new()),
    });
    let connections = TaskTracker::new();
    // Asks every connection to finish; a child, so that the daemon's own
    // token is not what the connections wait on after the grace.
    let draining = cancel.child_token();
    let mut refused: u64 = 0;
    let mut evicted: u64 = 0;
    let mut accept_failing = false;
    loop {
        let accepted = tokio::select! {
            () = cancel.cancelled() => break,
            accepted = listener.accept() => accepted,
        };
        let (stream, peer) = match accepted {
            Ok(pair) => {
                if accept_failing {
                    accept_failing = false;
                    info!("web: accepting connections again");
                }
                pair
            }
            Err(e) => {
                // Out of descriptors (EMFILE, ENFILE) or a connection reset
                // before it was accepted: the listener itself is fine. A
                // pause stops a busy loop while descriptors are short.
                if !accept_failing {
                    accept_failing = true;
                    warn!("web: cannot accept a connection: {e}; retrying");
                }
                tokio::time::sleep(Duration::from_millis(100)).await;
                continue;
            }
        };
        let full = registry
            .open
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .len()
            >= registry.limit;
        let Some((id, slot)) = registry.admit() else {
            refused += 1;
            if refused == 1 || refused.is_power_of_two() {
                warn!(
                    "web: all {} connections are busy answering; refused {refused} connection(s) so far (the latest from {peer})",
                    registry.limit
                );
            }
            refuse(&stream);
            continue;
        };
        if full {
            evicted += 1;
            if evicted == 1 || evicted.is_power_of_two() {
                info!(
                    "web: at the limit of {} open connections; closed the one idle longest to take one from {peer} ({evicted} so far)",
                    registry.limit
                );
            }
        }
        let local = stream.local_addr().unwrap_or(peer);
        let registry = Arc::clone(&registry);
        let router = router.clone();
        let draining = draining.clone();
        connections.spawn(async move {
            connection(stream, local, router, slot, draining).await;
            // Gone already if it was evicted; ids are never reused.
            registry.release(id);
        });
    }
    drop(listener);
    draining.cancel();
    connections.close();
    if tokio::time::timeout(SHUTDOWN_GRACE, connections.wait())
        .await
        .is_err()
    {
        warn!("web: connections still open after {SHUTDOWN_GRACE:?}; closing them");
    }
}

/// Refuses a connection at the limit with a short 503, without waiting:
/// a peer that does not read it just gets the close.
fn refuse(stream: &TcpStream) {
    const BUSY: &[u8] = b"HTTP/1.1 503 Service Unavailable\r\nContent-Type: text/plain; charset=utf-8\r\nConnection: close\r\nContent-Length: 61\r\nRetry-After: 5\r\n\r\nthe page is serving as many connections as it may; try again\n";
    let _ = stream.try_write(BUSY);
}

/// Serves one connection under the rules in the module doc.
async fn connection(
    stream: TcpStream,
    local: SocketAddr,
    router: Router,
    slot: Arc<Slot>,
    draining: CancellationToken,
) {
    let _ = stream.set_nodelay(true);
    let io = TokioIo::new(Watched {
        inner: stream,
        slot: Arc::clone(&slot),
    });
    let service_slot = Arc::clone(&slot);
    let service = hyper::service::service_fn(move |mut request: hyper::Request<Incoming>| {
        request.extensions_mut().insert(ConnectedTo(local));
        let busy = Busy::new(&service_slot);
        let router = router.clone();
        async move {
            let response = router.oneshot(request.map(Body::new)).await;
            drop(busy);
            response
        }
    });
    let mut http = hyper::server::conn::http1::Builder::new();
    http.timer(TokioTimer::new())
        .header_read_timeout(HEADER_TIMEOUT)
        .max_buf_size(MAX_BUFFER)
        .keep_alive(true);
    let served = http.serve_connection(io, service);
    tokio::pin!(served);
    let born = Instant::now();
    let mut closing: Option<Instant> = None;
    loop {
        let stall_at = tokio::time::Instant::now() + STALL_TIMEOUT.saturating_sub(slot.idle_for());
        let age_at =
            tokio::time::Instant::from_std(closing.map_or(born + MAX_AGE, |c| c + SHUTDOWN_GRACE));
        tokio::select! {
            result = served.as_mut() => {
                if let Err(e) = result {
                    // Timeouts, resets and garbage only end their own
                    // connection; they are routine on a network.
                    debug!("web: a connection ended: {e}");
                }
                return;
            }
            () = slot.close.cancelled() => return,
            () = draining.cancelled(), if closing.is_none() => {
                served.as_mut().graceful_shutdown();
                closing = Some(Instant::now());
            }
            () = tokio::time::sleep_until(stall_at) => {
                if slot.idle_for() >= STALL_TIMEOUT && slot.busy.load(Ordering::Relaxed) == 0 {
                    debug!("web: closing a connection that moved nothing for {STALL_TIMEOUT:?}");
                    return;
                }
                if slot.idle_for() >= STALL_TIMEOUT {
                    // A handler still running (a slow database read) is
                    // the server's own wait, not the peer's; its answer
                    // then moves bytes again, or the age limit ends it.
                    slot.touch();
                }
            }
            () = tokio::time::sleep_until(age_at) => {
                match closing {
                    None => {
                        served.as_mut().graceful_shutdown();
                        closing = Some(Instant::now());
                    }
                    Some(_) => return,
                }
            }
        }
    }
}

/// A connection's stream, noting in its slot whenever a byte moves.
struct Watched {
    inner: TcpStream,
    slot: Arc<Slot>,
}

impl AsyncRead for Watched {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        let before = buf.filled().len();
        let polled = Pin::new(&mut self.inner).poll_read(cx, buf);
        if matches!(polled, Poll::Ready(Ok(()))) && buf.filled().len() > before {
            self.slot.touch();
        }
        polled
    }
}

impl AsyncWrite for Watched {
    fn poll_write(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        data: &[u8],
    ) -> Poll<io::Result<usize>> {
        let polled = Pin::new(&mut self.inner).poll_write(cx, data);
        if matches!(polled, Poll::Ready(Ok(n)) if n > 0) {
            self.slot.touch();
        }
        polled
    }

    fn poll_flush(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_flush(cx)
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.inner).poll_shutdown(cx)
    }

    fn poll_write_vectored(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        bufs: &[io::IoSlice<'_>],
    ) -> Poll<io::Result<usize>> {
        let polled = Pin::new(&mut self.inner).poll_write_vectored(cx, bufs);
        if matches!(polled, Poll::Ready(Ok(n)) if n > 0) {
            self.slot.touch();
        }
        polled
    }

    fn is_write_vectored(&self) -> bool {
        self.inner.is_write_vectored()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_limit_leaves_the_reserve_and_half_the_rest() {
        // (open-file limit, devices, connections)
        let cases = [
            (None, 2, MAX_CONNECTIONS),
            (Some(1_048_576), 20, MAX_CONNECTIONS),
            (Some(20_000), 2, MAX_CONNECTIONS),
            // 1024 - 256 - 2 x 2 = 764, half is 382: over the cap.
            (Some(1024), 2, MAX_CONNECTIONS),
            // 512 - 256 - 2 x 20 = 216, half is 108.
            (Some(512), 20, 108),
            (Some(256), 2, MIN_CONNECTIONS),
            (Some(0), 0, MIN_CONNECTIONS),
        ];
        for (files, devices, expected) in cases {
            assert_eq!(
                connection_limit(files, devices),
                expected,
                "{files:?} {devices}"
            );
        }
    }

    #[test]
    fn the_open_file_limit_is_raised_to_the_hard_limit() {
        let soft = raise_open_file_limit().expect("getrlimit works on Linux");
        let mut limit = libc::rlimit {
            rlim_cur: 0,
            rlim_max: 0,
        };
        // SAFETY: as in raise_open_file_limit.
        assert_eq!(
            unsafe { libc::getrlimit(libc::RLIMIT_NOFILE, &mut limit) },
            0
        );
        assert_eq!(limit.rlim_cur, limit.rlim_max);
        assert_eq!(rlim_to_u64(limit.rlim_cur), soft);
    }

    #[test]
    fn at_the_limit_the_longest_idle_connection_makes_room_and_busy_ones_never_do() {
        let registry = Registry {
            limit: 3,
            epoch: Instant::now() - Duration::from_secs(100),
            next_id: AtomicU64::new(0),
            open: Mutex::new(HashMap::new()),
        };
        let slots: Vec<(u64, Arc<Slot>)> = (0..3).map(|_| registry.admit().unwrap()).collect();
        // The second has been idle longest, the first is answering.
        slots[1].1.last_active_ms.store(0, Ordering::Relaxed);
        let busy = Busy::new(&slots[0].1);
        slots[0].1.last_active_ms.store(0, Ordering::Relaxed);
        let (_, fourth) = registry.admit().unwrap();
        assert!(slots[1].1.close.is_cancelled(), "the idle one is closed");
        assert!(!slots[0].1.close.is_cancelled() && !slots[2].1.close.is_cancelled());
        assert_eq!(registry.open.lock().unwrap().len(), 3);
        // Everyone busy: the newcomer is refused.
        let _b = [Busy::new(&slots[2].1), Busy::new(&fourth)];
        assert!(registry.admit().is_none());
        drop(busy);
        assert!(registry.admit().is_some(), "the first is idle again");
    }
}
