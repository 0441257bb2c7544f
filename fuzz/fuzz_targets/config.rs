//! Fuzzes config parsing and validation: any text must give a config or
//! located problems, never a panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        if let Err(leaktally::config::ConfigError::Invalid { problems }) =
            leaktally::config::parse(text, Path::new("fuzz.toml"))
        {
            // Every problem is located inside the text.
            for p in problems {
                assert!(p.line >= 1 && p.column >= 1);
            }
        }
    }
});
