//! Python's `str()`, `repr()` and `json.dumps` for template values.
//!
//! Chat templates are written for Jinja2, where `{{ x }}` prints `str(x)`: `None`, `True`,
//! `['a', 1]`, `{'k': 'v'}`, `1.0`, `1e+20`. minijinja prints `none`, `true`, `["a", 1]`. And
//! transformers replaces the `tojson` filter with `json.dumps(x, ensure_ascii=False)` (separators
//! `", "` / `": "`, no HTML escaping). These functions reproduce the CPython formats
//! (`Objects/floatobject.c` repr, `Lib/json/encoder.py`) so rendered prompts match byte for byte.

use minijinja::value::{Value, ValueKind};
use std::fmt::Write;

/// `str(value)` as Python prints it (strings are printed raw, containers as their repr).
pub fn py_str(value: &Value) -> String {
    match value.kind() {
        ValueKind::String => value.as_str().unwrap_or_default().to_string(),
        ValueKind::Undefined => String::new(),
        _ => py_repr(value),
    }
}

/// Deepest nesting of lists and maps that `repr` and `json.dumps` walk. A template can store a
/// namespace inside itself (`{% set ns.x = ns %}`); walking that without a limit never ends.
/// CPython gives up on far shallower structures than any stack here (its recursion limit is
/// 1000 frames), and chat-template data nests a handful of levels.
pub const MAX_NESTING: usize = 200;

/// Longest text `repr` and `json.dumps` produce for one value. A prompt is far smaller; the cap
/// keeps a value that nests itself many times over from filling memory.
pub const MAX_TEXT_BYTES: usize = 16 << 20;

/// `repr(value)`: the form Python uses inside lists and dicts. Nesting past [`MAX_NESTING`]
/// prints as `[...]` / `{...}` (Python's marker for a container inside itself), and the text
/// stops with `...` past [`MAX_TEXT_BYTES`].
pub fn py_repr(value: &Value) -> String {
    let mut out = String::new();
    write_repr(&mut out, value, 0);
    out
}

/// Whether `out` is past the size cap; marks the cut with `...` the first time.
fn repr_full(out: &mut String) -> bool {
    if out.len() < MAX_TEXT_BYTES {
        return false;
    }
    if !out.ends_with("...") {
        out.push_str("...");
    }
    true
}

fn write_repr(out: &mut String, value: &Value, depth: usize) {
    if repr_full(out) {
        return;
    }
    let nested = matches!(
        value.kind(),
        ValueKind::Seq | ValueKind::Iterable | ValueKind::Map
    );
    if nested && depth >= MAX_NESTING {
        out.push_str(if value.kind() == ValueKind::Map {
            "{...}"
        } else {
            "[...]"
        });
        return;
    }
    match value.kind() {
        ValueKind::Undefined => {}
        ValueKind::None => out.push_str("None"),
        ValueKind::Bool => out.push_str(if value.is_true() { "True" } else { "False" }),
        ValueKind::Number => out.push_str(&py_number(value)),
        ValueKind::String => write_str_repr(out, value.as_str().unwrap_or_default()),
        ValueKind::Seq | ValueKind::Iterable => {
            out.push('[');
            if let Ok(iter) = value.try_iter() {
                for (i, item) in iter.enumerate() {
                    if repr_full(out) {
                        return;
                    }
                    if i > 0 {
                        out.push_str(", ");
                    }
                    write_repr(out, &item, depth + 1);
                }
            }
            out.push(']');
        }
        ValueKind::Map => {
            out.push('{');
            if let Ok(iter) = value.try_iter() {
                for (i, key) in iter.enumerate() {
                    if repr_full(out) {
                        return;
                    }
                    if i > 0 {
                        out.push_str(", ");
                    }
                    write_repr(out, &key, depth + 1);
                    out.push_str(": ");
                    let item = value.get_item(&key).unwrap_or_default();
                    write_repr(out, &item, depth + 1);
                }
            }
            out.push('}');
        }
        _ => {
            let _ = write!(out, "{value}");
        }
    }
}

