//! The store: one SQLite file holding samples, events, operator actions,
//! estimates and crossings, and the daemon's one writer.
//!
//! Durability: WAL journal with `synchronous = FULL`, so every commit is on
//! disk before it returns. An acknowledged operator action and every logged
//! estimate then survive kill -9 and power loss, which NORMAL does not
//! promise (it may roll back the last commits after a power cut). FULL costs
//! an fsync per commit; the daemon gathers every device's cycle of a tick
//! into one commit (`daemon::GATHER`), so that is one fsync a tick. Writes
//! whose loss costs nothing (the heartbeat, trim chunks) go by
//! [`Store::write_lax`] without waiting for the disk.
//!
//! Units of work: the daemon's connection lives on a thread of its own
//! ([`Store`]), and everything the daemon writes goes there as one closure
//! that runs in one transaction ([`Store::write`] with a [`Tx`]): a poll
//! cycle's samples and estimates, a whole operator action, a trim chunk. A
//! closure that fails part way leaves nothing of itself behind. [`Tx`]
//! offers the store's operations only, never SQL, so only this module
//! writes SQL.
//!
//! Lanes: a job is urgent (samples, heartbeat, operator actions, reads) or
//! background (trimming, checkpoints). The writer runs every urgent job
//! that is waiting before the next background one, so urgent work waits at
//! most one background job, and background jobs are bounded in time (see
//! [`trim`]).
//!
//! Integrity: the daemon runs SQLite's `quick_check` before it writes
//! anything ([`Store::open`]), and refuses a damaged file with the way out
//! (README, "A damaged database").
//!
//! Readers such as `status` open their own short-lived read-only
//! connections, which WAL lets run beside the writer.

pub mod access;
pub mod actions;
pub mod estimates;
pub mod events;
pub mod health;
pub mod heartbeat;
pub mod outbox;
pub mod samples;
pub mod schema;
#[cfg(test)]
pub mod scratch;
pub mod trim;
pub(crate) mod unit;

use rusqlite::{Connection, OpenFlags};
use std::path::{Path, PathBuf};
use std::time::Duration;
use tokio::sync::{mpsc, oneshot};

pub use actions::*;
pub use estimates::*;
pub use events::*;
pub use heartbeat::*;
pub use samples::*;
pub use trim::Retention;
pub use unit::{Reader, Tx};

/// Where the README explains what to do with a damaged database.
pub const DAMAGED_HELP: &str = "copy it aside with its -wal file, start the daemon on a fresh --db, and export what can be read from the copy (README, \"A damaged database\")";

/// Something went wrong with the database.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error(
        "cannot open the database {path}: {source}{hint}; check the path and that its folder is writable",
        hint = sql_hint(source)
    )]
    Open {
        path: PathBuf,
        source: rusqlite::Error,
    },
    #[error(
        "the database {0} does not exist; start the daemon with `leaktally run --config FILE --db {0}` first"
    )]
    Missing(PathBuf),
    /// A permission stands between this user and the database: which
    /// path, and the way out (`access`).
    #[error("{}", .0.message)]
    Denied(Box<access::Denied>),
    #[error(transparent)]
    Schema(#[from] schema::SchemaError),
    #[error("database error: {0}{hint}", hint = sql_hint(.0))]
    Sql(#[from] rusqlite::Error),
    #[error("stored data is not valid: {0}")]
    Corrupt(String),
    #[error(
        "the database {path} is damaged ({details}); leaktally will not write to it: {DAMAGED_HELP}",
        path = path.display()
    )]
    Damaged { path: PathBuf, details: String },
    #[error("the database thread has stopped")]
    Stopped,
}

pub type StoreResult<T> = Result<T, StoreError>;

impl StoreError {
    /// Whether SQLite says the file is damaged or not a database at all.
    pub fn is_damage(&self) -> bool {
        let code = match self {
            StoreError::Damaged { .. } => return true,
            StoreError::Sql(e) | StoreError::Open { source: e, .. } => e.sqlite_error_code(),
            StoreError::Schema(schema::SchemaError::Migration { source, .. }) => {
                source.sqlite_error_code()
            }
            _ => None,
        };
        matches!(
            code,
            Some(rusqlite::ErrorCode::DatabaseCorrupt | rusqlite::ErrorCode::NotADatabase)
        )
    }
}

