//! Estimates: a small row of figures per sample, the whole estimate of the
//! latest sample, and the first crossings of reportable quantities.
//!
//! Every figure a chart, a series or a replay's comparison needs is kept
//! per sample in `estimate_rows`, about 100 bytes each: the totals and
//! rates with their bands, the inventory balance, the model's own total,
//! and the method, reason, phase, gap mark and warnings packed into one
//! integer ([`codes`]). The whole [`Estimate`] of an event's latest sample
//! (band causes, fit, forecast, crossings, data quality) is one row in
//! `latest_estimates`, replaced as the event goes on; any earlier one can
//! be recomputed from the stored samples, which an event's window keeps at
//! full rate.

use super::{StoreError, StoreResult, unit};
use crate::estimate::{ESTIMATOR_VERSION, Estimate, Figures, Method, PhaseName, Reason, Warnings};
use rusqlite::{Connection, OptionalExtension, params};

/// The method, reason, phase, gap mark and warnings in one integer: bits
/// 0-1 the method, 2-4 the reason, 5-6 the phase, 7 the gap mark, 16-47
/// the warnings. The codes are fixed here, never an enum's order.
pub mod codes {
    use super::*;

    fn method(m: Method) -> i64 {
        match m {
            Method::OrificeGivenHole => 0,
            Method::FittedHole => 1,
            Method::InventoryBalance => 2,
            Method::NoData => 3,
        }
    }

    fn reason(r: Reason) -> i64 {
        match r {
            Reason::Unrecorded => 0,
            Reason::GivenHole => 1,
            Reason::LevelBoundsGivenHole => 2,
            Reason::FittedHole => 3,
            Reason::LevelBoundsFittedHole => 4,
            Reason::NotEnoughDrop => 5,
            Reason::NoLossSeen => 6,
            Reason::Vapour => 7,
        }
    }

    fn phase(p: PhaseName) -> i64 {
        match p {
            PhaseName::None => 0,
            PhaseName::Liquid => 1,
            PhaseName::Vapour => 2,
        }
    }

    /// Packs a figure's codes.
    pub fn pack(f: &Figures) -> i64 {
        method(f.method)
            | reason(f.reason) << 2
            | phase(f.phase) << 5
            | i64::from(f.after_gap) << 7
            | i64::from(f.warnings.bits()) << 16
    }

    /// Unpacks them into `f`.
    pub fn unpack(code: i64, f: &mut Figures) -> StoreResult<()> {
        f.method = match code & 0b11 {
            0 => Method::OrificeGivenHole,
            1 => Method::FittedHole,
            2 => Method::InventoryBalance,
            _ => Method::NoData,
        };
        f.reason = match code >> 2 & 0b111 {
            0 => Reason::Unrecorded,
            1 => Reason::GivenHole,
            2 => Reason::LevelBoundsGivenHole,
            3 => Reason::FittedHole,
            4 => Reason::LevelBoundsFittedHole,
            5 => Reason::NotEnoughDrop,
            6 => Reason::NoLossSeen,
            _ => Reason::Vapour,
        };
        f.phase = match code >> 5 & 0b11 {
            0 => PhaseName::None,
            1 => PhaseName::Liquid,
            2 => PhaseName::Vapour,
            p => {
                return Err(StoreError::Corrupt(format!(
                    "estimate codes {code}: phase {p}"
                )));
            }
        };
        f.after_gap = code >> 7 & 1 == 1;
        f.warnings = Warnings::from_bits((code >> 16) as u32);
        Ok(())
    }
}

/// Stores the figures of one event revision (again: a replay writes the
/// same rows).
pub fn insert_figures(
    conn: &Connection,
    event: i64,
    revision: i64,
    figures: &[Figures],
) -> StoreResult<()> {
    let mut stmt = conn.prepare_cached(
        "INSERT OR REPLACE INTO estimate_rows (event, revision, at_ms, best_kg, low_kg, high_kg, rate_kg_s, rate_low_kg_s, rate_high_kg_s, inventory_kg, model_kg, codes)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12)",
    )?;
    for f in figures {
        stmt.execute(params![
            event,
            revision,
            f.at_ms,
            f.released_best_kg,
            f.released_low_kg,
            f.released_high_kg,
            f.rate_best_kg_s,
            f.rate_low_kg_s,
            f.rate_high_kg_s,
            f.inventory_kg,
            f.model_kg,
            codes::pack(f)
        ])?;
    }
    Ok(())
}