/// Python's string repr: single quotes unless the text holds a `'` and no `"`.
fn write_str_repr(out: &mut String, s: &str) {
    let quote = if s.contains('\'') && !s.contains('"') {
        '"'
    } else {
        '\''
    };
    out.push(quote);
    for c in s.chars() {
        match c {
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            c if c == quote => {
                out.push('\\');
                out.push(c);
            }
            c if (c as u32) < 0x20 || c as u32 == 0x7f => {
                let _ = write!(out, "\\x{:02x}", c as u32);
            }
            c => out.push(c),
        }
    }
    out.push(quote);
}

/// A number as Python's `repr` writes it: integers plainly, floats in the shortest round-trip form
/// with `.0` for integral values and an exponent outside 1e-4 <= |x| < 1e16.
fn py_number(value: &Value) -> String {
    if value.is_integer() {
        return value.to_string();
    }
    match f64::try_from(value.clone()) {
        Ok(f) => py_float_repr(f),
        Err(_) => value.to_string(),
    }
}

/// CPython `float.__repr__` (`format_float_short` with mode 'r').
pub fn py_float_repr(f: f64) -> String {
    if f.is_nan() {
        return "nan".into();
    }
    if f.is_infinite() {
        return if f > 0.0 { "inf".into() } else { "-inf".into() };
    }
    if f == 0.0 {
        return if f.is_sign_negative() { "-0.0" } else { "0.0" }.into();
    }
    // Rust's `{:e}` gives the shortest round-trip digits: "d.ddde±x".
    let sci = format!("{:e}", f.abs());
    let (mantissa, exp) = sci.split_once('e').unwrap_or((&sci, "0"));
    let exp: i32 = exp.parse().unwrap_or(0);
    let digits: String = mantissa.chars().filter(|c| *c != '.').collect();
    let sign = if f < 0.0 { "-" } else { "" };
    // Python switches to exponent notation when decpt = exp + 1 is <= -4 or > 16.
    let decpt = exp + 1;
    if decpt <= -4 || decpt > 16 {
        let (first, rest) = digits.split_at(1);
        let mant = if rest.is_empty() {
            first.to_string()
        } else {
            format!("{first}.{rest}")
        };
        let esign = if exp < 0 { '-' } else { '+' };
        return format!("{sign}{mant}e{esign}{:02}", exp.abs());
    }
    let body = if decpt <= 0 {
        format!("0.{}{}", "0".repeat((-decpt) as usize), digits)
    } else if decpt as usize >= digits.len() {
        format!("{}{}.0", digits, "0".repeat(decpt as usize - digits.len()))
    } else {
        let (int, frac) = digits.split_at(decpt as usize);
        format!("{int}.{frac}")
    };
    format!("{sign}{body}")
}

/// Python's `str.isspace` for one character (`Py_UNICODE_ISSPACE`): Unicode White_Space plus
/// the separators U+001C..U+001F, which Rust's `char::is_whitespace` does not count.
pub fn is_py_space(c: char) -> bool {
    c.is_whitespace() || ('\u{1c}'..='\u{1f}').contains(&c)
}

/// Python's `str.strip()` with no arguments.
pub fn py_strip(s: &str) -> &str {
    s.trim_matches(is_py_space)
}

/// Python's `str.split()` with no arguments: runs of whitespace separate, edges are dropped.
pub fn py_split_whitespace(s: &str) -> Vec<&str> {
    s.split(is_py_space).filter(|p| !p.is_empty()).collect()
}

/// Options of Python's `json.dumps` that chat templates pass through `tojson`.
#[derive(Debug, Clone, Default)]
pub struct JsonOptions {
    pub ensure_ascii: bool,
    /// `None` = single line; `Some(s)` = newline plus `s` repeated per level (an int n means n spaces).
    pub indent: Option<String>,
    /// `(item_separator, key_separator)`; default `(", ", ": ")`, or `(",", ": ")` with an indent.
    pub separators: Option<(String, String)>,
    pub sort_keys: bool,
}

/// `json.dumps(value, ...)`. Fails on values JSON cannot hold (undefined, objects), as Python's
/// encoder raises `TypeError` for them.
pub fn json_dumps(value: &Value, opts: &JsonOptions) -> Result<String, String> {
    let (item_sep, key_sep) = match &opts.separators {
        Some((i, k)) => (i.clone(), k.clone()),
        None if opts.indent.is_some() => (",".to_string(), ": ".to_string()),
        None => (", ".to_string(), ": ".to_string()),
    };
    let enc = Encoder {
        opts,
        item_sep,
        key_sep,
    };
    let mut out = String::new();
    enc.write(&mut out, value, 0)?;
    Ok(out)
}