/// The fix for the SQLite errors a user can do something about.
fn sql_hint(e: &rusqlite::Error) -> &'static str {
    match e.sqlite_error_code() {
        Some(rusqlite::ErrorCode::DiskFull) => {
            " (the disk holding the database is full; free space on it and try again)"
        }
        Some(rusqlite::ErrorCode::DatabaseBusy | rusqlite::ErrorCode::DatabaseLocked) => {
            " (another program holds the database's write lock; wait, or find and stop it)"
        }
        Some(rusqlite::ErrorCode::ReadOnly | rusqlite::ErrorCode::CannotOpen) => {
            " (check that the database and its folder are writable by this user)"
        }
        Some(rusqlite::ErrorCode::DatabaseCorrupt | rusqlite::ErrorCode::NotADatabase) => {
            " (the database file is damaged: copy it aside with its -wal file, start the daemon on a fresh --db, and export what can be read from the copy; README, \"A damaged database\")"
        }
        _ => "",
    }
}

/// How long a connection waits for another writer's lock before giving up.
pub const BUSY_TIMEOUT: Duration = Duration::from_secs(5);
/// The daemon's writer waits less: its loop waits with it, and a failed
/// commit is kept and retried anyway (see `track::tracker`).
pub const WRITER_BUSY_TIMEOUT: Duration = Duration::from_secs(1);
/// SQLite's page cache per connection, KiB.
pub const PAGE_CACHE_KIB: i64 = 4096;
/// Prepared statements kept per connection.
pub const STATEMENT_CACHE: usize = 64;
/// The WAL file is cut back to this size whenever it restarts from its
/// beginning, so a burst (a catch-up after an outage, a large trim) does
/// not leave a large file behind.
pub const WAL_SIZE_LIMIT_BYTES: i64 = 32 * 1024 * 1024;
/// SQLite's own checkpoint after a commit, as a safety net only: the
/// daemon checkpoints in the background lane every second (see `daemon`),
/// well before the WAL reaches this many pages (32 MiB at 4 KiB).
pub const WAL_AUTOCHECKPOINT_PAGES: i64 = 8192;

/// Opens (creating if needed) the database for writing, applies the
/// pragmas and migrates the schema.
pub fn open_read_write(path: &Path) -> StoreResult<Connection> {
    create_private(path);
    let conn = connect(path)?;
    apply_pragmas(path, conn)
}

fn connect(path: &Path) -> StoreResult<Connection> {
    let open = |path: &Path| -> rusqlite::Result<Connection> {
        let conn = Connection::open(path)?;
        conn.busy_timeout(BUSY_TIMEOUT)?;
        Ok(conn)
    };
    open(path).map_err(|source| StoreError::Open {
        path: path.to_owned(),
        source,
    })
}

fn apply_pragmas(path: &Path, mut conn: Connection) -> StoreResult<Connection> {
    let set = |conn: &Connection| -> rusqlite::Result<()> {
        conn.pragma_update(None, "journal_mode", "WAL")?;
        conn.pragma_update(None, "synchronous", "FULL")?;
        conn.pragma_update(None, "foreign_keys", true)?;
        // The pages a second of the daemon's work touches (the tail of
        // every sample set's index and rows, the open events' rows, the
        // heartbeat, the pending actions) stay in SQLite's own cache, not
        // read back from the file: SQLite's default of 2 MB fell short at
        // 1,000 tanks on a full rolling window, and re-reads showed in a
        // profile (BENCHMARKS.md). Memory stays well under the 30 MB target.
        conn.pragma_update(None, "cache_size", -PAGE_CACHE_KIB)?;
        Ok(())
    };
    // Every statement the daemon runs stays prepared: rusqlite's default
    // cache of 16 is fewer than it uses, and re-preparing showed in a
    // profile too.
    conn.set_prepared_statement_cache_capacity(STATEMENT_CACHE);
    set(&conn).map_err(|source| StoreError::Open {
        path: path.to_owned(),
        source,
    })?;
    schema::migrate(&mut conn)?;
    Ok(conn)
}

