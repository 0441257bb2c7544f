//! Samples, packed: one row per poll cycle of a device, not one per tank.
//!
//! A row of its own per sample cost about 5.5 µs of SQLite work each and
//! scattered every commit over one B-tree page per tank. A poll cycle of a
//! device is one [`Block`] instead: the time once, then each tank's readings
//! in a fixed slot order, in one blob. A *sample set* names the tanks and
//! their order; a device's tanks make one set, so a 1,000-tank site on 20
//! devices writes 20 rows a second, appended at 20 places. A tank's history
//! is read back through its slot in each set it belongs to.
//!
//! The encoding of one slot (all little-endian):
//!
//! ```text
//! byte 0   leak flag: 0 not mapped, 1 off, 2 on, 3 could not be read
//! byte 1   level quality (low nibble), pressure quality (high nibble)
//! byte 2   transfer quality (low nibble), temperature quality (high nibble)
//! then     one f64 per reading whose quality is `good`, in that order
//! ```
//!
//! A quality nibble is 0 for a value not mapped, 1 to 7 for the
//! [`Quality`] flags in their declared order, and 8 for a good reading
//! whose value was not finite (kept as good, with no value, as a row per
//! sample kept it). A block starts with a format byte ([`FORMAT`]).
//! Values go in and come out bit for bit, so a replay of stored samples
//! reproduces the live figures exactly.

use super::{StoreError, StoreResult, unit};
use crate::acquire::sample::{Quality, Reading, TankSample};
use rusqlite::{Connection, OptionalExtension, params};

/// The block format this version writes and reads.
pub const FORMAT: u8 = 1;

/// Quality flags in nibble order (nibble = index + 1).
const QUALITIES: [Quality; 7] = [
    Quality::Good,
    Quality::CommunicationLost,
    Quality::DeviceError,
    Quality::OutOfRange,
    Quality::Stuck,
    Quality::NotANumber,
    Quality::ImplausibleStep,
];

/// A good reading whose value was not finite.
const GOOD_WITHOUT_VALUE: u8 = 8;

fn nibble(r: Option<&Reading>) -> u8 {
    match r {
        None => 0,
        Some(r) if r.is_good() && !r.value.is_some_and(f64::is_finite) => GOOD_WITHOUT_VALUE,
        Some(r) => QUALITIES
            .iter()
            .position(|q| *q == r.quality)
            .map_or(3, |i| i as u8 + 1),
    }
}

fn reading_of(n: u8, bytes: &mut &[u8]) -> StoreResult<Option<Reading>> {
    Ok(match n {
        0 => None,
        1 => Some(Reading::good(take_f64(bytes)?)),
        GOOD_WITHOUT_VALUE => Some(Reading {
            value: None,
            quality: Quality::Good,
        }),
        n if (n as usize) <= QUALITIES.len() => Some(Reading::bad(QUALITIES[n as usize - 1])),
        n => return Err(corrupt(format!("unknown quality code {n}"))),
    })
}

fn take_f64(bytes: &mut &[u8]) -> StoreResult<f64> {
    let (head, rest) = bytes
        .split_first_chunk::<8>()
        .ok_or_else(|| corrupt("a block ends inside a value".into()))?;
    *bytes = rest;
    Ok(f64::from_le_bytes(*head))
}

fn corrupt(why: String) -> StoreError {
    StoreError::Corrupt(format!("stored samples: {why}"))
}

/// Appends one tank's slot to a block.
pub fn encode_slot(out: &mut Vec<u8>, s: &TankSample) {
    let flag = match s.leak_flag {
        None => 0,
        Some(Some(false)) => 1,
        Some(Some(true)) => 2,
        Some(None) => 3,
    };
    let readings = [
        Some(&s.level),
        s.pressure.as_ref(),
        s.transfer.as_ref(),
        s.temperature.as_ref(),
    ];
    out.push(flag);
    out.push(nibble(readings[0]) | nibble(readings[1]) << 4);
    out.push(nibble(readings[2]) | nibble(readings[3]) << 4);
    for r in readings.into_iter().flatten() {
        if let Some(v) = r.value.filter(|v| r.is_good() && v.is_finite()) {
            out.extend_from_slice(&v.to_le_bytes());
        }
    }
}

