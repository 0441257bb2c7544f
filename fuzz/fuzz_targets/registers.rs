//! Fuzzes register decoding and flagging: any words, any type and word
//! order, any scaling must give a reading with a finite value or a flag.
#![no_main]

use leaktally::registers::{DataType, RegisterKind, WordOrder};
use leaktally::acquire::poller::flag;
use leaktally::config::Sensor;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if data.len() < 20 {
        return;
    }
    let types = [
        DataType::U16,
        DataType::I16,
        DataType::U32,
        DataType::I32,
        DataType::F32,
    ];
    let data_type = types[usize::from(data[0]) % types.len()];
    let word_order = if data[1] & 1 == 0 {
        WordOrder::HighFirst
    } else {
        WordOrder::LowFirst
    };
    let f = |i: usize| f64::from(i16::from_le_bytes([data[i], data[i + 1]]));
    let (r0, r1, e0, e1) = (f(2), f(4), f(6), f(8));
    if r0 == r1 || e1 <= e0 {
        return;
    }
    let sensor = Sensor {
        register: RegisterKind::Holding,
        address: 0,
        data_type,
        word_order,
        raw_span: (r0, r1),
        engineering_span: (e0, e1),
        unit: "m".into(),
        si_per_unit: 1.0,
        si_offset: 0.0,
        valid_si: (e0, e1),
        stuck_after: None,
        accuracy: leaktally::config::Uncertainty {
            bound: 0.003,
            relative: false,
            stated: false,
        },
    };
    let words: Vec<u16> = data[10..]
        .chunks(2)
        .map(|c| u16::from_le_bytes([c[0], *c.get(1).unwrap_or(&0)]))
        .collect();
    let width = usize::from(data_type.width()).min(words.len());
    let reading = flag(&sensor, &words[..width], data[1] & 2 != 0);
    match reading.value {
        Some(v) => assert!(v.is_finite() && v >= e0 && v <= e1 && reading.is_good()),
        None => assert!(!reading.is_good()),
    }
    // Encoding any finite raw value and decoding it gives it back within
    // the type's rounding.
    let raw = f(2) * 3.7;
    let back = data_type
        .decode(&data_type.encode(raw, word_order), word_order)
        .unwrap();
    assert!(back.is_finite());
});