/// Runs SQLite's `quick_check` (every page and b-tree, not the indexes
/// against their tables): a few seconds for a gigabyte, once at start.
/// Reads only.
pub fn check_integrity(path: &Path, conn: &Connection) -> StoreResult<()> {
    let damaged = |details: String| StoreError::Damaged {
        path: path.to_owned(),
        details,
    };
    let mut stmt = match conn.prepare("PRAGMA quick_check(5)") {
        Ok(stmt) => stmt,
        Err(e) => return Err(damaged_or(e, path)),
    };
    let rows: rusqlite::Result<Vec<String>> = stmt
        .query_map([], |r| r.get::<_, String>(0))
        .and_then(|r| r.collect());
    match rows {
        Ok(rows) if rows.len() == 1 && rows[0] == "ok" => Ok(()),
        Ok(rows) => Err(damaged(format!(
            "SQLite's quick_check says: {}",
            rows.join("; ")
        ))),
        Err(e) => Err(damaged_or(e, path)),
    }
}

/// A damage error for SQLite's corrupt or not-a-database codes, else the
/// error as it is.
fn damaged_or(e: rusqlite::Error, path: &Path) -> StoreError {
    match e.sqlite_error_code() {
        Some(rusqlite::ErrorCode::DatabaseCorrupt | rusqlite::ErrorCode::NotADatabase) => {
            StoreError::Damaged {
                path: path.to_owned(),
                details: e.to_string(),
            }
        }
        _ => StoreError::Sql(e),
    }
}

/// Opens an existing database read-only, for reports.
pub fn open_read_only(path: &Path) -> StoreResult<Connection> {
    access::check(path, access::Need::Read)?;
    let conn = Connection::open_with_flags(
        path,
        OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(|source| StoreError::Open {
        path: path.to_owned(),
        source,
    })?;
    conn.busy_timeout(BUSY_TIMEOUT)?;
    let version: i64 = conn
        .pragma_query_value(None, "user_version", |r| r.get(0))
        .map_err(|e| damaged_or(e, path))?;
    if version != schema::VERSION {
        return Err(StoreError::Corrupt(format!(
            "{} is at schema version {version}, this leaktally reads version {}{}",
            path.display(),
            schema::VERSION,
            if version < schema::VERSION {
                "; start the daemon on it once (it upgrades the file) and try again"
            } else {
                "; use a newer leaktally"
            }
        )));
    }
    Ok(conn)
}

/// Opens an existing database for an operator's request: read-write, but
/// never migrated or otherwise changed here (that is the daemon's job), and
/// refused when SQLite cannot read its header and schema.
pub fn open_for_requests(path: &Path) -> StoreResult<Connection> {
    access::check(path, access::Need::ReadWrite)?;
    let conn = Connection::open_with_flags(
        path,
        OpenFlags::SQLITE_OPEN_READ_WRITE | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(|source| StoreError::Open {
        path: path.to_owned(),
        source,
    })?;
    conn.busy_timeout(BUSY_TIMEOUT)?;
    let version: i64 = conn
        .query_row("SELECT count(*) FROM sqlite_schema", [], |_| Ok(()))
        .and_then(|()| conn.pragma_query_value(None, "user_version", |r| r.get(0)))
        .map_err(|e| damaged_or(e, path))?;
    if version != schema::VERSION {
        return Err(StoreError::Corrupt(format!(
            "{} is at schema version {version}, this leaktally writes version {}; start the daemon on it (it upgrades the file) and try again",
            path.display(),
            schema::VERSION
        )));
    }
    Ok(conn)
}

/// Creates the database file readable and writable by its owner and group
/// and nobody else (0660, less what the umask takes), before SQLite
/// creates it with the umask's wider default. Operators act through the
/// daemon's group: `leak` writes its request into the file. SQLite gives
/// the -wal and -shm files the main file's permissions, and in a setgid
/// folder (the shipped unit's, 2770) every file takes the folder's group,
/// whoever creates it.
fn create_private(path: &Path) {
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        let _ = std::fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .mode(0o660)
            .open(path);
    }
}

/// Which queue a job waits in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Lane {
    /// Samples, heartbeats, operator actions, the daemon's reads.
    Urgent,
    /// Trimming and checkpoints: run only when no urgent job waits.
    Background,
}

