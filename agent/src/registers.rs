//! Register vocabulary and decoding: how a value sits in Modbus registers.
//!
//! Modbus registers are 16-bit words, big-endian within the word. A 32-bit
//! value takes two consecutive registers, and field devices disagree on
//! which holds the high word, so the word order is configured per value.
//! The simulator uses the `encode` side, so both ends share one definition.
//!
//! Left out: byte-swapped orders (BADC, DCBA), which the devices we target
//! do not use; 64-bit values; strings.

use serde::{Deserialize, Serialize};

/// Which register table a value is read from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RegisterKind {
    /// Holding registers, read with function code 03.
    Holding,
    /// Input registers, read with function code 04.
    Input,
}

/// Which bit table a flag is read from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum BitKind {
    /// Coils, read with function code 01.
    Coil,
    /// Discrete inputs, read with function code 02.
    DiscreteInput,
}

/// How a value is encoded in its register(s).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DataType {
    U16,
    I16,
    U32,
    I32,
    F32,
}

/// Which of a 32-bit value's two registers holds the high word.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum WordOrder {
    /// First register high word (ABCD), the order the Modbus spec implies.
    #[default]
    HighFirst,
    /// First register low word (CDAB), common on PLCs.
    LowFirst,
}

/// A Modbus table: registers of a kind, or bits of a kind.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Table {
    Registers(RegisterKind),
    Bits(BitKind),
}

impl Table {
    pub fn name(self) -> &'static str {
        match self {
            Table::Registers(RegisterKind::Holding) => "holding register",
            Table::Registers(RegisterKind::Input) => "input register",
            Table::Bits(BitKind::Coil) => "coil",
            Table::Bits(BitKind::DiscreteInput) => "discrete input",
        }
    }
}

impl DataType {
    /// Registers the value occupies.
    pub fn width(self) -> u16 {
        match self {
            DataType::U16 | DataType::I16 => 1,
            DataType::U32 | DataType::I32 | DataType::F32 => 2,
        }
    }

    /// The raw value in `words` (exactly `width()` of them). An f32 may come
    /// back NaN or infinite; the caller flags that.
    pub fn decode(self, words: &[u16], order: WordOrder) -> Option<f64> {
        if words.len() != usize::from(self.width()) {
            return None;
        }
        let bits32 = || {
            let (hi, lo) = match order {
                WordOrder::HighFirst => (words[0], words[1]),
                WordOrder::LowFirst => (words[1], words[0]),
            };
            (u32::from(hi) << 16) | u32::from(lo)
        };
        Some(match self {
            DataType::U16 => f64::from(words[0]),
            DataType::I16 => f64::from(words[0] as i16),
            DataType::U32 => f64::from(bits32()),
            DataType::I32 => f64::from(bits32() as i32),
            DataType::F32 => f64::from(f32::from_bits(bits32())),
        })
    }

    /// The registers that hold `raw`, rounded to the nearest representable
    /// value and saturated at the type's limits (a real transmitter clips).
    pub fn encode(self, raw: f64, order: WordOrder) -> Vec<u16> {
        let split = |bits: u32| {
            let (hi, lo) = ((bits >> 16) as u16, bits as u16);
            match order {
                WordOrder::HighFirst => vec![hi, lo],
                WordOrder::LowFirst => vec![lo, hi],
            }
        };
        // `as` from f64 to an integer saturates and maps NaN to 0.
        match self {
            DataType::U16 => vec![raw.round() as u16],
            DataType::I16 => vec![raw.round() as i16 as u16],
            DataType::U32 => split(raw.round() as u32),
            DataType::I32 => split(raw.round() as i32 as u32),
            DataType::F32 => split((raw as f32).to_bits()),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn known_words_decode_to_known_values() {
        // (type, order, words, value); 3.75f32 is 0x4070_0000, the value the
        // pymodbus convert_from_registers(FLOAT32) check decodes.
        let cases: &[(DataType, WordOrder, &[u16], f64)] = &[
            (DataType::U16, WordOrder::HighFirst, &[65535], 65535.0),
            (DataType::I16, WordOrder::HighFirst, &[65535], -1.0),
            (DataType::U32, WordOrder::HighFirst, &[1, 2], 65538.0),
            (DataType::U32, WordOrder::LowFirst, &[2, 1], 65538.0),
            (DataType::I32, WordOrder::HighFirst, &[0xFFFF, 0xFFFE], -2.0),
            (DataType::F32, WordOrder::HighFirst, &[0x4070, 0x0000], 3.75),
            (DataType::F32, WordOrder::LowFirst, &[0x0000, 0x4070], 3.75),
        ];
        for &(t, order, words, value) in cases {
            assert_eq!(
                t.decode(words, order),
                Some(value),
                "{t:?} {order:?} {words:?}"
            );
            assert_eq!(t.encode(value, order), words, "{t:?} {order:?} {value}");
        }
    }

    #[test]
    fn wrong_word_counts_and_saturation() {
        assert_eq!(DataType::F32.decode(&[1], WordOrder::HighFirst), None);
        assert_eq!(
            DataType::U16.encode(70_000.0, WordOrder::HighFirst),
            vec![65535]
        );
        assert_eq!(DataType::U16.encode(-5.0, WordOrder::HighFirst), vec![0]);
        let nan = DataType::F32.encode(f64::NAN, WordOrder::HighFirst);
        assert!(
            DataType::F32
                .decode(&nan, WordOrder::HighFirst)
                .unwrap()
                .is_nan()
        );
    }
}
