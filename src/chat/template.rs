//! The chat-template engine: minijinja set up to behave like transformers' Jinja2 environment.
//!
//! transformers renders with `ImmutableSandboxedEnvironment(trim_blocks=True,
//! lstrip_blocks=True, extensions=[AssistantTracker, loopcontrols])` plus the globals
//! `raise_exception`, `strftime_now`, `dict`, `namespace` and a `tojson` filter that is
//! `json.dumps` (docs/model-formats.md §4; `transformers/utils/chat_template_utils.py`). Where
//! minijinja differs from Jinja2 this module bridges the gap:
//!
//! - **Line endings**: Jinja2 normalises `\r\n` and `\r` in the whole source to `\n` before
//!   lexing; minijinja keeps them. The source is normalised here first.
//! - **`{% generation %}`**: transformers' extension tag renders its body unchanged. minijinja
//!   does not know it, so each tag is rewritten to `{% if true %}` / `{% endif %}` with its `-`
//!   and `+` whitespace markers kept, which keeps trim/lstrip behaviour identical.
//! - **Printing**: Jinja2 prints `str(x)` (`None`, `True`, `['a', 1]`, `1e+20`); minijinja prints
//!   `none`, `true`, `["a", 1]`. A formatter and a `string` filter print Python's forms
//!   ([`super::pyfmt`]). Known gap: the `~` operator still joins with minijinja's forms.
//! - **Missing Jinja2 builtins**: the `center` filter and the `cycler`/`joiner` globals are added.
//!   `pprint` prints Python's repr (Jinja2 uses `pformat`, the same for values that fit a line).
//! - **Tuples**: minijinja has none, so `(1, 'x')`, `dictsort` and `.items()` pairs print as lists
//!   (`[1, 'x']`) where Jinja2 prints `(1, 'x')`. Templates iterate such pairs rather than print
//!   them, so this is left as a documented difference.
//! - **`str % args`**: Jinja2 evaluates Python's printf operator; minijinja refuses `%` on a
//!   string with a "tried to use % operator on unsupported types" error. The `format` filter
//!   (`'%s' | format(x)`) works in both. Not bridged: minijinja's operators cannot be extended.
//! - **Python methods** (`.strip()`, `.startswith()`, `.items()`, `.get()`, ...): minijinja-contrib
//!   `pycompat` as the unknown-method callback, except that `strip`/`lstrip`/`rstrip`/`split`
//!   without arguments and the `trim` filter use Python's whitespace set, which also holds
//!   U+001C..U+001F (Rust's `trim` keeps those); `rsplit` and `swapcase` are added.
//! - **Undefined**: `UndefinedBehavior::Lenient`, which is Jinja2's default `Undefined`: printing
//!   gives "", it is falsy and iterable as empty, and attribute access on it fails.
//! - **Untrusted code**: no loader (no file or network access), a fuel budget so runaway loops
//!   fail fast, the default recursion limit so deep recursion fails with an error rather than a
//!   stack overflow. Jinja2's sandbox caps `range()` at 100 000 items; minijinja does the same.

use super::pyfmt::{
    is_py_space, json_dumps, py_repr, py_split_whitespace, py_str, py_strip, JsonOptions,
    MAX_TEXT_BYTES,
};
use super::strftime::{strftime, DateTime};
use minijinja::value::{Kwargs, Rest, Value, ValueKind};
use minijinja::{Environment, Error as JinjaError, ErrorKind, UndefinedBehavior};
use std::sync::OnceLock;

/// Instruction budget for one render. Every reference template in
/// tests/fixtures/templates/cases.json renders its longest conversation within 20 000; one
/// million leaves a 50x margin for long system texts and is used up in well under a second.
pub const FUEL: u64 = 1_000_000;

/// minijinja's validated maximum (its default); a macro call costs several levels.
pub const RECURSION_LIMIT: usize = 500;

const TEMPLATE_NAME: &str = "chat_template";

/// Marks an error raised by the template's own `raise_exception(msg)` call.
#[derive(Debug)]
pub struct RaisedByTemplate(pub String);

impl std::fmt::Display for RaisedByTemplate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for RaisedByTemplate {}

/// Why a render failed.
#[derive(Debug)]
pub enum RenderError {
    /// The template called `raise_exception(message)`.
    Raised(String),
    /// The fuel budget ran out (a runaway loop).
    OutOfFuel,
    /// Any other syntax or runtime error, with its line in the template when known.
    Other {
        message: String,
        line: Option<usize>,
    },
}