type Job = Box<dyn FnOnce(&mut Connection) + Send>;

/// What a checkpoint did, in WAL frames (pages).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Checkpoint {
    /// Whether a reader or writer kept it from finishing.
    pub busy: bool,
    pub wal_frames: i64,
    pub copied_frames: i64,
}

/// The daemon's handle on its database thread.
///
/// Jobs run one at a time, urgent ones first, each with the one read-write
/// connection. Dropping every handle stops the thread after the queued jobs
/// have run, so nothing sent is lost on shutdown; `close` waits for it,
/// for a bounded time.
pub struct Store {
    jobs: mpsc::Sender<(Lane, Job)>,
    finished: Option<oneshot::Receiver<()>>,
    #[cfg(test)]
    pub(crate) faults: std::sync::Arc<unit::Faults>,
}

impl Store {
    /// Checks the database's integrity, opens it, and starts its thread.
    /// Nothing is written to a file that fails the check.
    pub fn open(path: &Path) -> StoreResult<Self> {
        let existed = path.exists();
        create_private(path);
        let conn = connect(path)?;
        if existed {
            check_integrity(path, &conn)?;
        }
        let conn = apply_pragmas(path, conn)?;
        conn.busy_timeout(WRITER_BUSY_TIMEOUT)?;
        conn.pragma_update(None, "journal_size_limit", WAL_SIZE_LIMIT_BYTES)?;
        conn.pragma_update(None, "wal_autocheckpoint", WAL_AUTOCHECKPOINT_PAGES)?;
        Self::start(conn)
    }

    fn start(mut conn: Connection) -> StoreResult<Self> {
        // Bounded: a stalled disk makes senders wait instead of queueing
        // without limit.
        let (jobs, mut queue) = mpsc::channel::<(Lane, Job)>(256);
        let (done, finished) = oneshot::channel();
        #[cfg(test)]
        let faults = std::sync::Arc::new(unit::Faults::default());
        #[cfg(test)]
        let thread_faults = std::sync::Arc::clone(&faults);
        std::thread::Builder::new()
            .name("leaktally-store".into())
            .spawn(move || {
                let mut urgent = std::collections::VecDeque::new();
                let mut background = std::collections::VecDeque::new();
                loop {
                    // Sort what is waiting, then run the oldest urgent job,
                    // else the oldest background one.
                    while let Ok((lane, job)) = queue.try_recv() {
                        match lane {
                            Lane::Urgent => urgent.push_back(job),
                            Lane::Background => background.push_back(job),
                        }
                    }
                    let job = match urgent.pop_front().or_else(|| background.pop_front()) {
                        Some(job) => job,
                        None => match queue.blocking_recv() {
                            Some((Lane::Urgent, job)) => job,
                            Some((Lane::Background, job)) => {
                                background.push_back(job);
                                continue;
                            }
                            None => break,
                        },
                    };
                    #[cfg(test)]
                    thread_faults.wait_while_hung();
                    job(&mut conn);
                }
                let _ = conn.pragma_update(None, "wal_checkpoint", "TRUNCATE");
                let _ = conn.close();
                let _ = done.send(());
            })
            .map_err(|e| StoreError::Corrupt(format!("cannot start the database thread: {e}")))?;
        Ok(Self {
            jobs,
            finished: Some(finished),
            #[cfg(test)]
            faults,
        })
    }

    /// Runs `f` on the database thread and returns its result.
    async fn run<T, F>(&self, lane: Lane, f: F) -> StoreResult<T>
    where
        T: Send + 'static,
        F: FnOnce(&mut Connection) -> StoreResult<T> + Send + 'static,
    {
        let (tx, rx) = oneshot::channel();
        let job: Job = Box::new(move |conn| {
            let _ = tx.send(f(conn));
        });
        self.jobs
            .send((lane, job))
            .await
            .map_err(|_| StoreError::Stopped)?;
        unit::wait(rx).await?
    }

