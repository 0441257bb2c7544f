//! The store: one SQLite file holding samples, events, operator actions,
//! estimates and crossings.
//!
//! Durability: WAL journal with `synchronous = FULL`, so every commit is on
//! disk before it returns. An acknowledged operator action and every logged
//! estimate then survive kill -9 and power loss, which NORMAL does not
//! promise (it may roll back the last commits after a power cut). FULL costs
//! an fsync per commit; the daemon commits once per poll cycle, so that is
//! a few milliseconds a second.
//!
//! Threads: rusqlite blocks, so the daemon's connection lives on a thread of
//! its own ([`Store`]) and async code hands it closures; readers such as
//! `status` open their own short-lived read-only connections, which WAL lets
//! run beside the writer.
//!
//! Architecture invariant: only this module writes SQL.

pub mod health;
pub mod records;
pub mod schema;

use rusqlite::{Connection, OpenFlags};
use std::path::{Path, PathBuf};
use std::time::Duration;
use tokio::sync::{mpsc, oneshot};

pub use records::*;

/// Something went wrong with the database.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error(
        "cannot open the database {path}: {source}; check the path and that its folder is writable"
    )]
    Open {
        path: PathBuf,
        source: rusqlite::Error,
    },
    #[error(
        "the database {0} does not exist; start the daemon with `leaktally run --config FILE --db {0}` first"
    )]
    Missing(PathBuf),
    #[error(transparent)]
    Schema(#[from] schema::SchemaError),
    #[error("database error: {0}{hint}", hint = sql_hint(.0))]
    Sql(#[from] rusqlite::Error),
    #[error("stored data is not valid: {0}")]
    Corrupt(String),
    #[error("the database thread has stopped")]
    Stopped,
    #[error("{0}")]
    Refused(String),
}

pub type StoreResult<T> = Result<T, StoreError>;

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
        _ => "",
    }
}

/// How long a connection waits for another writer's lock before giving up.
pub const BUSY_TIMEOUT: Duration = Duration::from_secs(5);
/// The daemon's writer waits less: its loop waits with it, and a failed
/// commit is kept and retried anyway (see `track::tracker`).
pub const WRITER_BUSY_TIMEOUT: Duration = Duration::from_secs(1);

/// Opens (creating if needed) the database for writing, applies the
/// pragmas and migrates the schema.
pub fn open_read_write(path: &Path) -> StoreResult<Connection> {
    create_private(path);
    let open = |path: &Path| -> rusqlite::Result<Connection> {
        let conn = Connection::open(path)?;
        conn.busy_timeout(BUSY_TIMEOUT)?;
        conn.pragma_update(None, "journal_mode", "WAL")?;
        conn.pragma_update(None, "synchronous", "FULL")?;
        conn.pragma_update(None, "foreign_keys", true)?;
        Ok(conn)
    };
    let mut conn = open(path).map_err(|source| StoreError::Open {
        path: path.to_owned(),
        source,
    })?;
    schema::migrate(&mut conn)?;
    Ok(conn)
}

/// Opens an existing database read-only, for reports.
pub fn open_read_only(path: &Path) -> StoreResult<Connection> {
    if !path.exists() {
        return Err(StoreError::Missing(path.to_owned()));
    }
    let conn = Connection::open_with_flags(
        path,
        OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(|source| StoreError::Open {
        path: path.to_owned(),
        source,
    })?;
    conn.busy_timeout(BUSY_TIMEOUT)?;
    let version: i64 = conn.pragma_query_value(None, "user_version", |r| r.get(0))?;
    if version != schema::VERSION {
        return Err(StoreError::Corrupt(format!(
            "{} is at schema version {version}, this leaktally reads version {}",
            path.display(),
            schema::VERSION
        )));
    }
    Ok(conn)
}

/// Creates the database file readable by its owner and group only, before
/// SQLite creates it with the umask's wider default. SQLite gives the -wal
/// and -shm files the main file's permissions.
fn create_private(path: &Path) {
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        let _ = std::fs::OpenOptions::new()
            .write(true)
            .create_new(true)
            .mode(0o640)
            .open(path);
    }
}

type Job = Box<dyn FnOnce(&mut Connection) + Send>;

/// The daemon's handle on its database thread.
///
/// Jobs run one at a time in the order sent, each with the one read-write
/// connection. Dropping every handle stops the thread after the queued jobs
/// have run, so nothing sent is lost on shutdown; `close` waits for it.
pub struct Store {
    jobs: mpsc::Sender<Job>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl Store {
    /// Opens the database and starts its thread.
    pub fn open(path: &Path) -> StoreResult<Self> {
        let mut conn = open_read_write(path)?;
        conn.busy_timeout(WRITER_BUSY_TIMEOUT)?;
        // Bounded: a stalled disk makes senders wait instead of queueing
        // without limit.
        let (jobs, mut queue) = mpsc::channel::<Job>(256);
        let thread = std::thread::Builder::new()
            .name("leaktally-store".into())
            .spawn(move || {
                while let Some(job) = queue.blocking_recv() {
                    job(&mut conn);
                }
                let _ = conn.pragma_update(None, "wal_checkpoint", "TRUNCATE");
                let _ = conn.close();
            })
            .map_err(|e| StoreError::Corrupt(format!("cannot start the database thread: {e}")))?;
        Ok(Self {
            jobs,
            thread: Some(thread),
        })
    }

    /// Runs `f` on the database thread and returns its result.
    pub async fn call<T, F>(&self, f: F) -> StoreResult<T>
    where
        T: Send + 'static,
        F: FnOnce(&mut Connection) -> StoreResult<T> + Send + 'static,
    {
        let (tx, rx) = oneshot::channel();
        let job: Job = Box::new(move |conn| {
            let _ = tx.send(f(conn));
        });
        self.jobs.send(job).await.map_err(|_| StoreError::Stopped)?;
        rx.await.map_err(|_| StoreError::Stopped)?
    }

    /// Stops the thread once queued jobs are done, and waits for it.
    pub fn close(mut self) {
        let thread = self.thread.take();
        drop(self);
        if let Some(t) = thread {
            let _ = t.join();
        }
    }
}

/// The current time, UTC milliseconds.
pub fn now_ms() -> i64 {
    jiff::Timestamp::now().as_millisecond()
}
