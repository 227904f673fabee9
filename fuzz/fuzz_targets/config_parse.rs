//! Fuzz target: the config loader must never panic, and every refusal names a line or a key.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Err(e) = posteriord::config::Config::parse(text, "fuzz.toml", &[]) {
        assert!(!e.message.is_empty());
        if let Some(line) = e.line {
            assert!(line >= 1 && line <= text.lines().count().max(1) + 1, "line {line} out of range");
        }
    }
});
