//! Policy parsing: arbitrary bytes as a gate-policy TOML file.
#![no_main]

use libfuzzer_sys::fuzz_target;
use liftgate::policy::Policy;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    // `Policy::load` refuses non-UTF-8 files before parsing; the parser sees text.
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let path = Path::new("gate.toml");
    if let Err(e) = Policy::parse(path, text) {
        assert_eq!(e.exit_code(), 2, "{e}");
        assert!(e.to_string().starts_with("gate.toml"), "{e}");
    }
});