struct Encoder<'a> {
    opts: &'a JsonOptions,
    item_sep: String,
    key_sep: String,
}

impl Encoder<'_> {
    fn newline(&self, out: &mut String, level: usize) -> Result<(), String> {
        if let Some(indent) = &self.opts.indent {
            let needed = indent.len().saturating_mul(level).saturating_add(1);
            if out.len().saturating_add(needed) > MAX_TEXT_BYTES {
                return Err(too_long());
            }
            out.push('\n');
            for _ in 0..level {
                out.push_str(indent);
            }
        }
        Ok(())
    }

    fn write(&self, out: &mut String, value: &Value, level: usize) -> Result<(), String> {
        if out.len() > MAX_TEXT_BYTES {
            return Err(too_long());
        }
        if level >= MAX_NESTING
            && matches!(
                value.kind(),
                ValueKind::Seq | ValueKind::Iterable | ValueKind::Map
            )
        {
            // CPython raises "Circular reference detected" for a container inside itself and
            // RecursionError for very deep nesting.
            return Err(format!(
                "the value nests deeper than {MAX_NESTING} levels (does it contain itself?)"
            ));
        }
        match value.kind() {
            ValueKind::None => out.push_str("null"),
            ValueKind::Bool => out.push_str(if value.is_true() { "true" } else { "false" }),
            ValueKind::Number => {
                if value.is_integer() {
                    out.push_str(&value.to_string());
                } else {
                    let f = f64::try_from(value.clone()).map_err(|e| e.to_string())?;
                    out.push_str(&json_float(f));
                }
            }
            ValueKind::String => write_json_str(
                out,
                value.as_str().unwrap_or_default(),
                self.opts.ensure_ascii,
            ),
            ValueKind::Seq | ValueKind::Iterable => {
                let items: Vec<Value> = value.try_iter().map_err(|e| e.to_string())?.collect();
                if items.is_empty() {
                    out.push_str("[]");
                    return Ok(());
                }
                out.push('[');
                for (i, item) in items.iter().enumerate() {
                    if i > 0 {
                        out.push_str(&self.item_sep);
                    }
                    self.newline(out, level + 1)?;
                    self.write(out, item, level + 1)?;
                }
                self.newline(out, level)?;
                out.push(']');
            }
            ValueKind::Map => {
                let mut keys: Vec<Value> = value.try_iter().map_err(|e| e.to_string())?.collect();
                if keys.is_empty() {
                    out.push_str("{}");
                    return Ok(());
                }
                if self.opts.sort_keys {
                    keys.sort_by_key(json_key);
                }
                out.push('{');
                for (i, key) in keys.iter().enumerate() {
                    if i > 0 {
                        out.push_str(&self.item_sep);
                    }
                    self.newline(out, level + 1)?;
                    write_json_str(out, &json_key(key), self.opts.ensure_ascii);
                    out.push_str(&self.key_sep);
                    let item = value.get_item(key).map_err(|e| e.to_string())?;
                    self.write(out, &item, level + 1)?;
                }
                self.newline(out, level)?;
                out.push('}');
            }
            ValueKind::Undefined => {
                return Err("Object of type Undefined is not JSON serializable".into())
            }
            other => return Err(format!("a value of kind {other} is not JSON serializable")),
        }
        if out.len() > MAX_TEXT_BYTES {
            return Err(too_long());
        }
        Ok(())
    }
}

fn too_long() -> String {
    format!("the JSON text would be longer than {MAX_TEXT_BYTES} bytes")
}

/// Python converts dict keys to strings: str as is, True -> "true", None -> "null", numbers
/// by their repr.
fn json_key(key: &Value) -> String {
    match key.kind() {
        ValueKind::String => key.as_str().unwrap_or_default().to_string(),
        ValueKind::Bool => if key.is_true() { "true" } else { "false" }.to_string(),
        ValueKind::None => "null".to_string(),
        _ => py_number(key),
    }
}