/// Keeps `estimate` as the latest of an event revision, and its first
/// crossings.
pub fn put_latest(
    conn: &Connection,
    event: i64,
    revision: i64,
    estimate: &Estimate,
) -> StoreResult<()> {
    let doc = serde_json::to_string(estimate).map_err(|e| StoreError::Corrupt(e.to_string()))?;
    conn.prepare_cached(
        "INSERT OR REPLACE INTO latest_estimates (event, revision, at_ms, estimator_version, doc) VALUES (?1, ?2, ?3, ?4, ?5)",
    )?
    .execute(params![event, revision, estimate.at_ms, ESTIMATOR_VERSION, doc])?;
    let mut crossing = conn.prepare_cached(
        "INSERT OR IGNORE INTO crossings (event, revision, quantity_kg, at_ms) VALUES (?1, ?2, ?3, ?4)",
    )?;
    for c in &estimate.crossings {
        if let Some(at) = c.at_ms {
            crossing.execute(params![event, revision, c.quantity_kg, at])?;
        }
    }
    Ok(())
}

/// Stores the estimates of one event revision: each one's figures, and
/// the last as the latest (a rebuilt or replayed event).
pub fn insert_estimates(
    conn: &Connection,
    event: i64,
    revision: i64,
    estimates: &[Estimate],
) -> StoreResult<()> {
    let figures: Vec<Figures> = estimates.iter().map(Estimate::figures).collect();
    insert_figures(conn, event, revision, &figures)?;
    if let Some(last) = estimates.last() {
        put_latest(conn, event, revision, last)?;
    }
    Ok(())
}

/// Drops an event's estimates and crossings after `at_ms` (a close at the
/// time of the request, which the daemon took late), in every revision.
pub fn drop_estimates_after(conn: &Connection, event: i64, at_ms: i64) -> StoreResult<()> {
    unit::execute(
        conn,
        "DELETE FROM estimate_rows WHERE event = ?1 AND at_ms > ?2",
        params![event, at_ms],
    )?;
    unit::execute(
        conn,
        "DELETE FROM latest_estimates WHERE event = ?1 AND at_ms > ?2",
        params![event, at_ms],
    )?;
    unit::execute(
        conn,
        "DELETE FROM crossings WHERE event = ?1 AND at_ms > ?2",
        params![event, at_ms],
    )?;
    Ok(())
}

/// The latest whole estimate of an event's current revision, with the
/// estimator version that made it (`None` for an event stored before the
/// version was kept).
pub fn latest_estimate_with_version(
    conn: &Connection,
    event: i64,
    revision: i64,
) -> StoreResult<Option<(Estimate, Option<u32>)>> {
    let row: Option<(String, Option<u32>)> = conn
        .prepare_cached(
            "SELECT doc, estimator_version FROM latest_estimates WHERE event = ?1 AND revision = ?2",
        )?
        .query_row(params![event, revision], |r| Ok((r.get(0)?, r.get(1)?)))
        .optional()?;
    row.map(|(doc, version)| {
        serde_json::from_str(&doc)
            .map(|e| (e, version))
            .map_err(|e| StoreError::Corrupt(format!("estimate of event {event}: {e}")))
    })
    .transpose()
}

/// The latest whole estimate of an event's current revision.
pub fn latest_estimate(
    conn: &Connection,
    event: &super::EventRow,
) -> StoreResult<Option<Estimate>> {
    Ok(latest_estimate_with_version(conn, event.id, event.revision)?.map(|(e, _)| e))
}

const FIGURE_COLUMNS: &str = "at_ms, best_kg, low_kg, high_kg, rate_kg_s, rate_low_kg_s, rate_high_kg_s, inventory_kg, model_kg, codes";