impl std::fmt::Display for RenderError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            RenderError::Raised(m) => write!(f, "the chat template raised an exception: {m}"),
            RenderError::OutOfFuel => write!(
                f,
                "the chat template ran too long (more than {FUEL} steps); it probably loops without end"
            ),
            RenderError::Other { message, line } => {
                write!(f, "chat template error")?;
                if let Some(line) = line {
                    write!(f, " at template line {line}")?;
                }
                write!(f, ": {message}")
            }
        }
    }
}

fn convert_error(err: &JinjaError) -> RenderError {
    let mut source: Option<&(dyn std::error::Error + 'static)> = std::error::Error::source(err);
    while let Some(s) = source {
        if let Some(raised) = s.downcast_ref::<RaisedByTemplate>() {
            return RenderError::Raised(raised.0.clone());
        }
        source = s.source();
    }
    if err.kind() == ErrorKind::OutOfFuel {
        return RenderError::OutOfFuel;
    }
    let message = match err.detail() {
        Some(detail) => format!("{}: {detail}", err.kind()),
        None => err.kind().to_string(),
    };
    RenderError::Other {
        message,
        line: err.line(),
    }
}

/// Rewrites Jinja2 source the way Jinja2's lexer and transformers' extension see it.
pub fn preprocess(source: &str) -> String {
    static GENERATION: OnceLock<regex::Regex> = OnceLock::new();
    let re = GENERATION.get_or_init(|| {
        regex::Regex::new(r"\{%([-+]?)\s*(end)?generation\s*([-+]?)%\}").expect("valid regex")
    });
    let normalised = source.replace("\r\n", "\n").replace('\r', "\n");
    re.replace_all(&normalised, |caps: &regex::Captures| {
        let open = &caps[1];
        let close = &caps[3];
        if caps.get(2).is_some() {
            format!("{{%{open} endif {close}%}}")
        } else {
            format!("{{%{open} if true {close}%}}")
        }
    })
    .into_owned()
}

/// A compiled chat template in a transformers-compatible environment.
pub struct ChatTemplate {
    env: Environment<'static>,
}

impl std::fmt::Debug for ChatTemplate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ChatTemplate").finish_non_exhaustive()
    }
}

impl ChatTemplate {
    /// Compiles `source`. Syntax errors are reported here.
    pub fn compile(source: &str) -> Result<Self, RenderError> {
        let mut env = Environment::new();
        env.set_syntax(
            minijinja::syntax::SyntaxConfig::builder()
                .trim_blocks(true)
                .lstrip_blocks(true)
                .keep_trailing_newline(false)
                .build()
                .map_err(|e| convert_error(&e))?,
        );
        env.set_auto_escape_callback(|_| minijinja::AutoEscape::None);
        env.set_undefined_behavior(UndefinedBehavior::Lenient);
        env.set_fuel(Some(FUEL));
        env.set_recursion_limit(RECURSION_LIMIT);
        env.set_unknown_method_callback(python_methods);
        env.set_formatter(|out, _state, value| {
            if value.kind() != ValueKind::Undefined {
                out.write_str(&py_str(value))
                    .map_err(|_| JinjaError::new(ErrorKind::WriteFailure, "write failed"))?;
            }
            Ok(())
        });
        env.add_function("raise_exception", raise_exception);
        env.add_function("strftime_now", strftime_now);
        env.add_filter("tojson", tojson);
        env.add_filter("string", |v: Value| py_str(&v));
        // Jinja2's pprint is Python's pformat, which is repr for anything that fits a line.
        // minijinja's own walks a namespace stored in itself without end.
        env.add_filter("pprint", |v: Value| py_repr(&v));
        env.add_filter("center", center);
        env.add_filter("trim", trim);
        // Jinja2's cycler takes the items as separate arguments.
        env.add_function("cycler", |items: Rest<Value>| {
            minijinja_contrib::globals::cycler(items.0)
        });
        env.add_function("joiner", minijinja_contrib::globals::joiner);
        env.add_template_owned(TEMPLATE_NAME, preprocess(source))
            .map_err(|e| convert_error(&e))?;
        Ok(ChatTemplate { env })
    }

