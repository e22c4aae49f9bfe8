//! Question-set parsing: arbitrary bytes as a JSONL question set.
#![no_main]

use libfuzzer_sys::fuzz_target;
use liftgate::formats::questions::QuestionSet;
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let path = Path::new("set.jsonl");
    match QuestionSet::parse(path, data) {
        Ok(set) => {
            assert!(!set.questions.is_empty());
            assert_eq!(set.fingerprint.len(), 64);
            for q in &set.questions {
                assert!(!q.id.trim().is_empty());
                assert!(q.line >= 1);
            }
        }
        Err(e) => {
            // Every rejection is a user-facing input error naming the file.
            assert_eq!(e.exit_code(), 2, "{e}");
            assert!(e.to_string().starts_with("set.jsonl"), "{e}");
        }
    }
});
