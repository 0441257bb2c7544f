//! The floor of the side-by-side benchmark (BENCHMARKS.md, "Per-sample
//! cost"): what one second of a site costs with nothing of the agent in the
//! way. For every device of a site config, one task reads the same register
//! blocks the agent reads (its read plan, worked out once at start) with
//! raw tokio-modbus calls, every poll interval; the main task packs each
//! device's cycle into a row of the same size and layout the agent stores
//! (a sample set's block: three bytes and the good values of each tank) and
//! inserts a tick's rows in one transaction, in WAL mode with
//! `synchronous = FULL`, as the agent commits. No decoding beyond the
//! register words, no quality flags, no estimator, no heartbeat, no trims,
//! no web page.
//!
//!     cargo run --release -p leaktally --example floor -- SITE.toml DB
//!
//! DB must have been made by the agent (its schema and its sample sets);
//! tools/compare_run.sh does that, pre-ages it, and runs this beside the
//! agent and a plain Python poller. Stops on SIGTERM or Ctrl-C.

use leaktally::acquire::plan::plan_reads;
use leaktally::registers::{BitKind, RegisterKind, Table};
use rusqlite::{Connection, params};
use std::time::Duration;
use tokio::sync::mpsc;
use tokio_modbus::prelude::*;

/// One device's cycle: its time and the words of each of its reads.
struct Cycle {
    device: usize,
    at_ms: i64,
    words: Vec<Vec<u16>>,
}

#[tokio::main(flavor = "current_thread")]
async fn main() -> Result<(), Box<dyn std::error::Error>> {
    let args: Vec<String> = std::env::args().collect();
    let [_, site, db] = &args[..] else {
        return Err("usage: floor SITE.toml DB".into());
    };
    let config = leaktally::config::load(std::path::Path::new(site))?;
    let conn = Connection::open(db)?;
    conn.pragma_update(None, "journal_mode", "WAL")?;
    conn.pragma_update(None, "synchronous", "FULL")?;
    // Each device's sample set, as the agent made it.
    let mut sets = Vec::new();
    let mut slots = Vec::new();
    for device in 0..config.devices.len() {
        let tags: Vec<&str> = config
            .tanks
            .iter()
            .filter(|t| t.device == device)
            .map(|t| t.id.as_str())
            .collect();
        sets.push(leaktally::store::sample_set(&conn, &tags)?);
        slots.push(tags.len());
    }
    let (tx, mut rx) = mpsc::channel::<Cycle>(1024);
    for (device, d) in config.devices.iter().enumerate() {
        let reads = plan_reads(&config, device, false);
        let address = d.address.clone();
        let unit = d.unit_id;
        let interval = d.poll_interval;
        let tx = tx.clone();
        tokio::spawn(async move {
            let Ok(addr) = tokio::net::lookup_host(&address)
                .await
                .map(|mut a| a.next())
            else {
                return;
            };
            let Some(addr) = addr else { return };
            let Ok(mut ctx) = tcp::connect_slave(addr, Slave(unit)).await else {
                eprintln!("floor: cannot connect to {address}");
                return;
            };
            let mut tick = tokio::time::interval(interval);
            loop {
                tick.tick().await;
                let at_ms = jiff::Timestamp::now().as_millisecond();
                let mut words = Vec::with_capacity(reads.len());
                for r in &reads {
                    let got = match r.table {
                        Table::Registers(RegisterKind::Holding) => {
                            ctx.read_holding_registers(r.start, r.count).await
                        }
                        Table::Registers(RegisterKind::Input) => {
                            ctx.read_input_registers(r.start, r.count).await
                        }
                        Table::Bits(BitKind::Coil) => ctx
                            .read_coils(r.start, r.count)
                            .await
                            .map(|b| b.map(|b| b.into_iter().map(u16::from).collect())),
                        Table::Bits(BitKind::DiscreteInput) => ctx
                            .read_discrete_inputs(r.start, r.count)
                            .await
                            .map(|b| b.map(|b| b.into_iter().map(u16::from).collect())),
                    };
                    match got {
                        Ok(Ok(w)) => words.push(w),
                        _ => words.push(Vec::new()),
                    }
                }
                if tx
                    .send(Cycle {
                        device,
                        at_ms,
                        words,
                    })
                    .await
                    .is_err()
                {
                    return;
                }
            }
        });
    }
    drop(tx);
    let mut stop = Box::pin(leaktally::shutdown::signalled());
    let mut stored: u64 = 0;
    loop {
        let first = tokio::select! {
            c = rx.recv() => match c { Some(c) => c, None => break },
            _ = &mut stop => break,
        };
        // A tick's cycles in one transaction, as the agent gathers them.
        tokio::time::sleep(Duration::from_millis(100)).await;
        let mut cycles = vec![first];
        while let Ok(c) = rx.try_recv() {
            cycles.push(c);
        }
        let txn = conn.unchecked_transaction()?;
        {
            let mut insert = txn.prepare_cached(
                "INSERT OR IGNORE INTO sample_blocks (sample_set, at_ms, data) VALUES (?1, ?2, ?3)",
            )?;
            for c in &cycles {
                // The agent's row: a format byte, then per tank its three
                // bytes and two values (a level and a pressure here), taken
                // from the words as they came.
                let n = slots[c.device];
                let mut data = Vec::with_capacity(1 + n * 19);
                data.push(1);
                let flat: Vec<u16> = c.words.iter().flatten().copied().collect();
                for i in 0..n {
                    data.extend_from_slice(&[0, 0x11, 0]);
                    let w = |k: usize| f64::from(flat.get(k).copied().unwrap_or(0));
                    data.extend_from_slice(&w(i).to_le_bytes());
                    data.extend_from_slice(&w(n + 2 * i).to_le_bytes());
                }
                insert.execute(params![sets[c.device], c.at_ms, data])?;
                stored += n as u64;
            }
        }
        txn.commit()?;
    }
    eprintln!("floor: stopped, {stored} samples stored");
    Ok(())
}