    /// Renders with the given context (a map of variables). Output past [`MAX_TEXT_BYTES`] is an
    /// error: fuel bounds the steps, not what each step prints.
    pub fn render(&self, ctx: Value) -> Result<String, RenderError> {
        let tmpl = self
            .env
            .get_template(TEMPLATE_NAME)
            .map_err(|e| convert_error(&e))?;
        let mut out = BoundedOutput::default();
        let result = tmpl.render_captured_to(ctx, &mut out);
        match result {
            Ok(_) => String::from_utf8(out.bytes).map_err(|e| RenderError::Other {
                message: format!("the output is not valid UTF-8: {e}"),
                line: None,
            }),
            Err(e) if out.full => Err(RenderError::Other {
                message: format!(
                    "the output grew past {MAX_TEXT_BYTES} bytes, far more than any prompt"
                ),
                line: e.line(),
            }),
            Err(e) => Err(convert_error(&e)),
        }
    }
}

/// The render output, refusing to grow past [`MAX_TEXT_BYTES`].
#[derive(Default)]
struct BoundedOutput {
    bytes: Vec<u8>,
    full: bool,
}

impl std::io::Write for BoundedOutput {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        if self.bytes.len().saturating_add(buf.len()) > MAX_TEXT_BYTES {
            self.full = true;
            return Err(std::io::Error::other("output limit reached"));
        }
        self.bytes.extend_from_slice(buf);
        Ok(buf.len())
    }

    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

/// Python string methods: `strip`/`lstrip`/`rstrip`/`split` without arguments use Python's
/// whitespace set ([`is_py_space`]); everything else goes to minijinja-contrib's `pycompat`.
fn python_methods(
    state: &mut minijinja::State,
    value: &Value,
    method: &str,
    args: &[Value],
) -> Result<Value, JinjaError> {
    let no_args = args.is_empty() || (args.len() == 1 && args[0].is_none());
    if let (Some(s), true) = (value.as_str(), no_args) {
        match method {
            "strip" => return Ok(Value::from(py_strip(s))),
            "lstrip" => return Ok(Value::from(s.trim_start_matches(is_py_space))),
            "rstrip" => return Ok(Value::from(s.trim_end_matches(is_py_space))),
            "split" => {
                let parts: Vec<Value> = py_split_whitespace(s)
                    .into_iter()
                    .map(Value::from)
                    .collect();
                return Ok(Value::from(parts));
            }
            _ => {}
        }
    }
    if let Some(s) = value.as_str() {
        match method {
            "rsplit" => return rsplit(s, args),
            "swapcase" if args.is_empty() => {
                let swapped: String = s
                    .chars()
                    .flat_map(|c| {
                        if c.is_uppercase() {
                            c.to_lowercase().collect::<Vec<_>>()
                        } else {
                            c.to_uppercase().collect::<Vec<_>>()
                        }
                    })
                    .collect();
                return Ok(Value::from(swapped));
            }
            _ => {}
        }
    }
    minijinja_contrib::pycompat::unknown_method_callback(state, value, method, args)
}

/// Python's `str.rsplit(sep=None, maxsplit=-1)`.
fn rsplit(s: &str, args: &[Value]) -> Result<Value, JinjaError> {
    let bad = || {
        JinjaError::new(
            ErrorKind::InvalidOperation,
            "rsplit takes (sep=None, maxsplit=-1)",
        )
    };
    if args.len() > 2 {
        return Err(bad());
    }
    let sep = match args.first() {
        None => None,
        Some(v) if v.is_none() => None,
        Some(v) => Some(v.as_str().ok_or_else(bad)?.to_string()),
    };
    let maxsplit = match args.get(1) {
        None => -1,
        Some(v) => v.as_i64().ok_or_else(bad)?,
    };
    let limit = if maxsplit < 0 {
        usize::MAX
    } else {
        maxsplit as usize
    };
    let mut parts: Vec<String> = match sep {
        Some(sep) if sep.is_empty() => {
            return Err(JinjaError::new(
                ErrorKind::InvalidOperation,
                "empty separator",
            ))
        }
        Some(sep) => {
            let mut out = Vec::new();
            let mut rest = s;
            while out.len() < limit {
                match rest.rfind(sep.as_str()) {
                    Some(i) => {
                        out.push(rest[i + sep.len()..].to_string());
                        rest = &rest[..i];
                    }
                    None => break,
                }
            }
            out.push(rest.to_string());
            out
        }
        None => {
            // Whitespace runs separate; trailing whitespace is dropped before each split.
            let mut out = Vec::new();
            let mut rest = s.trim_end_matches(is_py_space);
            while !rest.is_empty() && out.len() < limit {
                match rest.rfind(is_py_space) {
                    Some(i) => {
                        let ch = rest[i..].chars().next().map_or(1, char::len_utf8);
                        out.push(rest[i + ch..].to_string());
                        rest = rest[..i].trim_end_matches(is_py_space);
                    }
                    None => {
                        out.push(rest.to_string());
                        rest = "";
                    }
                }
            }
            // When maxsplit stops the scan, Python keeps the remainder's leading whitespace.
            if !rest.is_empty() {
                out.push(rest.to_string());
            }
            out
        }
    };
    parts.reverse();
    Ok(Value::from(parts))
}