    /// Runs `work` in one write transaction on the database thread: all of
    /// its writes commit together when it returns `Ok`, and none of them
    /// stays when it returns `Err` (or the commit fails).
    pub async fn write<T, F>(&self, lane: Lane, work: F) -> StoreResult<T>
    where
        T: Send + 'static,
        F: FnOnce(&mut Tx<'_>) -> StoreResult<T> + Send + 'static,
    {
        #[cfg(test)]
        let faults = std::sync::Arc::clone(&self.faults);
        self.run(lane, move |conn| {
            #[cfg(test)]
            let fail_after = {
                faults.before_unit()?;
                faults.take_fail_after()
            };
            #[cfg(not(test))]
            let fail_after = None;
            unit::in_write_transaction(conn, fail_after, work)
        })
        .await
    }

    /// As [`Store::write`], for writes whose loss in a power cut costs
    /// nothing (a heartbeat, which the next replaces; a trim chunk, which is
    /// done again): the commit does not wait for the disk (SQLite's
    /// `synchronous = NORMAL` in WAL mode), and the next durable commit
    /// takes it to the disk with its own. A crash can lose it, never
    /// corrupt the file. Samples, estimates and operator actions always go
    /// by [`Store::write`].
    pub async fn write_lax<T, F>(&self, lane: Lane, work: F) -> StoreResult<T>
    where
        T: Send + 'static,
        F: FnOnce(&mut Tx<'_>) -> StoreResult<T> + Send + 'static,
    {
        #[cfg(test)]
        let faults = std::sync::Arc::clone(&self.faults);
        self.run(lane, move |conn| {
            #[cfg(test)]
            let fail_after = {
                faults.before_unit()?;
                faults.take_fail_after()
            };
            #[cfg(not(test))]
            let fail_after = None;
            unit::run_cached(conn, "PRAGMA synchronous = NORMAL")?;
            let done = unit::in_write_transaction(conn, fail_after, work);
            unit::run_cached(conn, "PRAGMA synchronous = FULL")?;
            done
        })
        .await
    }

    /// Runs `work` in one read transaction (a consistent view, no write
    /// lock taken) on the database thread, in the urgent lane.
    pub async fn read<T, F>(&self, work: F) -> StoreResult<T>
    where
        T: Send + 'static,
        F: FnOnce(&Reader<'_>) -> StoreResult<T> + Send + 'static,
    {
        self.run(Lane::Urgent, move |conn| {
            unit::in_read_transaction(conn, work)
        })
        .await
    }

    /// A passive checkpoint, in the background lane: copies what it can of
    /// the WAL into the database without waiting for readers or writers.
    pub async fn checkpoint(&self) -> StoreResult<Checkpoint> {
        self.run(Lane::Background, |conn| {
            Ok(unit::query_row(
                conn,
                "PRAGMA wal_checkpoint(PASSIVE)",
                [],
                |r| {
                    Ok(Checkpoint {
                        busy: r.get::<_, i64>(0)? != 0,
                        wal_frames: r.get(1)?,
                        copied_frames: r.get(2)?,
                    })
                },
            )?)
        })
        .await
    }

    /// Stops the thread once queued jobs are done, and waits for it, for
    /// at most `within`; false if it did not finish in that time (a hung
    /// disk), in which case it is left behind.
    pub async fn close(mut self, within: Duration) -> bool {
        let finished = self.finished.take();
        drop(self);
        match finished {
            Some(finished) => tokio::time::timeout(within, unit::wait(finished))
                .await
                .is_ok_and(|r| r.is_ok()),
            None => true,
        }
    }
}

/// The current wall-clock time, UTC milliseconds. The daemon's own times
/// come from its timeline (`crate::clock`); this is for everything else.
pub fn now_ms() -> i64 {
    jiff::Timestamp::now().as_millisecond()
}
