//! The config loader on arbitrary text: no panic, and every error is located (line >= 1,
//! column >= 1) with a key and a reason.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    if let Err(e) = riskbound::config::parse(text, std::path::Path::new("/nonexistent/fuzz.yaml")) {
        for i in &e.issues {
            assert!(i.line >= 1 && i.column >= 1 && !i.key.is_empty() && !i.reason.is_empty(), "{i:?}");
        }
    }
});