/// Jinja2's `trim(chars=None)`, which is Python's `str.strip(chars)`.
fn trim(value: Value, chars: Option<String>) -> String {
    let s = py_str(&value);
    match chars {
        Some(chars) => s.trim_matches(|c| chars.contains(c)).to_string(),
        None => py_strip(&s).to_string(),
    }
}

/// Jinja2's `center(width=80)`, which is Python's `str.center` (CPython `pad`: the odd space goes
/// left only when both the margin and the width are odd). A width past [`MAX_TEXT_BYTES`] is an
/// error rather than an allocation that cannot succeed.
fn center(value: Value, width: Option<usize>) -> Result<String, JinjaError> {
    let s = py_str(&value);
    let width = width.unwrap_or(80);
    let len = s.chars().count();
    if width <= len {
        return Ok(s);
    }
    if width > MAX_TEXT_BYTES {
        return Err(JinjaError::new(
            ErrorKind::InvalidOperation,
            format!("center: width {width} is larger than {MAX_TEXT_BYTES}"),
        ));
    }
    let marg = width - len;
    let left = marg / 2 + (marg & width & 1);
    Ok(format!(
        "{}{s}{}",
        " ".repeat(left),
        " ".repeat(marg - left)
    ))
}

fn raise_exception(message: Value) -> Result<Value, JinjaError> {
    let message = py_str(&message);
    Err(
        JinjaError::new(ErrorKind::InvalidOperation, message.clone())
            .with_source(RaisedByTemplate(message)),
    )
}

fn strftime_now(format: &str) -> Result<String, JinjaError> {
    strftime(format, &DateTime::now_utc())
        .map_err(|e| JinjaError::new(ErrorKind::InvalidOperation, e))
}