fn figures_from(r: &rusqlite::Row<'_>) -> rusqlite::Result<(Figures, i64)> {
    Ok((
        Figures {
            at_ms: r.get(0)?,
            released_best_kg: r.get(1)?,
            released_low_kg: r.get(2)?,
            released_high_kg: r.get(3)?,
            rate_best_kg_s: r.get(4)?,
            rate_low_kg_s: r.get(5)?,
            rate_high_kg_s: r.get(6)?,
            inventory_kg: r.get(7)?,
            model_kg: r.get(8)?,
            method: Method::NoData,
            reason: Reason::Unrecorded,
            phase: PhaseName::None,
            after_gap: false,
            warnings: Warnings::default(),
        },
        r.get(9)?,
    ))
}

/// Every figure of one event revision, in time order.
pub fn figures_of(conn: &Connection, event: i64, revision: i64) -> StoreResult<Vec<Figures>> {
    figures_after(conn, event, revision, i64::MIN, usize::MAX)
}

/// Up to `limit` figures of one event revision after `after_ms`, in time
/// order: one page, so a replay compares a long event with its live
/// figures without holding them all.
pub fn figures_after(
    conn: &Connection,
    event: i64,
    revision: i64,
    after_ms: i64,
    limit: usize,
) -> StoreResult<Vec<Figures>> {
    let mut stmt = conn.prepare_cached(&format!(
        "SELECT {FIGURE_COLUMNS} FROM estimate_rows WHERE event = ?1 AND revision = ?2 AND at_ms > ?3 ORDER BY at_ms LIMIT ?4"
    ))?;
    let limit = i64::try_from(limit).unwrap_or(i64::MAX);
    let rows = stmt.query_map(params![event, revision, after_ms, limit], figures_from)?;
    rows.map(|row| {
        let (mut f, code) = row?;
        codes::unpack(code, &mut f)?;
        Ok(f)
    })
    .collect()
}

/// The released totals (time, best, low, high in kg) of one event
/// revision, in time order: for charts.
pub fn released_series(
    conn: &Connection,
    event: i64,
    revision: i64,
) -> StoreResult<Vec<(i64, f64, f64, f64)>> {
    let mut stmt = conn.prepare_cached(
        "SELECT at_ms, best_kg, low_kg, high_kg FROM estimate_rows WHERE event = ?1 AND revision = ?2 ORDER BY at_ms",
    )?;
    let rows = stmt.query_map(params![event, revision], |r| {
        Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
    })?;
    Ok(rows.collect::<Result<_, _>>()?)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimate::Warning;

    #[test]
    fn every_code_packs_and_unpacks() {
        let methods = [
            Method::OrificeGivenHole,
            Method::FittedHole,
            Method::InventoryBalance,
            Method::NoData,
        ];
        let reasons = [
            Reason::Unrecorded,
            Reason::GivenHole,
            Reason::LevelBoundsGivenHole,
            Reason::FittedHole,
            Reason::LevelBoundsFittedHole,
            Reason::NotEnoughDrop,
            Reason::NoLossSeen,
            Reason::Vapour,
        ];
        let phases = [PhaseName::None, PhaseName::Liquid, PhaseName::Vapour];
        let mut warnings = Warnings::default();
        for (i, w) in Warning::ALL.into_iter().enumerate() {
            if i % 2 == 0 {
                warnings.insert(w);
            }
        }
        for (i, method) in methods.into_iter().enumerate() {
            for reason in reasons {
                for phase in phases {
                    let f = Figures {
                        at_ms: 1,
                        released_best_kg: 1.0,
                        released_low_kg: 0.5,
                        released_high_kg: 2.0,
                        rate_best_kg_s: 0.1,
                        rate_low_kg_s: 0.0,
                        rate_high_kg_s: 0.2,
                        inventory_kg: None,
                        model_kg: Some(3.0),
                        method,
                        reason,
                        phase,
                        after_gap: i % 2 == 1,
                        warnings,
                    };
                    let mut back = Figures {
                        method: Method::NoData,
                        reason: Reason::Unrecorded,
                        phase: PhaseName::None,
                        after_gap: false,
                        warnings: Warnings::default(),
                        ..f
                    };
                    codes::unpack(codes::pack(&f), &mut back).unwrap();
                    assert!(back.identical(&f), "{f:?} {back:?}");
                }
            }
        }
    }
}
