//! The ground-truth CSV: the true level, headspace pressure, leak rate,
//! released mass and transfer of every tank, every 100 ms of simulated time,
//! and, after those, the gas released and its rate and what the hole is open
//! to (`liquid`, `gas`, or `none` without a hole).
//!
//! `rate_kg_s` and `released_kg` are the liquid's; `gas_rate_kg_s` and
//! `gas_released_kg` the gas's, which only a tank with `ullage = "gas"`
//! releases. `headspace_pa` is gauge: held, or the gas space's pressure.
//!
//! Tests read this file while the simulator runs, so it is flushed at least
//! once a second of simulated time (which, running in real time, is a
//! second of wall time) and again on exit. Numbers are written with Rust's
//! shortest round-trip formatting, so a reader gets the simulator's f64
//! exactly. The `utc` column is the wall-clock start plus the simulated
//! time, rounded to the millisecond.
//!
//! Left out: the request counts (printed on shutdown instead) and any
//! reading back; the header is the file's only schema.

use crate::plant::TruthRow;
use std::io::{self, BufWriter, Write};

/// The columns. Those a gas space added come last, so readers of the
/// earlier columns by position still work.
pub const HEADER: &str = "time_s,utc,tank,level_m,headspace_pa,rate_kg_s,released_kg,transfer_m3_s,leak_open,gas_released_kg,gas_rate_kg_s,phase";

/// Writes truth rows to any sink; a file in the binary, a buffer in tests.
pub struct TruthWriter<W: Write> {
    out: BufWriter<W>,
    tank_ids: Vec<String>,
    start_ms: i64,
    /// Simulated time of the last flush, s.
    flushed_at_s: f64,
}

impl<W: Write> TruthWriter<W> {
    /// Writes the header. `tank_ids` names the tanks by index; `start` is the
    /// wall-clock moment of simulated time zero.
    pub fn new(sink: W, tank_ids: Vec<String>, start: jiff::Timestamp) -> io::Result<Self> {
        let mut out = BufWriter::new(sink);
        writeln!(out, "{HEADER}")?;
        out.flush()?;
        Ok(Self {
            out,
            tank_ids,
            start_ms: start.as_millisecond(),
            flushed_at_s: 0.0,
        })
    }

    /// Moves simulated time zero to `start`: the run calls this when its
    /// clock starts, which is a little after the file was opened.
    pub fn set_start(&mut self, start: jiff::Timestamp) {
        self.start_ms = start.as_millisecond();
    }

    pub fn write(&mut self, row: &TruthRow) -> io::Result<()> {
        let ms = (row.time_s * 1000.0).round() as i64;
        let utc = jiff::Timestamp::from_millisecond(self.start_ms.saturating_add(ms))
            .map_err(|e| io::Error::other(format!("truth timestamp out of range: {e}")))?;
        let tank = self.tank_ids.get(row.tank).map_or("?", String::as_str);
        writeln!(
            self.out,
            "{:.3},{utc:.3},{},{},{},{},{},{},{},{},{},{}",
            row.time_s,
            quote(tank),
            row.level_m,
            row.headspace_pa,
            row.rate_kg_s,
            row.released_kg,
            row.transfer_m3_s,
            row.leak_open,
            row.gas_released_kg,
            row.gas_rate_kg_s,
            row.phase.name()
        )?;
        if row.time_s - self.flushed_at_s >= 1.0 {
            self.flush()?;
            self.flushed_at_s = row.time_s;
        }
        Ok(())
    }

    pub fn flush(&mut self) -> io::Result<()> {
        self.out.flush()
    }

    /// Flushes and gives back the sink.
    pub fn into_inner(self) -> io::Result<W> {
        self.out.into_inner().map_err(|e| e.into_error())
    }
}

/// A CSV field, quoted when it must be (tank tags rarely need it).
fn quote(field: &str) -> String {
    if field.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", field.replace('"', "\"\""))
    } else {
        field.to_owned()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::physics::Phase;

    #[test]
    fn rows_carry_exact_numbers_and_millisecond_utc() {
        let start: jiff::Timestamp = "2026-12-01T08:00:00.123456Z".parse().unwrap();
        let mut w = TruthWriter::new(
            Vec::new(),
            vec!["FF-T12".into(), "odd,\"tag\"".into()],
            start,
        )
        .unwrap();
        let row = TruthRow {
            time_s: 10.1,
            tank: 1,
            level_m: 4.1999999999999,
            headspace_pa: 0.0,
            rate_kg_s: 5.62,
            released_kg: 1.0 / 3.0,
            transfer_m3_s: -0.001,
            leak_open: true,
            gas_released_kg: 0.25,
            gas_rate_kg_s: 1e-3,
            phase: Phase::Liquid,
        };
        w.write(&row).unwrap();
        let text = String::from_utf8(w.into_inner().unwrap()).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines[0], HEADER);
        assert_eq!(
            lines[1],
            "10.100,2026-12-01T08:00:10.223Z,\"odd,\"\"tag\"\"\",4.1999999999999,0,5.62,0.3333333333333333,-0.001,true,0.25,0.001,liquid"
        );
    }
}
