//! The database schema and its migrations.
//!
//! The schema version lives in SQLite's `user_version`. Each migration takes
//! the database from one version to the next inside one transaction, so a
//! crash half-way leaves the old version intact. A database newer than this
//! program is refused rather than guessed at.

use rusqlite::Connection;

/// A migration: SQL, then (where data must be carried over in code) a
/// function, in one transaction.
type Migration = (
    &'static str,
    Option<fn(&rusqlite::Transaction<'_>) -> rusqlite::Result<()>>,
);

/// Migrations in order; entry `i` takes version `i` to `i + 1`.
const MIGRATIONS: &[Migration] = &[
    // 1: the first schema.
    (
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
        None,
    ),
    // 2: the liquid's temperature beside each sample (K), NULL where no
    // temperature sensor is mapped, as the other optional values.
    (
        r#"
    ALTER TABLE samples ADD COLUMN temperature REAL;
    ALTER TABLE samples ADD COLUMN temperature_q TEXT;
    "#,
        None,
    ),
    // 3: long runs. Trimming finds a tank's event windows by index and
    // keeps its place across restarts; wall-clock steps are recorded
    // beside the samples (not on every sample row, whose size stays as it
    // was); the heartbeat says what the daemon is doing and how its
    // timeline stands against the wall clock; an open event that cannot be
    // resumed says why.
    (
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
        None,
    ),
    // 4: samples packed a poll cycle to a row, and estimates kept as a
    // small row of figures per sample with the whole document for the
    // latest only (see store::samples and store::estimates). The old rows
    // are carried over in code, value for value (see `pack_history`).
    (
        r#"
    -- The tanks of a block of samples, in slot order: their ids
    -- (tanks.id), comma-separated. A device's tanks make one set.
    CREATE TABLE sample_sets (
        id    INTEGER PRIMARY KEY,
        tanks TEXT NOT NULL UNIQUE
    );
    -- Where each tank sits in each set it belongs to.
    CREATE TABLE sample_set_slots (
        tank       INTEGER NOT NULL REFERENCES tanks(id),
        sample_set INTEGER NOT NULL REFERENCES sample_sets(id),
        slot       INTEGER NOT NULL,
        PRIMARY KEY (tank, sample_set)
    ) WITHOUT ROWID;
    -- One poll cycle of a set's tanks: the time once, the readings packed
    -- slot by slot (store::samples). The unique index makes a cycle
    -- stored twice impossible and serves every time range.
    CREATE TABLE sample_blocks (
        id         INTEGER PRIMARY KEY,
        sample_set INTEGER NOT NULL REFERENCES sample_sets(id),
        at_ms      INTEGER NOT NULL,
        data       BLOB NOT NULL
    );
    CREATE UNIQUE INDEX sample_blocks_by_set ON sample_blocks (sample_set, at_ms);

    -- The figures after each sample, per event and revision; codes packs
    -- the method, reason, phase, gap mark and warnings (store::estimates).
    CREATE TABLE estimate_rows (
        event          INTEGER NOT NULL REFERENCES events(id),
        revision       INTEGER NOT NULL,
        at_ms          INTEGER NOT NULL,
        best_kg        REAL NOT NULL,
        low_kg         REAL NOT NULL,
        high_kg        REAL NOT NULL,
        rate_kg_s      REAL NOT NULL,
        rate_low_kg_s  REAL NOT NULL,
        rate_high_kg_s REAL NOT NULL,
        inventory_kg   REAL,
        model_kg       REAL,
        codes          INTEGER NOT NULL,
        PRIMARY KEY (event, revision, at_ms)
    ) WITHOUT ROWID;
    -- The whole estimate (JSON) of each event revision's latest sample,
    -- and the estimator version that made it (NULL: before it was kept).
    CREATE TABLE latest_estimates (
        event             INTEGER NOT NULL REFERENCES events(id),
        revision          INTEGER NOT NULL,
        at_ms             INTEGER NOT NULL,
        estimator_version INTEGER,
        doc               TEXT NOT NULL,
        PRIMARY KEY (event, revision)
    ) WITHOUT ROWID;
    "#,
        Some(pack_history),
    ),
    // 5: the outbox of messages for the MQTT broker (store::outbox), oldest
    // first by seq (AUTOINCREMENT: a number is never given again, even once
    // the outbox has emptied, so the publisher's place in it stays valid);
    // kind is status, summary or reading; payload is JSON.
    (
        r#"
    CREATE TABLE outbox (
        seq     INTEGER PRIMARY KEY AUTOINCREMENT,
        kind    TEXT NOT NULL,
        event   INTEGER,
        tank    TEXT,
        at_ms   INTEGER NOT NULL,
        payload TEXT NOT NULL
    );
    "#,
        None,
    ),
];

/// Carries the rows of schema 3 over to schema 4, value for value: each
/// tank's samples become blocks of a set of that tank alone (one block per
/// old row; new cycles pack a device to a row, and the old rows age out
/// with the rolling history), and each stored estimate becomes a row of
/// figures, the last of each event revision also its latest document.
/// Then the old tables go.
fn pack_history(tx: &rusqlite::Transaction<'_>) -> rusqlite::Result<()> {
    use crate::estimate::Estimate;
    let failed = |why: String| rusqlite::Error::ToSqlConversionFailure(why.into());
    let tanks: Vec<(i64, String)> = {
        let mut stmt = tx.prepare("SELECT id, tag FROM tanks ORDER BY id")?;
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?
            .collect::<Result<_, _>>()?
    };
    for (_, tag) in &tanks {
        let set =
            super::samples::sample_set(tx, &[tag.as_str()]).map_err(|e| failed(e.to_string()))?;
        let old = super::samples::legacy_samples(tx, tag).map_err(|e| failed(e.to_string()))?;
        let mut insert = tx.prepare_cached(
            "INSERT OR IGNORE INTO sample_blocks (sample_set, at_ms, data) VALUES (?1, ?2, ?3)",
        )?;
        for s in &old {
            insert.execute(rusqlite::params![
                set,
                s.at_ms,
                super::samples::block_of([s])
            ])?;
        }
    }
    let mut latest: std::collections::HashMap<(i64, i64), (i64, String)> =
        std::collections::HashMap::new();
    {
        let mut stmt = tx.prepare(
            "SELECT event, revision, at_ms, doc FROM estimates ORDER BY event, revision, at_ms",
        )?;
        let mut rows = stmt.query([])?;
        while let Some(row) = rows.next()? {
            let (event, revision, at_ms, doc): (i64, i64, i64, String) =
                (row.get(0)?, row.get(1)?, row.get(2)?, row.get(3)?);
            let estimate: Estimate = serde_json::from_str(&doc)
                .map_err(|e| failed(format!("estimate of event {event} at {at_ms}: {e}")))?;
            super::estimates::insert_figures(tx, event, revision, &[estimate.figures()])
                .map_err(|e| failed(e.to_string()))?;
            latest.insert((event, revision), (at_ms, doc));
        }
    }
    let mut put = tx.prepare(
        "INSERT INTO latest_estimates (event, revision, at_ms, estimator_version, doc) VALUES (?1, ?2, ?3, NULL, ?4)",
    )?;
    for ((event, revision), (at_ms, doc)) in latest {
        put.execute(rusqlite::params![event, revision, at_ms, doc])?;
    }
    tx.execute_batch("DROP TABLE samples; DROP TABLE estimates;")
}

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
    for (i, (sql, code)) in MIGRATIONS.iter().enumerate().skip(found.max(0) as usize) {
        let to = i as i64 + 1;
        let step = |conn: &mut Connection| -> rusqlite::Result<()> {
            let tx = conn.transaction()?;
            tx.execute_batch(sql)?;
            if let Some(code) = code {
                code(&tx)?;
            }
            tx.pragma_update(None, "user_version", to)?;
            tx.commit()
        };
        step(conn).map_err(|source| SchemaError::Migration { to, source })?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::acquire::sample::{Quality, Reading};
    use crate::estimate::{Estimate, LeakParams};

    /// A database of schema 3 (a row per sample, a JSON document per
    /// estimate) comes over to schema 4 value for value: every sample reads
    /// back the same, bit for bit, and every estimate's figures and the
    /// latest document are kept.
    #[test]
    fn the_packing_migration_keeps_every_value() {
        let mut conn = Connection::open_in_memory().unwrap();
        let up_to_3 = |conn: &mut Connection| {
            let tx = conn.transaction().unwrap();
            for (sql, _) in &MIGRATIONS[..3] {
                tx.execute_batch(sql).unwrap();
            }
            tx.pragma_update(None, "user_version", 3).unwrap();
            tx.commit().unwrap();
        };
        up_to_3(&mut conn);
        conn.execute_batch("INSERT INTO tanks (tag) VALUES ('A'), ('B')")
            .unwrap();
        let rows = [
            (
                1,
                1000,
                Some(1.25),
                "good",
                Some(1500.5),
                Some("good"),
                None::<f64>,
                None::<&str>,
                Some(0),
                None::<f64>,
                None::<&str>,
            ),
            (
                1,
                2000,
                None,
                "stuck",
                None,
                Some("communication_lost"),
                Some(0.001),
                Some("good"),
                None,
                Some(288.15),
                Some("good"),
            ),
            (
                2,
                1000,
                Some(0.1 + 0.2),
                "good",
                None,
                None,
                None,
                None,
                Some(2),
                None,
                None,
            ),
        ];
        for r in rows {
            conn.execute(
                "INSERT INTO samples (tank, at_ms, level, level_q, pressure, pressure_q, transfer, transfer_q, flag, temperature, temperature_q) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
                rusqlite::params![r.0, r.1, r.2, r.3, r.4, r.5, r.6, r.7, r.8, r.9, r.10],
            )
            .unwrap();
        }
        let event =
            crate::store::create_event(&conn, "A", 0, 0, "operator", &LeakParams::default())
                .unwrap();
        let mut docs = Vec::new();
        for at in [1000, 2000] {
            let mut e = Estimate::blank();
            e.at_ms = at;
            e.released_best_kg = 0.1 * at as f64 + 1e-9;
            e.method = crate::estimate::Method::FittedHole;
            e.warnings.insert(crate::estimate::Warning::NoLossSeen);
            let doc = serde_json::to_string(&e).unwrap();
            conn.execute(
                "INSERT INTO estimates (event, revision, at_ms, best_kg, low_kg, high_kg, rate_kg_s, method, doc) VALUES (?1, 1, ?2, 0, 0, 0, 0, 'no_data', ?3)",
                rusqlite::params![event, at, doc],
            )
            .unwrap();
            docs.push(e);
        }
        migrate(&mut conn).unwrap();
        assert_eq!(
            conn.pragma_query_value(None, "user_version", |r| r.get::<_, i64>(0))
                .unwrap(),
            VERSION
        );
        let a = crate::store::samples_between(&conn, "A", 0, 10_000).unwrap();
        assert_eq!(a.len(), 2);
        assert_eq!(a[0].level, Reading::good(1.25));
        assert_eq!(a[0].pressure, Some(Reading::good(1500.5)));
        assert_eq!(a[0].transfer, None);
        assert_eq!(a[0].leak_flag, Some(Some(false)));
        assert_eq!(a[1].level, Reading::bad(Quality::Stuck));
        assert_eq!(
            a[1].pressure,
            Some(Reading::bad(Quality::CommunicationLost))
        );
        assert_eq!(a[1].transfer, Some(Reading::good(0.001)));
        assert_eq!(a[1].temperature, Some(Reading::good(288.15)));
        assert_eq!(a[1].leak_flag, None);
        let b = crate::store::samples_between(&conn, "B", 0, 10_000).unwrap();
        assert_eq!(
            b[0].level.value.unwrap().to_bits(),
            (0.1f64 + 0.2).to_bits()
        );
        assert_eq!(b[0].leak_flag, Some(None));
        let figures = crate::store::figures_of(&conn, event, 1).unwrap();
        assert_eq!(figures.len(), 2);
        for (f, e) in figures.iter().zip(&docs) {
            assert!(f.identical(&e.figures()), "{f:?} vs {e:?}");
        }
        let (latest, version) = crate::store::latest_estimate_with_version(&conn, event, 1)
            .unwrap()
            .unwrap();
        assert_eq!(latest, docs[1]);
        assert_eq!(version, None, "logged before the version was kept");
        let old: i64 = conn
            .query_row(
                "SELECT COUNT(*) FROM sqlite_schema WHERE name IN ('samples', 'estimates')",
                [],
                |r| r.get(0),
            )
            .unwrap();
        assert_eq!(old, 0, "the old tables are gone");
    }
}
