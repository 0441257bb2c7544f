//! The read plan: which requests one poll cycle of a device makes.
//!
//! Each request costs a round trip, so the values of a device are coalesced
//! into as few reads as the protocol allows: at most 125 registers or 2000
//! bits per read (Modbus application protocol v1.1b3, sections 6.1 to 6.4).
//! With `bridge_gaps`, a read may also span unmapped registers between two
//! values; some devices refuse that with "illegal data address", and the
//! poller then reads the parts that [`split_read`] gives, and tries the
//! whole again now and then.

use crate::config::{Config, MappedValue, Role, register_map};
use crate::registers::Table;
use crate::registers::{BitKind, RegisterKind};

/// Registers per read, the protocol's limit for function codes 03 and 04.
pub const MAX_REGISTERS_PER_READ: u32 = 125;
/// Bits per read, the protocol's limit for function codes 01 and 02.
pub const MAX_BITS_PER_READ: u32 = 2000;

/// One request of a poll cycle.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Read {
    pub table: Table,
    pub start: u16,
    pub count: u16,
    /// The values this read answers: (tank index, role).
    pub values: Vec<(usize, Role)>,
}

impl Read {
    /// The Modbus function code of this read; the only codes the agent sends.
    pub fn function_code(&self) -> u8 {
        match self.table {
            Table::Bits(BitKind::Coil) => 0x01,
            Table::Bits(BitKind::DiscreteInput) => 0x02,
            Table::Registers(RegisterKind::Holding) => 0x03,
            Table::Registers(RegisterKind::Input) => 0x04,
        }
    }
}

/// Plans the reads for one device.
pub fn plan_reads(config: &Config, device: usize, bridge_gaps: bool) -> Vec<Read> {
    let mut values = register_map(config, device);
    values.sort_by_key(|v| (v.kind, v.start));
    let mut reads: Vec<Read> = Vec::new();
    let mut current: Option<(Read, u32)> = None; // the open read and its end
    for v in values {
        if let Some((read, end)) = current.as_mut()
            && can_extend(read, *end, &v, bridge_gaps)
        {
            *end = (*end).max(v.end());
            read.count = (*end - u32::from(read.start)) as u16;
            read.values.push((v.tank, v.role));
            continue;
        }
        if let Some((read, _)) = current.take() {
            reads.push(read);
        }
        current = Some((
            Read {
                table: v.kind,
                start: v.start as u16,
                count: v.count as u16,
                values: vec![(v.tank, v.role)],
            },
            v.end(),
        ));
    }
    reads.extend(current.map(|(read, _)| read));
    reads
}

/// The parts of a read, for when a device refuses the whole with "illegal
/// data address": its contiguous runs if it bridged a gap (the gap is the
/// likely culprit), otherwise its values one by one (one value's address is
/// the culprit, and reading each alone finds which). A read of one value
/// has no parts.
pub fn split_read(config: &Config, read: &Read) -> Vec<Read> {
    let Some(&(first, _)) = read.values.first() else {
        return Vec::new();
    };
    let device = config.tanks[first].device;
    let mut values: Vec<MappedValue> = register_map(config, device)
        .into_iter()
        .filter(|v| v.kind == read.table && read.values.contains(&(v.tank, v.role)))
        .collect();
    if values.len() < 2 {
        return Vec::new();
    }
    values.sort_by_key(|v| v.start);
    let bridged = values.windows(2).any(|w| w[1].start > w[0].end());
    let mut parts: Vec<Read> = Vec::new();
    for v in values {
        match parts.last_mut() {
            Some(last) if bridged && u32::from(last.start) + u32::from(last.count) == v.start => {
                last.count += v.count as u16;
                last.values.push((v.tank, v.role));
            }
            _ => parts.push(Read {
                table: v.kind,
                start: v.start as u16,
                count: v.count as u16,
                values: vec![(v.tank, v.role)],
            }),
        }
    }
    parts
}

