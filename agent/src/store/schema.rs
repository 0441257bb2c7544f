//! The database schema and its migrations.
//!
//! The schema version lives in SQLite's `user_version`. Each migration takes
//! the database from one version to the next inside one transaction, so a
//! crash half-way leaves the old version intact. A database newer than this
//! program is refused rather than guessed at.

use rusqlite::Connection;

/// Migrations in order; entry `i` takes version `i` to `i + 1`.
const MIGRATIONS: &[&str] = &[
    // 1: the first schema.
    r#"
    -- Tanks by tag, so samples can refer to a small integer.
    CREATE TABLE tanks (
        id  INTEGER PRIMARY KEY,
        tag TEXT NOT NULL UNIQUE
    );

    -- Every poll of every tank. Qualities are the acquire::sample::Quality
    -- names; a value is NULL unless its quality is 'good'. A NULL quality
    -- means the value is not mapped. flag: NULL not mapped, 0/1, or 2 when
    -- it could not be read. The primary key makes a sample stored twice
    -- impossible.
    CREATE TABLE samples (
        tank       INTEGER NOT NULL REFERENCES tanks(id),
        at_ms      INTEGER NOT NULL,
        level      REAL,
        level_q    TEXT NOT NULL,
        pressure   REAL,
        pressure_q TEXT,
        transfer   REAL,
        transfer_q TEXT,
        flag       INTEGER,
        PRIMARY KEY (tank, at_ms)
    ) WITHOUT ROWID;

    -- Leak events. params is the JSON of the current revision's LeakParams.
    CREATE TABLE events (
        id           INTEGER PRIMARY KEY,
        tank         TEXT NOT NULL,
        opened_at_ms INTEGER NOT NULL,
        start_ms     INTEGER NOT NULL,
        closed_at_ms INTEGER,
        source       TEXT NOT NULL,
        revision     INTEGER NOT NULL,
        params       TEXT NOT NULL
    );

    -- Operator actions and their outcome: the audit trail. request and
    -- outcome are JSON; state is pending, done or refused.
    CREATE TABLE actions (
        id              INTEGER PRIMARY KEY,
        requested_at_ms INTEGER NOT NULL,
        os_user         TEXT NOT NULL,
        host            TEXT NOT NULL,
        kind            TEXT NOT NULL,
        event           INTEGER,
        request         TEXT NOT NULL,
        state           TEXT NOT NULL DEFAULT 'pending',
        handled_at_ms   INTEGER,
        outcome         TEXT
    );
    CREATE INDEX actions_pending ON actions(state) WHERE state = 'pending';

    -- The estimate after each sample, per event and revision: the key
    -- figures as columns for queries, and the whole document as JSON.
    CREATE TABLE estimates (
        event    INTEGER NOT NULL REFERENCES events(id),
        revision INTEGER NOT NULL,
        at_ms    INTEGER NOT NULL,
        best_kg  REAL NOT NULL,
        low_kg   REAL NOT NULL,
        high_kg  REAL NOT NULL,
        rate_kg_s REAL NOT NULL,
        method   TEXT NOT NULL,
        doc      TEXT NOT NULL,
        PRIMARY KEY (event, revision, at_ms)
    ) WITHOUT ROWID;

    -- First crossings of reportable quantities, per event and revision.
    CREATE TABLE crossings (
        event       INTEGER NOT NULL REFERENCES events(id),
        revision    INTEGER NOT NULL,
        quantity_kg REAL NOT NULL,
        at_ms       INTEGER NOT NULL,
        PRIMARY KEY (event, revision, quantity_kg)
    ) WITHOUT ROWID;

    -- The running daemon's heartbeat: the CLI checks it before it asks for
    -- an action, so it can say when no daemon is there to act.
    CREATE TABLE daemon (
        id            INTEGER PRIMARY KEY CHECK (id = 1),
        pid           INTEGER NOT NULL,
        started_at_ms INTEGER NOT NULL,
        beat_at_ms    INTEGER NOT NULL,
        config        TEXT NOT NULL,
        stopped_at_ms INTEGER
    );
    "#,
    // 2: the liquid's temperature beside each sample (K), NULL where no
    // temperature sensor is mapped, as the other optional values.
    r#"
    ALTER TABLE samples ADD COLUMN temperature REAL;
    ALTER TABLE samples ADD COLUMN temperature_q TEXT;
    "#,
    // 3: long runs. Trimming finds a tank's event windows by index and
    // keeps its place across restarts; wall-clock steps are recorded
    // beside the samples (not on every sample row, whose size stays as it
    // was); the heartbeat says what the daemon is doing and how its
    // timeline stands against the wall clock; an open event that cannot be
    // resumed says why.
    r#"
    CREATE INDEX events_by_tank ON events(tank, start_ms);

    -- How far the rolling history has been trimmed: everything before
    -- thinned_before_ms is thinned, everything before removed_before_ms
    -- (outside event windows) is gone. One row.
    CREATE TABLE trim_progress (
        id                INTEGER PRIMARY KEY CHECK (id = 1),
        thinned_before_ms INTEGER NOT NULL,
        removed_before_ms INTEGER NOT NULL
    );

    -- Steps of the wall clock the daemon saw, and what its timeline did.
    -- kind: wall_step (the wall clock jumped; the timeline went on as it
    -- was), realigned (the timeline moved forward to the wall clock, with
    -- no event open), anchored_ahead (at start, the timeline was set after
    -- the stored history, ahead of a wall clock that is behind it).
    -- at_ms is on the timeline, wall_ms on the wall clock, step_ms the
    -- jump (negative: back), offset_ms the timeline minus the wall clock
    -- afterwards.
    CREATE TABLE clock_steps (
        id        INTEGER PRIMARY KEY,
        kind      TEXT NOT NULL,
        at_ms     INTEGER NOT NULL,
        wall_ms   INTEGER NOT NULL,
        step_ms   INTEGER NOT NULL,
        offset_ms INTEGER NOT NULL
    );

    -- beat_wall_ms: the beat on the wall clock, which readers compare with
    -- their own; clock_offset_ms: the daemon's timeline minus the wall
    -- clock; loop_wall_ms: when its main loop last turned (wall clock);
    -- activity: what it is doing, in words.
    ALTER TABLE daemon ADD COLUMN beat_wall_ms INTEGER;
    ALTER TABLE daemon ADD COLUMN clock_offset_ms INTEGER;
    ALTER TABLE daemon ADD COLUMN loop_wall_ms INTEGER;
    ALTER TABLE daemon ADD COLUMN activity TEXT;

    -- Why an open event is not being tracked (it could not be resumed);
    -- NULL while it is.
    ALTER TABLE events ADD COLUMN tracking_error TEXT;
    "#,
];