/// Skips one slot, or decodes it into `sample` (whose tank fields the
/// caller sets).
fn decode_slot(bytes: &mut &[u8], into: Option<&mut TankSample>) -> StoreResult<()> {
    let [flag, a, b] = *bytes
        .first_chunk::<3>()
        .ok_or_else(|| corrupt("a block ends inside a slot".into()))?;
    *bytes = &bytes[3..];
    let nibbles = [a & 0xf, a >> 4, b & 0xf, b >> 4];
    let Some(s) = into else {
        let values = nibbles.iter().filter(|&&n| n == 1).count();
        if bytes.len() < 8 * values {
            return Err(corrupt("a block ends inside a value".into()));
        }
        *bytes = &bytes[8 * values..];
        return Ok(());
    };
    s.leak_flag = match flag {
        0 => None,
        1 => Some(Some(false)),
        2 => Some(Some(true)),
        3 => Some(None),
        f => return Err(corrupt(format!("unknown leak flag code {f}"))),
    };
    s.level =
        reading_of(nibbles[0], bytes)?.ok_or_else(|| corrupt("a slot with no level".into()))?;
    s.pressure = reading_of(nibbles[1], bytes)?;
    s.transfer = reading_of(nibbles[2], bytes)?;
    s.temperature = reading_of(nibbles[3], bytes)?;
    Ok(())
}

/// Decodes slot `slot` of a block into `sample`.
pub fn read_slot(data: &[u8], slot: usize, sample: &mut TankSample) -> StoreResult<()> {
    let (&format, mut bytes) = data
        .split_first()
        .ok_or_else(|| corrupt("an empty block".into()))?;
    if format != FORMAT {
        return Err(corrupt(format!(
            "block format {format}, this leaktally reads {FORMAT}"
        )));
    }
    for _ in 0..slot {
        decode_slot(&mut bytes, None)?;
    }
    decode_slot(&mut bytes, Some(sample))
}

/// A block: one poll cycle of the tanks of one sample set.
pub fn block_of<'a>(samples: impl IntoIterator<Item = &'a TankSample>) -> Vec<u8> {
    let mut out = Vec::with_capacity(1 + 64 * 19);
    out.push(FORMAT);
    for s in samples {
        encode_slot(&mut out, s);
    }
    out
}

/// Makes sure every tank tag has a row.
pub fn register_tanks<'a>(
    conn: &Connection,
    tags: impl IntoIterator<Item = &'a str>,
) -> StoreResult<()> {
    let mut stmt = conn.prepare_cached("INSERT OR IGNORE INTO tanks (tag) VALUES (?1)")?;
    for tag in tags {
        stmt.execute([tag])?;
    }
    Ok(())
}

/// The sample set of these tanks in this slot order, made if new (the
/// tanks are registered too). Returns its id.
pub fn sample_set(conn: &Connection, tags: &[&str]) -> StoreResult<i64> {
    register_tanks(conn, tags.iter().copied())?;
    let mut ids = Vec::with_capacity(tags.len());
    {
        let mut stmt = conn.prepare_cached("SELECT id FROM tanks WHERE tag = ?1")?;
        for tag in tags {
            ids.push(stmt.query_row([tag], |r| r.get::<_, i64>(0))?);
        }
    }
    let key = ids.iter().map(i64::to_string).collect::<Vec<_>>().join(",");
    if let Some(id) = conn
        .prepare_cached("SELECT id FROM sample_sets WHERE tanks = ?1")?
        .query_row([&key], |r| r.get(0))
        .optional()?
    {
        return Ok(id);
    }
    conn.prepare_cached("INSERT INTO sample_sets (tanks) VALUES (?1)")?
        .execute([&key])?;
    let set = conn.last_insert_rowid();
    let mut slot = conn.prepare_cached(
        "INSERT OR IGNORE INTO sample_set_slots (tank, sample_set, slot) VALUES (?1, ?2, ?3)",
    )?;
    for (i, id) in ids.iter().enumerate() {
        slot.execute(params![id, set, i as i64])?;
    }
    Ok(set)
}