fn can_extend(read: &Read, end: u32, v: &MappedValue, bridge_gaps: bool) -> bool {
    let limit = match read.table {
        Table::Registers(_) => MAX_REGISTERS_PER_READ,
        Table::Bits(_) => MAX_BITS_PER_READ,
    };
    read.table == v.kind
        && (bridge_gaps || v.start <= end)
        && v.end().max(end) - u32::from(read.start) <= limit
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::parse;
    use std::path::Path;

    fn config_with_levels(addresses: &[u16], bridge: bool) -> Config {
        let mut text = format!(
            "[site]\nname = \"t\"\n[[device]]\nid = \"d\"\naddress = \"127.0.0.1:1502\"\nbridge_gaps = {bridge}\n"
        );
        for (i, a) in addresses.iter().enumerate() {
            text += &format!(
                "[[tank]]\nid = \"T{i}\"\ndevice = \"d\"\ngeometry = {{ shape = \"sphere\", diameter_m = 3.0 }}\n\
                 substance = {{ name = \"w\", density_kg_m3 = 1000.0 }}\n\
                 level = {{ register = \"holding\", address = {a}, type = \"f32\", range = [0.0, 3.0], unit = \"m\" }}\n"
            );
        }
        parse(&text, Path::new("t.toml")).unwrap()
    }

    #[test]
    fn neighbours_share_a_read_and_the_limit_splits_them() {
        // 2-register values at 0, 2, 10 and 124: bridged, 0..12 is one read;
        // 124..126 would make it 126 long, over the limit.
        let c = config_with_levels(&[0, 2, 10, 124], true);
        let reads = plan_reads(&c, 0, true);
        let spans: Vec<(u16, u16)> = reads.iter().map(|r| (r.start, r.count)).collect();
        assert_eq!(spans, [(0, 12), (124, 2)]);
        assert_eq!(reads[0].values.len(), 3);
        assert_eq!(reads[0].function_code(), 3);
    }

    #[test]
    fn without_bridging_only_contiguous_values_merge() {
        let c = config_with_levels(&[0, 2, 10], false);
        let spans: Vec<(u16, u16)> = plan_reads(&c, 0, false)
            .iter()
            .map(|r| (r.start, r.count))
            .collect();
        assert_eq!(spans, [(0, 4), (10, 2)]);
    }

    #[test]
    fn a_refused_read_splits_into_runs_then_into_values() {
        // f32 values at 0, 2 and 10: bridged, one read 0..12; its parts are
        // the runs 0..4 and 10..12; the run 0..4 splits into its values.
        let c = config_with_levels(&[0, 2, 10], true);
        let whole = &plan_reads(&c, 0, true)[0];
        assert_eq!((whole.start, whole.count), (0, 12));
        let runs = split_read(&c, whole);
        let spans: Vec<(u16, u16)> = runs.iter().map(|r| (r.start, r.count)).collect();
        assert_eq!(spans, [(0, 4), (10, 2)]);
        assert_eq!(runs[0].values.len(), 2);
        let values: Vec<(u16, u16)> = split_read(&c, &runs[0])
            .iter()
            .map(|r| (r.start, r.count))
            .collect();
        assert_eq!(values, [(0, 2), (2, 2)]);
        assert!(split_read(&c, &runs[1]).is_empty());
    }

    #[test]
    fn the_demo_device_needs_few_reads() {
        let c =
            crate::config::load(&Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml"))
                .unwrap();
        let east = plan_reads(&c, 0, true);
        // Input registers 0..2, holding 10..15 (FF-T14's level, pressure and
        // temperature), coil 0: three reads for six values.
        let mut summary: Vec<(u8, u16, u16)> = east
            .iter()
            .map(|r| (r.function_code(), r.start, r.count))
            .collect();
        summary.sort();
        assert_eq!(summary, [(1, 0, 1), (3, 10, 5), (4, 0, 2)]);
    }
}