/// transformers' `tojson(x, ensure_ascii=False, indent=None, separators=None, sort_keys=False)`,
/// with `ensure_ascii` and `indent` accepted positionally and every option by keyword.
fn tojson(
    value: Value,
    ensure_ascii: Option<Value>,
    indent: Option<Value>,
    kwargs: Kwargs,
) -> Result<Value, JinjaError> {
    let pick = |pos: Option<Value>, name: &str| -> Result<Option<Value>, JinjaError> {
        let kw: Option<Value> = kwargs.get(name)?;
        Ok(kw.or(pos).filter(|v| !v.is_none() && !v.is_undefined()))
    };
    let ensure_ascii = pick(ensure_ascii, "ensure_ascii")?.is_some_and(|v| v.is_true());
    let sort_keys = pick(None, "sort_keys")?.is_some_and(|v| v.is_true());
    let indent = match pick(indent, "indent")? {
        None => None,
        Some(v) if v.kind() == ValueKind::String => {
            Some(v.as_str().unwrap_or_default().to_string())
        }
        Some(v) => {
            let n = v.as_i64().ok_or_else(|| {
                JinjaError::new(
                    ErrorKind::InvalidOperation,
                    "tojson: indent must be an integer or a string",
                )
            })?;
            let n = usize::try_from(n.max(0)).unwrap_or(usize::MAX);
            if n > MAX_TEXT_BYTES {
                return Err(JinjaError::new(
                    ErrorKind::InvalidOperation,
                    format!("tojson: indent {n} is larger than {MAX_TEXT_BYTES}"),
                ));
            }
            Some(" ".repeat(n))
        }
    };
    let separators = match pick(None, "separators")? {
        None => None,
        Some(v) => {
            let parts: Vec<Value> = v.try_iter()?.collect();
            match parts.as_slice() {
                [a, b] => Some((py_str(a), py_str(b))),
                _ => {
                    return Err(JinjaError::new(
                        ErrorKind::InvalidOperation,
                        "tojson: separators must be a pair (item_separator, key_separator)",
                    ))
                }
            }
        }
    };
    kwargs.assert_all_used()?;
    let opts = JsonOptions {
        ensure_ascii,
        indent,
        separators,
        sort_keys,
    };
    json_dumps(&value, &opts)
        .map(Value::from)
        .map_err(|e| JinjaError::new(ErrorKind::InvalidOperation, format!("tojson: {e}")))
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::time::Instant;

    fn render(src: &str, ctx: serde_json::Value) -> Result<String, RenderError> {
        ChatTemplate::compile(src)?.render(Value::from(minijinja::value::Serde(ctx)))
    }

    // Jinja2 semantics (jinja2 3.1 docs: "Whitespace Control", keep_trailing_newline default False).
    #[test]
    fn trims_blocks_and_one_trailing_newline() {
        let src = "{% for m in xs %}\n  {% if m %}\n[{{ m }}]\n  {% endif %}\n{% endfor %}\nend\n";
        let got = render(src, serde_json::json!({"xs": ["a", "b"]})).unwrap();
        assert_eq!(got, "[a]\n[b]\nend");
        assert_eq!(render("A\n\n", serde_json::json!({})).unwrap(), "A\n");
        assert_eq!(render("A\r\nB\r\n", serde_json::json!({})).unwrap(), "A\nB");
    }

    #[test]
    fn prints_python_forms() {
        let got = render(
            "{{ n }}|{{ t }}|{{ xs }}|{{ u }}|{{ 1.0 }}|{{ xs|string }}",
            serde_json::json!({"n": null, "t": true, "xs": ["a", 1]}),
        )
        .unwrap();
        assert_eq!(got, "None|True|['a', 1]||1.0|['a', 1]");
    }

    #[test]
    fn generation_tag_renders_its_body() {
        let src = "{%- generation -%}\n  X  {%- endgeneration %}\nY";
        assert_eq!(preprocess(src), "{%- if true -%}\n  X  {%- endif %}\nY");
        assert_eq!(render(src, serde_json::json!({})).unwrap(), "XY");
    }

    #[test]
    fn raise_exception_is_reported_with_its_message() {
        let err = render(
            "{% if true %}{{ raise_exception('System role not supported') }}{% endif %}",
            serde_json::json!({}),
        )
        .unwrap_err();
        match err {
            RenderError::Raised(m) => assert_eq!(m, "System role not supported"),
            other => panic!("expected Raised, got {other:?}"),
        }
    }

    #[test]
    fn runaway_loop_runs_out_of_fuel_fast() {
        let start = Instant::now();
        // Jinja2's sandbox and minijinja both refuse a range this large outright.
        let err = render(
            "{% for i in range(100000000) %}x{% endfor %}",
            serde_json::json!({}),
        )
        .unwrap_err();
        assert!(err.to_string().contains("range"), "{err}");
        // Nested ranges under the cap: 10^10 iterations, stopped by the fuel budget.
        let err = render(
            "{% for i in range(100000) %}{% for j in range(100000) %}{% endfor %}{% endfor %}",
            serde_json::json!({}),
        )
        .unwrap_err();
        assert!(matches!(err, RenderError::OutOfFuel), "{err:?}");
        assert!(start.elapsed().as_secs_f64() < 1.0, "{:?}", start.elapsed());
    }

    // Python 3.11, from memory: pprint.pformat({'a': [1, 'x'], 'b': None}) and 'it'.
    #[test]
    fn pprint_is_python_pformat_for_short_values() {
        assert_eq!(
            render(
                "{{ {'a': [1, 'x'], 'b': none} | pprint }}|{{ 'it' | pprint }}",
                serde_json::json!({})
            )
            .unwrap(),
            "{'a': [1, 'x'], 'b': None}|'it'"
        );
    }

    // Found with the template fuzz target (fuzz/fuzz_targets/template.rs): these aborted the
    // process with a failed allocation of tens of gigabytes.
    #[test]
    fn huge_padding_is_an_error_not_an_allocation() {
        for src in [
            "{{ 'a' | center(100000000000) }}",
            "{{ 'a' | center(9223372036854775807) }}",
            "{{ [1, 2] | tojson(indent=100000000000) }}",
        ] {
            let err = render(src, serde_json::json!({})).unwrap_err();
            assert!(err.to_string().contains("is larger than"), "{src}: {err}");
        }
        // Python 3.11, from memory: 'ab'.center(7) == '   ab  ' and
        // json.dumps([1], indent=1) == '[\n 1\n]'.
        assert_eq!(
            render(
                "{{ 'ab' | center(7) }}|{{ [1] | tojson(indent=1) }}",
                serde_json::json!({})
            )
            .unwrap(),
            "   ab  |[\n 1\n]"
        );
    }

    // Found with the template fuzz target: a namespace stored inside itself made printing and
    // `tojson` recurse until the stack overflowed, killing the process.
    #[test]
    fn a_namespace_holding_itself_prints_and_serialises_in_bounds() {
        let start = Instant::now();
        let own = "{% set ns = namespace(a=1) %}{% set ns.x = ns %}";
        let err = render(
            &format!("{own}{{{{ ns | tojson }}}}"),
            serde_json::json!({}),
        )
        .unwrap_err();
        assert!(err.to_string().contains("deeper than"), "{err}");
        let printed = render(&format!("{own}{{{{ ns }}}}"), serde_json::json!({})).unwrap();
        assert!(
            printed.starts_with("{'a': 1, 'x': {'a': 1, 'x': {"),
            "{printed}"
        );
        assert!(printed.contains("'x': {...}"), "{printed}");
        let pretty = render(
            &format!("{own}{{{{ ns | pprint }}}}"),
            serde_json::json!({}),
        )
        .unwrap();
        assert_eq!(pretty, printed);
        let listed = render(
            &format!("{own}{{{{ [ns] | string }}}}"),
            serde_json::json!({}),
        )
        .unwrap();
        assert!(
            listed.contains("'x': {...}}") && listed.ends_with("}}]"),
            "{listed}"
        );
        // Two references to itself double the work at every level: the size caps end it.
        let twice = "{% set ns = namespace(a=1) %}{% set ns.x = ns %}{% set ns.y = ns %}{{ ns }}";
        let err = render(twice, serde_json::json!({})).unwrap_err();
        assert!(err.to_string().contains("grew past"), "{err}");
        assert!(start.elapsed().as_secs_f64() < 5.0, "{:?}", start.elapsed());
    }

    // Fuel counts steps, not bytes: each step here prints 10 MB.
    #[test]
    fn output_past_the_cap_is_an_error() {
        let err = render(
            "{% set s = 'x' * 10000000 %}{% for i in range(1000) %}{{ s }}{% endfor %}",
            serde_json::json!({}),
        )
        .unwrap_err();
        assert!(err.to_string().contains("grew past"), "{err}");
    }

    #[test]
    fn deep_recursion_fails_cleanly() {
        let start = Instant::now();
        let err = render(
            "{% macro f(n) %}{{ f(n + 1) }}{% endmacro %}{{ f(0) }}",
            serde_json::json!({}),
        )
        .unwrap_err();
        assert!(err.to_string().contains("recursion"), "{err}");
        assert!(start.elapsed().as_secs_f64() < 1.0);
    }

    #[test]
    fn tojson_options() {
        let ctx = serde_json::json!({"d": {"b": "é", "a": [1, 2]}});
        assert_eq!(
            render("{{ d|tojson }}", ctx.clone()).unwrap(),
            r#"{"b": "é", "a": [1, 2]}"#
        );
        assert_eq!(
            render(
                "{{ d|tojson(sort_keys=true, separators=(',', ':')) }}",
                ctx.clone()
            )
            .unwrap(),
            r#"{"a":[1,2],"b":"é"}"#
        );
        assert_eq!(
            render("{{ d|tojson(indent=1) }}", ctx.clone()).unwrap(),
            "{\n \"b\": \"é\",\n \"a\": [\n  1,\n  2\n ]\n}"
        );
        assert_eq!(
            render("{{ d|tojson(ensure_ascii=true) }}", ctx).unwrap(),
            r#"{"b": "\u00e9", "a": [1, 2]}"#
        );
    }

    #[test]
    fn undefined_is_lenient_like_jinja2() {
        assert_eq!(
            render(
                "[{{ nope }}]{% if nope %}x{% endif %}{% for a in nope %}y{% endfor %}",
                serde_json::json!({})
            )
            .unwrap(),
            "[]"
        );
        assert!(render("{{ nope.attr }}", serde_json::json!({})).is_err());
    }

    #[test]
    fn strftime_now_formats_current_year() {
        let year = DateTime::now_utc().year.to_string();
        assert_eq!(
            render("{{ strftime_now('%Y') }}", serde_json::json!({})).unwrap(),
            year
        );
    }
}
