//! Helpers shared by the integration tests.

use serde_json::Value;
use std::path::Path;

/// The rows of an answers file without their wall-clock `ms` field (the one field that may
/// differ between runs).
pub fn answers_without_ms(path: &Path) -> Vec<Value> {
    std::fs::read_to_string(path)
        .unwrap()
        .lines()
        .map(|l| {
            let mut v: Value = serde_json::from_str(l).unwrap();
            v.as_object_mut().unwrap().remove("ms").expect("ms field");
            v
        })
        .collect()
}