/// Stores one block; one already stored (same set and time) is left as it
/// was. Returns whether it was new.
pub fn insert_block(conn: &Connection, set: i64, at_ms: i64, data: &[u8]) -> StoreResult<bool> {
    Ok(conn
        .prepare_cached(
            "INSERT OR IGNORE INTO sample_blocks (sample_set, at_ms, data) VALUES (?1, ?2, ?3)",
        )?
        .execute(params![set, at_ms, data])?
        == 1)
}

/// Stores samples of any tanks and times: each run of samples that share
/// a time becomes a block of a set of its tanks. (The daemon stores whole
/// poll cycles with [`insert_block`]; this serves tools and tests.) Returns
/// how many samples were new.
pub fn insert_samples(conn: &Connection, samples: &[TankSample]) -> StoreResult<usize> {
    let mut new = 0;
    for run in samples.chunk_by(|a, b| a.at_ms == b.at_ms) {
        let tags: Vec<&str> = run.iter().map(|s| &*s.tank_id).collect();
        let set = sample_set(conn, &tags)?;
        if insert_block(conn, set, run[0].at_ms, &block_of(run))? {
            new += run.len();
        }
    }
    Ok(new)
}

/// The sets a tank is in, with its slot in each.
fn slots_of(conn: &Connection, tank: &str) -> StoreResult<Vec<(i64, usize)>> {
    let mut stmt = conn.prepare_cached(
        "SELECT s.sample_set, s.slot FROM sample_set_slots s JOIN tanks t ON t.id = s.tank WHERE t.tag = ?1",
    )?;
    let rows = stmt.query_map([tank], |r| Ok((r.get(0)?, r.get::<_, i64>(1)? as usize)))?;
    Ok(rows.collect::<Result<_, _>>()?)
}

/// Calls `f` with each of a tank's samples from `from_ms` to `to_ms`
/// inclusive, in time order (one sample per time: where two sets hold the
/// same time, the first set's is used).
pub fn for_each_sample(
    conn: &Connection,
    tank: &str,
    from_ms: i64,
    to_ms: i64,
    mut f: impl FnMut(&TankSample) -> StoreResult<()>,
) -> StoreResult<()> {
    let slots = slots_of(conn, tank)?;
    let mut sample = TankSample::empty(tank);
    let mut stmt = conn.prepare_cached(
        "SELECT at_ms, data FROM sample_blocks WHERE sample_set = ?1 AND at_ms BETWEEN ?2 AND ?3 ORDER BY at_ms",
    )?;
    if let [(set, slot)] = slots[..] {
        // The usual case: one set, read in order as it comes.
        let mut rows = stmt.query(params![set, from_ms, to_ms])?;
        while let Some(row) = rows.next()? {
            sample.at_ms = row.get(0)?;
            read_slot(
                row.get_ref(1)?
                    .as_blob()
                    .map_err(|e| corrupt(e.to_string()))?,
                slot,
                &mut sample,
            )?;
            f(&sample)?;
        }
        return Ok(());
    }
    // Several sets (the config moved a tank between devices): merge.
    let mut all: Vec<TankSample> = Vec::new();
    for (set, slot) in slots {
        let mut rows = stmt.query(params![set, from_ms, to_ms])?;
        while let Some(row) = rows.next()? {
            sample.at_ms = row.get(0)?;
            read_slot(
                row.get_ref(1)?
                    .as_blob()
                    .map_err(|e| corrupt(e.to_string()))?,
                slot,
                &mut sample,
            )?;
            all.push(sample.clone());
        }
    }
    all.sort_by_key(|s| s.at_ms);
    all.dedup_by_key(|s| s.at_ms);
    for s in &all {
        f(s)?;
    }
    Ok(())
}

