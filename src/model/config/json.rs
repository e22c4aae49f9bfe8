//! Typed access to the fields of a config object, with messages that name the file and the
//! field and say what was expected and what was found.

use crate::error::{Error, Result};
use crate::fsutil::json_kind;
use serde_json::{Map, Value};
use std::path::Path;

/// Typed access to a JSON object with messages naming the file and key.
pub(super) struct Cfg<'a> {
    pub path: &'a Path,
    pub obj: &'a Map<String, Value>,
}

impl Cfg<'_> {
    pub fn err(&self, key: &str, expected: &str, v: &Value) -> Error {
        Error::field(
            self.path,
            None,
            key,
            format!("expected {expected}, found {}", json_kind(v)),
        )
    }

    pub fn req_usize(&self, key: &str) -> Result<usize> {
        self.opt_usize(key)?
            .ok_or_else(|| Error::field(self.path, None, key, "required field is missing"))
    }

    pub fn opt_usize(&self, key: &str) -> Result<Option<usize>> {
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(None),
            Some(v) => v
                .as_u64()
                .map(|n| Some(n as usize))
                .ok_or_else(|| self.err(key, "a non-negative integer", v)),
        }
    }

    pub fn opt_f64(&self, key: &str) -> Result<Option<f64>> {
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(None),
            Some(v) => v
                .as_f64()
                .map(Some)
                .ok_or_else(|| self.err(key, "a number", v)),
        }
    }

    /// Absent → default; explicit null → None.
    pub fn opt_f64_default(&self, key: &str, default: f64) -> Result<Option<f64>> {
        match self.obj.get(key) {
            None => Ok(Some(default)),
            Some(Value::Null) => Ok(None),
            Some(_) => self.opt_f64(key),
        }
    }

    pub fn opt_bool(&self, key: &str) -> Result<Option<bool>> {
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(None),
            Some(Value::Bool(b)) => Ok(Some(*b)),
            Some(v) => Err(self.err(key, "true or false", v)),
        }
    }

    pub fn opt_str(&self, key: &str) -> Result<Option<&str>> {
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(None),
            Some(Value::String(s)) => Ok(Some(s.as_str())),
            Some(v) => Err(self.err(key, "a string", v)),
        }
    }

    /// An int or a list of ints (eos/pad ids); null or absent → empty.
    pub fn token_ids(&self, key: &str) -> Result<Vec<u32>> {
        let as_id = |v: &Value| {
            v.as_u64()
                .filter(|&n| n <= u32::MAX as u64)
                .map(|n| n as u32)
        };
        match self.obj.get(key) {
            None | Some(Value::Null) => Ok(Vec::new()),
            Some(Value::Array(items)) => items
                .iter()
                .map(|v| as_id(v).ok_or_else(|| self.err(key, "a token id", v)))
                .collect(),
            Some(v) => as_id(v)
                .map(|id| vec![id])
                .ok_or_else(|| self.err(key, "a token id or a list of token ids", v)),
        }
    }
}
