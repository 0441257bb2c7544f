//! The register image: what each simulated device holds in its four Modbus
//! tables, laid out by the site config's register map.
//!
//! Every table spans the whole address space 0..=65535 and starts at zero,
//! as a PLC has memory behind addresses nobody mapped; reading them gives 0,
//! not an exception. Values go in through the agent's own
//! `Sensor::to_raw` and `DataType::encode`, so both ends share one
//! definition of scaling, rounding, saturation and word order. The read
//! limits of the Modbus specification (V1.1b3, section 6) are checked here,
//! because tokio-modbus's server does not check them and drops the
//! connection on an oversized reply.
//!
//! Left out: writes (the simulator refuses every write function code, so
//! nothing here can change from the network) and any knowledge of sockets
//! or the protocol's framing.

use leaktally::config::{Config, Sensor};
use leaktally::registers::{BitKind, DataType, RegisterKind};

/// Table size: one entry per address.
const TABLE: usize = 1 << 16;

/// Most registers one FC03/FC04 request may read.
pub const MAX_READ_REGISTERS: u16 = 125;
/// Most bits one FC01/FC02 request may read.
pub const MAX_READ_BITS: u16 = 2000;

/// Why a read was refused, in Modbus terms.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ReadError {
    /// A quantity outside the spec's limits (exception 03).
    IllegalDataValue,
    /// A range running past address 65535 (exception 02).
    IllegalDataAddress,
}

/// One device's tables.
#[derive(Debug, Clone)]
struct DeviceImage {
    holding: Vec<u16>,
    input: Vec<u16>,
    coils: Vec<bool>,
    discrete: Vec<bool>,
}

impl DeviceImage {
    fn new() -> Self {
        Self {
            holding: vec![0; TABLE],
            input: vec![0; TABLE],
            coils: vec![false; TABLE],
            discrete: vec![false; TABLE],
        }
    }

    fn registers(&self, kind: RegisterKind) -> &[u16] {
        match kind {
            RegisterKind::Holding => &self.holding,
            RegisterKind::Input => &self.input,
        }
    }

    fn registers_mut(&mut self, kind: RegisterKind) -> &mut [u16] {
        match kind {
            RegisterKind::Holding => &mut self.holding,
            RegisterKind::Input => &mut self.input,
        }
    }

    fn bits(&self, kind: BitKind) -> &[bool] {
        match kind {
            BitKind::Coil => &self.coils,
            BitKind::DiscreteInput => &self.discrete,
        }
    }

    fn bits_mut(&mut self, kind: BitKind) -> &mut [bool] {
        match kind {
            BitKind::Coil => &mut self.coils,
            BitKind::DiscreteInput => &mut self.discrete,
        }
    }
}

/// The tables of every device in the site, index-aligned with
/// `Config::devices`.
#[derive(Debug, Clone)]
pub struct RegisterImage {
    devices: Vec<DeviceImage>,
}

/// Checks a read request against the spec's limits and returns its range.
fn checked_range(address: u16, count: u16, max: u16) -> Result<std::ops::Range<usize>, ReadError> {
    if count == 0 || count > max {
        return Err(ReadError::IllegalDataValue);
    }
    let start = usize::from(address);
    let end = start + usize::from(count);
    if end > TABLE {
        return Err(ReadError::IllegalDataAddress);
    }
    Ok(start..end)
}

impl RegisterImage {
    /// Zeroed tables for each device of the site.
    pub fn new(site: &Config) -> Self {
        Self {
            devices: site.devices.iter().map(|_| DeviceImage::new()).collect(),
        }
    }

    /// Puts `words` at `address` of a device's register table. Words past
    /// the table or for an unknown device are dropped; the site config has
    /// already refused maps that run past 65535.
    pub fn set_words(&mut self, device: usize, kind: RegisterKind, address: u16, words: &[u16]) {
        if let Some(d) = self.devices.get_mut(device) {
            let table = d.registers_mut(kind);
            let start = usize::from(address);
            let end = (start + words.len()).min(table.len());
            table[start..end].copy_from_slice(&words[..end - start]);
        }
    }

    /// Sets one bit of a device's coil or discrete-input table.
    pub fn set_bit(&mut self, device: usize, kind: BitKind, address: u16, value: bool) {
        if let Some(d) = self.devices.get_mut(device) {
            d.bits_mut(kind)[usize::from(address)] = value;
        }
    }