/// The samples of a tank from `from_ms` to `to_ms` inclusive, in time order.
pub fn samples_between(
    conn: &Connection,
    tank: &str,
    from_ms: i64,
    to_ms: i64,
) -> StoreResult<Vec<TankSample>> {
    let mut out = Vec::new();
    for_each_sample(conn, tank, from_ms, to_ms, |s| {
        out.push(s.clone());
        Ok(())
    })?;
    Ok(out)
}

/// Whether a good level of `tank` is stored within `slack_ms` either side
/// of `at_ms`: whether the logged history covers that moment.
pub fn good_level_near(
    conn: &Connection,
    tank: &str,
    at_ms: i64,
    slack_ms: i64,
) -> StoreResult<bool> {
    let mut found = false;
    let (from, to) = (
        at_ms.saturating_sub(slack_ms),
        at_ms.saturating_add(slack_ms),
    );
    for_each_sample(conn, tank, from, to, |s| {
        found |= s.level.is_good();
        Ok(())
    })?;
    Ok(found)
}

/// The time of a tank's oldest or newest stored sample.
fn end_sample_ms(conn: &Connection, tank: &str, newest: bool) -> StoreResult<Option<i64>> {
    let sql = if newest {
        "SELECT MAX(b.at_ms) FROM sample_blocks b WHERE b.sample_set = ?1"
    } else {
        "SELECT MIN(b.at_ms) FROM sample_blocks b WHERE b.sample_set = ?1"
    };
    let mut stmt = conn.prepare_cached(sql)?;
    let mut out: Option<i64> = None;
    for (set, _) in slots_of(conn, tank)? {
        let at: Option<i64> = stmt.query_row([set], |r| r.get(0))?;
        out = match (out, at) {
            (Some(a), Some(b)) => Some(if newest { a.max(b) } else { a.min(b) }),
            (a, b) => a.or(b),
        };
    }
    Ok(out)
}

/// The time of a tank's oldest stored sample.
pub fn first_sample_ms(conn: &Connection, tank: &str) -> StoreResult<Option<i64>> {
    end_sample_ms(conn, tank, false)
}

/// The time of a tank's newest stored sample.
pub fn last_sample_ms(conn: &Connection, tank: &str) -> StoreResult<Option<i64>> {
    end_sample_ms(conn, tank, true)
}

/// Counts the samples of a tank, and how many share a timestamp (which
/// the blocks' unique key forbids within a set; tests check it anyway).
pub fn sample_count(conn: &Connection, tank: &str) -> StoreResult<(i64, i64)> {
    let mut times = Vec::new();
    let mut stmt = conn.prepare_cached("SELECT at_ms FROM sample_blocks WHERE sample_set = ?1")?;
    for (set, _) in slots_of(conn, tank)? {
        let rows = stmt.query_map([set], |r| r.get::<_, i64>(0))?;
        for at in rows {
            times.push(at?);
        }
    }
    let all = times.len() as i64;
    times.sort_unstable();
    times.dedup();
    Ok((all, all - times.len() as i64))
}

/// The newest time of any stored sample (one index lookup per set).
pub fn newest_sample_ms(conn: &Connection) -> StoreResult<Option<i64>> {
    Ok(unit::query_row(
        conn,
        "SELECT MAX((SELECT MAX(b.at_ms) FROM sample_blocks b WHERE b.sample_set = s.id)) FROM sample_sets s",
        [],
        |r| r.get(0),
    )?)
}

/// The oldest time of any stored sample (one index lookup per set).
pub fn oldest_sample_ms(conn: &Connection) -> StoreResult<Option<i64>> {
    Ok(unit::query_row(
        conn,
        "SELECT MIN((SELECT MIN(b.at_ms) FROM sample_blocks b WHERE b.sample_set = s.id)) FROM sample_sets s",
        [],
        |r| r.get(0),
    )?)
}

fn legacy_quality(name: &str) -> StoreResult<Quality> {
    Ok(match name {
        "good" => Quality::Good,
        "communication_lost" => Quality::CommunicationLost,
        "device_error" => Quality::DeviceError,
        "out_of_range" => Quality::OutOfRange,
        "stuck" => Quality::Stuck,
        "not_a_number" => Quality::NotANumber,
        "implausible_step" => Quality::ImplausibleStep,
        other => {
            return Err(StoreError::Corrupt(format!(
                "unknown sample quality {other:?}"
            )));
        }
    })
}