/// `json.dumps` float format: `float.__repr__`, with `NaN`/`Infinity` spelled as JavaScript does.
fn json_float(f: f64) -> String {
    if f.is_nan() {
        "NaN".into()
    } else if f.is_infinite() {
        if f > 0.0 { "Infinity" } else { "-Infinity" }.into()
    } else {
        py_float_repr(f)
    }
}

/// A JSON string literal as `json.encoder` writes it (`py_encode_basestring(_ascii)`).
fn write_json_str(out: &mut String, s: &str, ensure_ascii: bool) {
    out.push('"');
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            '\u{8}' => out.push_str("\\b"),
            '\u{c}' => out.push_str("\\f"),
            c if (c as u32) < 0x20 => {
                let _ = write!(out, "\\u{:04x}", c as u32);
            }
            c if ensure_ascii && (c as u32) > 0x7e => {
                let mut buf = [0u16; 2];
                for unit in c.encode_utf16(&mut buf) {
                    let _ = write!(out, "\\u{unit:04x}");
                }
            }
            c => out.push(c),
        }
    }
    out.push('"');
}

#[cfg(test)]
mod tests {
    use super::*;

    // Expected strings are CPython 3.11 `repr(float)` outputs (from memory of the documented
    // 'r' format: exponent when decpt <= -4 or > 16).
    #[test]
    fn float_repr_matches_python() {
        assert_eq!(py_float_repr(1.0), "1.0");
        assert_eq!(py_float_repr(0.1), "0.1");
        assert_eq!(py_float_repr(-2.5), "-2.5");
        assert_eq!(py_float_repr(1e16), "1e+16");
        assert_eq!(py_float_repr(1.5e16), "1.5e+16");
        assert_eq!(py_float_repr(1234567890123456.0), "1234567890123456.0");
        assert_eq!(py_float_repr(0.0001), "0.0001");
        assert_eq!(py_float_repr(0.00001), "1e-05");
        assert_eq!(py_float_repr(123.456), "123.456");
        assert_eq!(py_float_repr(1e300), "1e+300");
    }

    #[test]
    fn json_dumps_uses_python_separators_and_raw_unicode() {
        let v = Value::from(minijinja::value::Serde(
            serde_json::json!({"a": "é<>", "b": [1, 2.0, null, true]}),
        ));
        let got = json_dumps(&v, &JsonOptions::default()).unwrap();
        // docs/model-formats.md §4 example (transformers' tojson = json.dumps(ensure_ascii=False)).
        assert_eq!(got, r#"{"a": "é<>", "b": [1, 2.0, null, true]}"#);
        let ascii = JsonOptions {
            ensure_ascii: true,
            ..Default::default()
        };
        assert_eq!(
            json_dumps(&Value::from("é😀"), &ascii).unwrap(),
            r#""\u00e9\ud83d\ude00""#
        );
    }

    // Python 3.11: "\x1c a \x1f".strip() == "a"; " a  b ".split() == ["a", "b"].
    #[test]
    fn python_whitespace_includes_separators() {
        assert_eq!(py_strip("\u{1c} a\u{a0}\u{1f}\n"), "a");
        assert_eq!("\u{1c}a".trim(), "\u{1c}a", "Rust's trim keeps U+001C");
        assert_eq!(py_split_whitespace(" a \u{1d} b\t"), vec!["a", "b"]);
    }

    #[test]
    fn json_dumps_indent_uses_comma_item_separator() {
        let v = Value::from(minijinja::value::Serde(
            serde_json::json!({"a": [1, {}], "b": []}),
        ));
        let opts = JsonOptions {
            indent: Some("  ".into()),
            ..Default::default()
        };
        assert_eq!(
            json_dumps(&v, &opts).unwrap(),
            "{\n  \"a\": [\n    1,\n    {}\n  ],\n  \"b\": []\n}"
        );
    }

    #[test]
    fn repr_of_containers_is_pythonic() {
        let v = Value::from(minijinja::value::Serde(
            serde_json::json!(["a", "it's", 1, null, false, {"k": 1.5}]),
        ));
        assert_eq!(py_str(&v), r#"['a', "it's", 1, None, False, {'k': 1.5}]"#);
    }
}