/// The version this program writes.
pub const VERSION: i64 = MIGRATIONS.len() as i64;

/// Why the schema could not be brought up to date.
#[derive(Debug, thiserror::Error)]
pub enum SchemaError {
    #[error(
        "the database is at schema version {found}, newer than this leaktally understands ({VERSION}); use a newer leaktally or another --db"
    )]
    TooNew { found: i64 },
    #[error("migrating the database to schema version {to}: {source}")]
    Migration { to: i64, source: rusqlite::Error },
}

/// Applies every migration the database lacks.
pub fn migrate(conn: &mut Connection) -> Result<(), SchemaError> {
    let found: i64 = conn
        .pragma_query_value(None, "user_version", |r| r.get(0))
        .map_err(|source| SchemaError::Migration { to: 1, source })?;
    if found > VERSION {
        return Err(SchemaError::TooNew { found });
    }
    for (i, sql) in MIGRATIONS.iter().enumerate().skip(found.max(0) as usize) {
        let to = i as i64 + 1;
        let step = |conn: &mut Connection| -> rusqlite::Result<()> {
            let tx = conn.transaction()?;
            tx.execute_batch(sql)?;
            tx.pragma_update(None, "user_version", to)?;
            tx.commit()
        };
        step(conn).map_err(|source| SchemaError::Migration { to, source })?;
    }
    Ok(())
}