/// Every sample of a tank in the table of schema 3 (a row per sample), in
/// time order: for the migration that packs them.
pub(super) fn legacy_samples(conn: &Connection, tank: &str) -> StoreResult<Vec<TankSample>> {
    let (from_ms, to_ms) = (i64::MIN, i64::MAX);
    let mut stmt = conn.prepare(
        "SELECT s.at_ms, s.level, s.level_q, s.pressure, s.pressure_q, s.transfer, s.transfer_q, s.flag, s.temperature, s.temperature_q
         FROM samples s JOIN tanks t ON t.id = s.tank
         WHERE t.tag = ?1 AND s.at_ms BETWEEN ?2 AND ?3 ORDER BY s.at_ms",
    )?;
    let rows = stmt.query_map(params![tank, from_ms, to_ms], |r| {
        Ok((
            r.get::<_, i64>(0)?,
            r.get::<_, Option<f64>>(1)?,
            r.get::<_, String>(2)?,
            r.get::<_, Option<f64>>(3)?,
            r.get::<_, Option<String>>(4)?,
            r.get::<_, Option<f64>>(5)?,
            r.get::<_, Option<String>>(6)?,
            r.get::<_, Option<i64>>(7)?,
            r.get::<_, Option<f64>>(8)?,
            r.get::<_, Option<String>>(9)?,
        ))
    })?;
    let mut out = Vec::new();
    for row in rows {
        let (
            at_ms,
            level,
            level_q,
            pressure,
            pressure_q,
            transfer,
            transfer_q,
            flag,
            temperature,
            temperature_q,
        ) = row?;
        let reading = |value: Option<f64>, q: &str| -> StoreResult<Reading> {
            Ok(Reading {
                value,
                quality: legacy_quality(q)?,
            })
        };
        out.push(TankSample {
            tank: 0,
            tank_id: tank.into(),
            at_ms,
            level: reading(level, &level_q)?,
            pressure: pressure_q
                .as_deref()
                .map(|q| reading(pressure, q))
                .transpose()?,
            transfer: transfer_q
                .as_deref()
                .map(|q| reading(transfer, q))
                .transpose()?,
            temperature: temperature_q
                .as_deref()
                .map(|q| reading(temperature, q))
                .transpose()?,
            leak_flag: flag.map(|f| match f {
                0 => Some(false),
                1 => Some(true),
                _ => None,
            }),
        });
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample(tag: &str, at_ms: i64, level: f64) -> TankSample {
        TankSample {
            at_ms,
            level: Reading::good(level),
            ..TankSample::empty(tag)
        }
    }

    #[test]
    fn every_kind_of_reading_comes_back_bit_for_bit() {
        let readings = [
            Reading::good(1.234_567_890_123_456_7),
            Reading::good(-0.0),
            Reading::good(f64::MIN_POSITIVE),
            Reading {
                value: Some(f64::NAN),
                quality: Quality::Good,
            },
            Reading::bad(Quality::CommunicationLost),
            Reading::bad(Quality::DeviceError),
            Reading::bad(Quality::OutOfRange),
            Reading::bad(Quality::Stuck),
            Reading::bad(Quality::NotANumber),
            Reading::bad(Quality::ImplausibleStep),
        ];
        let flags = [None, Some(Some(false)), Some(Some(true)), Some(None)];
        let mut samples = Vec::new();
        for (i, r) in readings.iter().enumerate() {
            samples.push(TankSample {
                level: *r,
                pressure: (i % 2 == 0).then_some(readings[(i + 3) % readings.len()]),
                transfer: (i % 3 == 0).then_some(readings[(i + 5) % readings.len()]),
                temperature: (i % 4 != 1).then_some(readings[(i + 7) % readings.len()]),
                leak_flag: flags[i % 4],
                ..sample(&format!("T{i}"), 1000, 0.0)
            });
        }
        let block = block_of(&samples);
        for (slot, s) in samples.iter().enumerate() {
            let mut back = TankSample::empty(&s.tank_id);
            back.at_ms = 1000;
            read_slot(&block, slot, &mut back).unwrap();
            // A good reading that was not finite comes back good with no
            // value, as a row per sample kept it.
            let expect = |r: Option<Reading>| {
                r.map(|r| match r.value {
                    Some(v) if r.is_good() && !v.is_finite() => Reading {
                        value: None,
                        quality: Quality::Good,
                    },
                    _ => r,
                })
            };
            assert_eq!(Some(back.level), expect(Some(s.level)), "{slot}");
            assert_eq!(back.pressure, expect(s.pressure), "{slot}");
            assert_eq!(back.transfer, expect(s.transfer), "{slot}");
            assert_eq!(back.temperature, expect(s.temperature), "{slot}");
            assert_eq!(back.leak_flag, s.leak_flag, "{slot}");
            if let (Some(a), Some(b)) = (back.level.value, s.level.value) {
                assert_eq!(a.to_bits(), b.to_bits());
            }
        }
        // A level and a pressure: 3 bytes and two values a slot.
        let two = block_of(&[TankSample {
            pressure: Some(Reading::good(1.0)),
            ..sample("T", 0, 1.0)
        }]);
        assert_eq!(two.len(), 1 + 3 + 16);
    }

    #[test]
    fn a_damaged_block_is_an_error_not_a_panic() {
        let block = block_of(&[sample("T", 0, 1.0)]);
        let mut s = TankSample::empty("T");
        for cut in 0..block.len() {
            assert!(read_slot(&block[..cut], 0, &mut s).is_err(), "{cut}");
        }
        assert!(read_slot(&block, 1, &mut s).is_err());
        let mut bad = block.clone();
        bad[0] = 9;
        assert!(read_slot(&bad, 0, &mut s).is_err());
        let mut bad = block;
        bad[2] = 0x0f;
        assert!(read_slot(&bad, 0, &mut s).is_err());
    }

    #[test]
    fn a_tank_reads_back_through_every_set_it_was_in() {
        let conn = Connection::open_in_memory().unwrap();
        let mut conn = conn;
        super::super::schema::migrate(&mut conn).unwrap();
        // A: with B for two cycles, then alone (moved to another device).
        let first = vec![sample("A", 1000, 1.0), sample("B", 1000, 2.0)];
        let second = vec![sample("A", 2000, 1.5), sample("B", 2000, 2.5)];
        let alone = vec![sample("A", 3000, 1.25)];
        for batch in [&first, &second, &alone] {
            assert_eq!(insert_samples(&conn, batch).unwrap(), batch.len());
        }
        assert_eq!(insert_samples(&conn, &first).unwrap(), 0, "stored twice");
        let a = samples_between(&conn, "A", 0, 10_000).unwrap();
        let levels: Vec<(i64, f64)> = a
            .iter()
            .map(|s| (s.at_ms, s.level.value.unwrap()))
            .collect();
        assert_eq!(levels, [(1000, 1.0), (2000, 1.5), (3000, 1.25)]);
        assert!(a.iter().all(|s| &*s.tank_id == "A"));
        let b = samples_between(&conn, "B", 1500, 10_000).unwrap();
        assert_eq!(b.len(), 1);
        assert_eq!(b[0].level.value, Some(2.5));
        assert_eq!(first_sample_ms(&conn, "A").unwrap(), Some(1000));
        assert_eq!(last_sample_ms(&conn, "A").unwrap(), Some(3000));
        assert_eq!(last_sample_ms(&conn, "B").unwrap(), Some(2000));
        assert_eq!(last_sample_ms(&conn, "C").unwrap(), None);
        assert_eq!(sample_count(&conn, "A").unwrap(), (3, 0));
        assert!(good_level_near(&conn, "B", 2400, 500).unwrap());
        assert!(!good_level_near(&conn, "B", 2600, 500).unwrap());
        assert_eq!(newest_sample_ms(&conn).unwrap(), Some(3000));
        assert_eq!(oldest_sample_ms(&conn).unwrap(), Some(1000));
    }
}
