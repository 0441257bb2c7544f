//! Whether the database is taking the daemon's writes, for the page and the
//! metrics.
//!
//! The tracker updates it after every commit attempt; the web server reads
//! it. The database cannot report its own failure (a locked or full file
//! takes no rows), so this lives in memory beside it. Relaxed atomics, as in
//! `acquire::stats`: a reader may see one field of an update before the
//! next, which a page refreshed every few seconds tolerates.

use crate::store::StoreError;
use rusqlite::ErrorCode;
use std::sync::atomic::{AtomicI64, AtomicU8, AtomicU64, Ordering};

/// Why the last write failed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WriteFailure {
    /// Another process holds the write lock past the wait.
    Locked,
    /// The disk (or a size limit) is full.
    Full,
    /// SQLite says the file is damaged.
    Damaged,
    /// Anything else: an I/O error, a read-only file.
    Other,
}

impl WriteFailure {
    pub fn of(error: &StoreError) -> Self {
        match error {
            StoreError::Sql(rusqlite::Error::SqliteFailure(e, _)) => match e.code {
                ErrorCode::DatabaseBusy | ErrorCode::DatabaseLocked => WriteFailure::Locked,
                ErrorCode::DiskFull => WriteFailure::Full,
                ErrorCode::DatabaseCorrupt | ErrorCode::NotADatabase => WriteFailure::Damaged,
                _ => WriteFailure::Other,
            },
            _ => WriteFailure::Other,
        }
    }

    /// Whether `error` is one that passes by itself (a lock let go, space
    /// freed), so the write is held and tried again rather than refused.
    pub fn passes(error: &StoreError) -> bool {
        matches!(Self::of(error), WriteFailure::Locked | WriteFailure::Full)
    }

    /// What a reader is told, with the fix.
    pub fn describe(self) -> &'static str {
        match self {
            WriteFailure::Locked => {
                "another program holds the database's write lock; find and stop it"
            }
            WriteFailure::Full => "the disk holding the database is full; free space on it",
            WriteFailure::Damaged => {
                "the database file is damaged; stop the daemon and follow \"A damaged database\" in the README"
            }
            WriteFailure::Other => "the database cannot be written; see the daemon's log",
        }
    }

    fn code(self) -> u8 {
        match self {
            WriteFailure::Locked => 1,
            WriteFailure::Full => 2,
            WriteFailure::Other => 3,
            WriteFailure::Damaged => 4,
        }
    }

    fn from_code(code: u8) -> Option<Self> {
        match code {
            1 => Some(WriteFailure::Locked),
            2 => Some(WriteFailure::Full),
            3 => Some(WriteFailure::Other),
            4 => Some(WriteFailure::Damaged),
            _ => None,
        }
    }
}

const NEVER: i64 = i64::MIN;

/// The daemon's write state, shared between the tracker and the web server.
#[derive(Debug)]
pub struct StoreHealth {
    held_cycles: AtomicU64,
    held_samples: AtomicU64,
    dropped_samples: AtomicU64,
    failed_attempts: AtomicU64,
    failing_since_ms: AtomicI64,
    cause: AtomicU8,
}

impl Default for StoreHealth {
    fn default() -> Self {
        Self {
            held_cycles: AtomicU64::new(0),
            held_samples: AtomicU64::new(0),
            dropped_samples: AtomicU64::new(0),
            failed_attempts: AtomicU64::new(0),
            failing_since_ms: AtomicI64::new(NEVER),
            cause: AtomicU8::new(0),
        }
    }
}

/// A copy of [`StoreHealth`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HealthSnapshot {
    /// Poll cycles acquired but not yet committed, and their samples.
    pub held_cycles: u64,
    pub held_samples: u64,
    /// Samples of tanks with no open event given up to bound memory.
    pub dropped_samples: u64,
    /// Commit attempts that failed since the daemon started.
    pub failed_attempts: u64,
    /// Since when writes fail, UTC ms, and why; None while they succeed.
    pub failing: Option<(i64, WriteFailure)>,
}

impl StoreHealth {
    pub fn record_failure(&self, at_ms: i64, why: WriteFailure) {
        self.failed_attempts.fetch_add(1, Ordering::Relaxed);
        self.cause.store(why.code(), Ordering::Relaxed);
        // Keep the first failure's time: "failing since" is the outage.
        let _ = self.failing_since_ms.compare_exchange(
            NEVER,
            at_ms,
            Ordering::Relaxed,
            Ordering::Relaxed,
        );
    }

    pub fn record_success(&self) {
        self.failing_since_ms.store(NEVER, Ordering::Relaxed);
        self.cause.store(0, Ordering::Relaxed);
    }

    pub fn set_held(&self, cycles: usize, samples: usize) {
        self.held_cycles.store(cycles as u64, Ordering::Relaxed);
        self.held_samples.store(samples as u64, Ordering::Relaxed);
    }

    pub fn add_dropped(&self, samples: usize) {
        self.dropped_samples
            .fetch_add(samples as u64, Ordering::Relaxed);
    }

    pub fn snapshot(&self) -> HealthSnapshot {
        let since = self.failing_since_ms.load(Ordering::Relaxed);
        let cause = WriteFailure::from_code(self.cause.load(Ordering::Relaxed));
        HealthSnapshot {
            held_cycles: self.held_cycles.load(Ordering::Relaxed),
            held_samples: self.held_samples.load(Ordering::Relaxed),
            dropped_samples: self.dropped_samples.load(Ordering::Relaxed),
            failed_attempts: self.failed_attempts.load(Ordering::Relaxed),
            failing: (since != NEVER).then(|| (since, cause.unwrap_or(WriteFailure::Other))),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_outage_keeps_its_first_time_and_clears_on_success() {
        let h = StoreHealth::default();
        assert_eq!(h.snapshot().failing, None);
        h.record_failure(1_000, WriteFailure::Locked);
        h.record_failure(3_000, WriteFailure::Full);
        h.set_held(2, 50);
        let s = h.snapshot();
        assert_eq!(s.failing, Some((1_000, WriteFailure::Full)));
        assert_eq!(
            (s.failed_attempts, s.held_cycles, s.held_samples),
            (2, 2, 50)
        );
        h.record_success();
        h.set_held(0, 0);
        assert_eq!(h.snapshot().failing, None);
        assert_eq!(h.snapshot().failed_attempts, 2);
    }

    #[test]
    fn sqlite_codes_map_to_causes() {
        let sql = |code: i32| {
            StoreError::Sql(rusqlite::Error::SqliteFailure(
                rusqlite::ffi::Error::new(code),
                None,
            ))
        };
        assert_eq!(
            WriteFailure::of(&sql(rusqlite::ffi::SQLITE_BUSY)),
            WriteFailure::Locked
        );
        assert_eq!(
            WriteFailure::of(&sql(rusqlite::ffi::SQLITE_FULL)),
            WriteFailure::Full
        );
        assert_eq!(
            WriteFailure::of(&sql(rusqlite::ffi::SQLITE_IOERR)),
            WriteFailure::Other
        );
    }
}
