//! Where a device's values sit in its Modbus tables: the register map
//! (each tank's level, pressure, transfer, temperature and leak flag, with
//! its table, first address and width), which read planning coalesces into
//! requests, and the check that no two values share a register and none
//! runs past address 65535.
//!
//! Left out: locating an overlap in the file (validation keeps where each
//! address is written), and planning the reads themselves
//! (`acquire::plan`). Named apart from `crate::registers`, the Modbus
//! vocabulary these entries are written in.

use super::types::{Config, Role, Sensor};
use crate::registers::Table;
use std::collections::BTreeMap;

/// Which register each value of a device occupies, for overlap checks and
/// read planning: (kind, first register, registers) per tank and role.
pub fn register_map(config: &Config, device: usize) -> Vec<MappedValue<'_>> {
    let mut out = Vec::new();
    for (tank_index, tank) in config
        .tanks
        .iter()
        .enumerate()
        .filter(|(_, t)| t.device == device)
    {
        let mut add = |role: Role, sensor: &Sensor| {
            out.push(MappedValue {
                tank: tank_index,
                tank_id: &tank.id,
                role,
                kind: Table::Registers(sensor.register),
                start: u32::from(sensor.address),
                count: u32::from(sensor.data_type.width()),
            })
        };
        add(Role::Level, &tank.level);
        if let Some(p) = &tank.pressure {
            add(Role::Pressure, &p.sensor);
        }
        if let Some(s) = &tank.transfer {
            add(Role::Transfer, s);
        }
        if let Some(s) = &tank.temperature {
            add(Role::Temperature, s);
        }
        if let Some(f) = &tank.leak_flag {
            out.push(MappedValue {
                tank: tank_index,
                tank_id: &tank.id,
                role: Role::LeakFlag,
                kind: Table::Bits(f.kind),
                start: u32::from(f.address),
                count: 1,
            });
        }
    }
    out
}

/// One value's place in a device's tables.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MappedValue<'a> {
    pub tank: usize,
    pub tank_id: &'a str,
    pub role: Role,
    pub kind: Table,
    pub start: u32,
    pub count: u32,
}

impl MappedValue<'_> {
    pub fn end(&self) -> u32 {
        self.start + self.count
    }
}

/// Finds values that share a register on the same device, and values whose
/// last register is past 65535: (tank index, role, message) for each.
pub fn overlaps(config: &Config) -> Vec<(usize, Role, String)> {
    let mut out = Vec::new();
    for (d, device) in config.devices.iter().enumerate() {
        let mut by_table: BTreeMap<Table, Vec<MappedValue>> = BTreeMap::new();
        for v in register_map(config, d) {
            if v.end() > 65_536 {
                out.push((
                    v.tank,
                    v.role,
                    format!(
                        "tank \"{}\" {}: {} {} runs past the last address 65535; move it lower",
                        v.tank_id,
                        v.role.name(),
                        v.kind.name(),
                        v.start
                    ),
                ));
            }
            by_table.entry(v.kind).or_default().push(v);
        }
        for (table, mut values) in by_table {
            values.sort_by_key(|v| v.start);
            for pair in values.windows(2) {
                let (a, b) = (pair[0], pair[1]);
                if b.start < a.end() {
                    out.push((b.tank, b.role, format!(
                        "on device \"{}\", tank \"{}\" {} ({} {}..{}) overlaps tank \"{}\" {} ({} {}..{}); give each value its own registers",
                        device.id,
                        a.tank_id,
                        a.role.name(),
                        table.name(),
                        a.start,
                        a.end() - 1,
                        b.tank_id,
                        b.role.name(),
                        table.name(),
                        b.start,
                        b.end() - 1
                    )));
                }
            }
        }
    }
    out
}
