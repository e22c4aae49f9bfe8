//! GGUF reading: arbitrary bytes as a GGUF model file, through the header, metadata and
//! tensor-directory parser, the config built from the metadata and every tensor's checks and
//! dequantisation. Any problem must be an input error (exit 2) naming the file, never a panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use liftgate::model::gguf::GgufFile;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let path = Path::new("model.gguf");
    let check = |e: liftgate::error::Error| {
        assert_eq!(e.exit_code(), 2, "{e}");
        assert!(e.to_string().starts_with("model.gguf"), "{e}");
    };
    let file = match GgufFile::from_bytes(path, data.to_vec()) {
        Ok(f) => f,
        Err(e) => return check(e),
    };
    let spec = match file.spec() {
        Ok(s) => s,
        Err(e) => return check(e),
    };
    if let Err(e) = file.weights(&spec) {
        check(e);
    }
});
