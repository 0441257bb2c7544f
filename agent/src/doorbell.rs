//! A doorbell from the CLI to the daemon of one database: after the CLI
//! records an operator action it rings, and the daemon looks for actions at
//! once instead of asking the database several times a second (each look is
//! a job on the store's thread and two wake-ups, most of the agent's fixed
//! cost on a small site).
//!
//! The bell is a Unix datagram socket in Linux's abstract namespace, named
//! from the database's canonical path: no file to leave behind or clean up,
//! no path-length limit. A ring carries nothing and proves nothing: it only
//! makes the daemon look at the action rows, which it also does on its own
//! every few seconds, so a ring that cannot be sent (another system, another
//! network namespace, no daemon) costs latency, never an action. Anyone on
//! the machine may ring; the worst they can do is make the daemon look.

use std::io;
use std::path::Path;

/// Rings the bell of the daemon on `db`, if one listens. Never fails: the
/// daemon's own periodic look picks up what a lost ring would have.
pub fn ring(db: &Path) {
    #[cfg(target_os = "linux")]
    {
        let Ok(socket) = std::os::unix::net::UnixDatagram::unbound() else {
            return;
        };
        if let Ok(address) = address(db) {
            // Nobody listening (ECONNREFUSED) is the common case with no
            // daemon; a full queue means rings are already waiting.
            let _ = socket.send_to_addr(&[1], &address);
        }
    }
    #[cfg(not(target_os = "linux"))]
    let _ = db;
}

/// The daemon's side of the bell.
pub struct Doorbell {
    #[cfg(target_os = "linux")]
    socket: tokio::net::UnixDatagram,
}

impl Doorbell {
    /// Listens for rings for `db`. Fails where there are no abstract
    /// sockets, or when another process listens for the same database
    /// (another daemon on it, which its lock refuses anyway).
    pub fn listen(db: &Path) -> io::Result<Doorbell> {
        #[cfg(target_os = "linux")]
        {
            let socket = std::os::unix::net::UnixDatagram::bind_addr(&address(db)?)?;
            socket.set_nonblocking(true)?;
            Ok(Doorbell {
                socket: tokio::net::UnixDatagram::from_std(socket)?,
            })
        }
        #[cfg(not(target_os = "linux"))]
        {
            let _ = db;
            Err(io::Error::new(
                io::ErrorKind::Unsupported,
                "no abstract Unix sockets on this system",
            ))
        }
    }

    /// Waits for a ring, then takes every ring already waiting, so that a
    /// burst of them (or a flood) makes one look, not one each.
    pub async fn rung(&self) {
        #[cfg(target_os = "linux")]
        {
            let mut byte = [0u8; 1];
            if self.socket.recv(&mut byte).await.is_err() {
                // Not expected on a bound datagram socket; do not spin on it.
                std::future::pending::<()>().await;
            }
            while self.socket.try_recv(&mut byte).is_ok() {}
        }
        #[cfg(not(target_os = "linux"))]
        std::future::pending::<()>().await;
    }
}

/// The bell's name: a fixed prefix and a hash of the canonical path, so that
/// every spelling of one file (relative, through a symbolic link) rings the
/// same bell. FNV-1a, written out: it must not change between builds, as the
/// CLI and the daemon may be different builds during an upgrade.
#[cfg(target_os = "linux")]
fn address(db: &Path) -> io::Result<std::os::unix::net::SocketAddr> {
    use std::os::linux::net::SocketAddrExt;
    use std::os::unix::ffi::OsStrExt;
    let canonical = std::fs::canonicalize(db)?;
    std::os::unix::net::SocketAddr::from_abstract_name(format!(
        "leaktally-doorbell-{:016x}",
        fnv1a(canonical.as_os_str().as_bytes())
    ))
}

fn fnv1a(bytes: &[u8]) -> u64 {
    // FNV-1a 64-bit offset basis and prime (the published FNV parameters).
    let mut hash: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in bytes {
        hash ^= u64::from(b);
        hash = hash.wrapping_mul(0x0100_0000_01b3);
    }
    hash
}

#[cfg(all(test, target_os = "linux"))]
mod tests {
    use super::*;
    use std::time::Duration;

    #[test]
    fn fnv1a_matches_the_published_test_vectors() {
        // FNV-1a 64-bit test vectors for "", "a" and "foobar", as published
        // with the algorithm (the FNV test suite, draft-eastlake-fnv); from
        // memory, confirmed by evaluating the published definition in Python.
        assert_eq!(fnv1a(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a(b"a"), 0xaf63_dc4c_8601_ec8c);
        assert_eq!(fnv1a(b"foobar"), 0x8594_4171_f739_67e8);
    }

    #[tokio::test]
    async fn a_ring_for_the_file_reaches_its_bell_under_any_spelling() {
        let dir = std::env::temp_dir().join(format!("leaktally-bell-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let db = dir.join("site.db");
        std::fs::write(&db, b"").unwrap();
        let bell = Doorbell::listen(&db).unwrap();
        // A second listener on the same file is refused.
        assert!(Doorbell::listen(&db).is_err());
        ring(&dir.join(".").join("site.db"));
        ring(&db);
        tokio::time::timeout(Duration::from_secs(5), bell.rung())
            .await
            .expect("the ring arrives");
        // Both rings were taken by the one look.
        assert!(
            tokio::time::timeout(Duration::from_millis(200), bell.rung())
                .await
                .is_err()
        );
        // Another file's ring does not reach it.
        let other = dir.join("other.db");
        std::fs::write(&other, b"").unwrap();
        ring(&other);
        assert!(
            tokio::time::timeout(Duration::from_millis(200), bell.rung())
                .await
                .is_err()
        );
        let _ = std::fs::remove_dir_all(&dir);
    }
}