    /// FC03/FC04: `count` registers from `address`.
    pub fn read_registers(
        &self,
        device: usize,
        kind: RegisterKind,
        address: u16,
        count: u16,
    ) -> Result<Vec<u16>, ReadError> {
        let range = checked_range(address, count, MAX_READ_REGISTERS)?;
        let d = self
            .devices
            .get(device)
            .ok_or(ReadError::IllegalDataAddress)?;
        Ok(d.registers(kind)[range].to_vec())
    }

    /// FC01/FC02: `count` bits from `address`.
    pub fn read_bits(
        &self,
        device: usize,
        kind: BitKind,
        address: u16,
        count: u16,
    ) -> Result<Vec<bool>, ReadError> {
        let range = checked_range(address, count, MAX_READ_BITS)?;
        let d = self
            .devices
            .get(device)
            .ok_or(ReadError::IllegalDataAddress)?;
        Ok(d.bits(kind)[range].to_vec())
    }
}

/// The words a sensor shows for an SI value: scaled, rounded and saturated
/// as the agent's decoder expects.
pub fn encode(sensor: &Sensor, si: f64) -> Vec<u16> {
    sensor
        .data_type
        .encode(sensor.to_raw(si), sensor.word_order)
}

/// The words of a sensor gone bad: NaN for an f32, and the type's largest
/// value for an integer, which is what many transmitters send on a fault
/// and which lies outside a sensor's scaled range unless the range uses the
/// whole type.
pub fn garbage(sensor: &Sensor) -> Vec<u16> {
    let raw = match sensor.data_type {
        DataType::F32 => f64::NAN,
        // `encode` saturates, so infinity lands on the type's maximum.
        DataType::U16 | DataType::I16 | DataType::U32 | DataType::I32 => f64::INFINITY,
    };
    sensor.data_type.encode(raw, sensor.word_order)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    fn demo_site() -> Config {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/demo.toml");
        leaktally::config::load(&path).unwrap_or_else(|e| panic!("{e}"))
    }

    #[test]
    fn reads_follow_the_spec_limits_and_unmapped_memory_is_zero() {
        let site = demo_site();
        let mut image = RegisterImage::new(&site);
        image.set_words(0, RegisterKind::Input, 0, &[17_440]);
        image.set_bit(0, BitKind::Coil, 0, true);
        assert_eq!(
            image.read_registers(0, RegisterKind::Input, 0, 2),
            Ok(vec![17_440, 0])
        );
        assert_eq!(
            image.read_registers(0, RegisterKind::Holding, 65_411, 125),
            Ok(vec![0; 125])
        );
        assert_eq!(
            image
                .read_bits(0, BitKind::Coil, 0, 2000)
                .map(|b| b[..2].to_vec()),
            Ok(vec![true, false])
        );
        let refused = [
            (
                image.read_registers(0, RegisterKind::Input, 0, 0).err(),
                ReadError::IllegalDataValue,
            ),
            (
                image.read_registers(0, RegisterKind::Input, 0, 126).err(),
                ReadError::IllegalDataValue,
            ),
            (
                image
                    .read_registers(0, RegisterKind::Input, 65_500, 100)
                    .err(),
                ReadError::IllegalDataAddress,
            ),
            (
                image.read_bits(0, BitKind::DiscreteInput, 0, 2001).err(),
                ReadError::IllegalDataValue,
            ),
            (
                image.read_bits(0, BitKind::Coil, 65_535, 2).err(),
                ReadError::IllegalDataAddress,
            ),
        ];
        for (got, want) in refused {
            assert_eq!(got, Some(want));
        }
        // A write that would run off the end is cut, never a panic.
        image.set_words(1, RegisterKind::Holding, 65_535, &[1, 2]);
        assert_eq!(
            image.read_registers(1, RegisterKind::Holding, 65_535, 1),
            Ok(vec![1])
        );
    }

    #[test]
    fn values_encode_as_the_agent_decodes_them() {
        let site = demo_site();
        let t12 = &site.tanks[0];
        // 4.2 m on a 4000..20000 count span for 0..5 m.
        assert_eq!(encode(&t12.level, 4.2), vec![17_440]);
        assert_eq!(t12.level.to_si(f64::from(encode(&t12.level, 4.2)[0])), 4.2);
        assert_eq!(garbage(&t12.level), vec![65_535]);
        let transfer = t12.transfer.as_ref().unwrap();
        assert_eq!(garbage(transfer), vec![32_767]);
        let t14 = &site.tanks[1];
        let words = garbage(&t14.level);
        let raw = t14
            .level
            .data_type
            .decode(&words, t14.level.word_order)
            .unwrap();
        assert!(raw.is_nan());
        let t20 = &site.tanks[2];
        assert_eq!(garbage(&t20.level), vec![65_535, 65_535]);
    }
}
