//! The gate policy (docs/policy.md): what a candidate must show for a GO verdict.
//!
//! A TOML file given with `--policy`, or the built-in default ([`Policy::default`]); the file
//! format, every key, its range and the default are documented in docs/policy.md. Every table
//! denies unknown keys, so a misspelt key is an error naming the file, line and key rather than a
//! silently ignored setting. Keys left out take their default value.
//!
//! ```toml
//! min_questions = 100
//! [lift]
//! metric = "token_f1"        # exact_match | token_f1 | rouge_l | semantic
//! min_ci_low = 0.0           # the lift interval's lower end must be above this
//! interval = "bca"           # bca | percentile
//! target = 0.03              # smallest lift worth shipping (only for the sample-size warning)
//! [refusal]
//! min_out_of_scope = 0.8
//! max_false_refusal = 0.1
//! extra_phrases = []
//! [categories]
//! max_regression = 0.05
//! min_questions = 10
//! rule = "clear-regression"  # clear-regression | non-inferiority
//! [facts]
//! max_contradiction_increase = 0.0   # optional; absent: contradictions are not checked
//! ```

use crate::error::{Error, Result};
use serde::{Deserialize, Serialize};
use std::path::Path;

/// A per-question score `weigh` can gate on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Metric {
    ExactMatch,
    TokenF1,
    RougeL,
    /// Embedding cosine to the closest reference; only in grades made with `--embedder`.
    Semantic,
}

impl Metric {
    /// The metrics every grades file holds. [`Metric::Semantic`] is not among them: it is
    /// present only when both variants were graded with an embedding model.
    pub const ALL: [Metric; 3] = [Metric::ExactMatch, Metric::TokenF1, Metric::RougeL];

    /// The name used in files (summary.json, the policy).
    pub fn as_str(self) -> &'static str {
        match self {
            Metric::ExactMatch => "exact_match",
            Metric::TokenF1 => "token_f1",
            Metric::RougeL => "rouge_l",
            Metric::Semantic => "semantic",
        }
    }

    /// The name for people (report.md).
    pub fn label(self) -> &'static str {
        match self {
            Metric::ExactMatch => "exact match",
            Metric::TokenF1 => "token F1",
            Metric::RougeL => "ROUGE-L",
            Metric::Semantic => "semantic similarity",
        }
    }

    /// Position in [`Metric::ALL`]; [`Metric::Semantic`] comes after them, at 3.
    pub fn index(self) -> usize {
        match self {
            Metric::ExactMatch => 0,
            Metric::TokenF1 => 1,
            Metric::RougeL => 2,
            Metric::Semantic => 3,
        }
    }
}

/// Which bootstrap interval the gate reads.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum IntervalKind {
    /// Bias-corrected and accelerated (Efron 1987): better coverage for skewed statistics.
    Bca,
    /// Plain percentile interval.
    Percentile,
}

impl IntervalKind {
    pub fn as_str(self) -> &'static str {
        match self {
            IntervalKind::Bca => "bca",
            IntervalKind::Percentile => "percentile",
        }
    }
}

/// How a category's regression is judged on its lift interval (docs/policy.md explains the
/// choice of the default).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum RegressionRule {
    /// Fails when the interval's upper end is below −max_regression: the data show, with the
    /// interval's confidence, that the category lost more than the allowance.
    ClearRegression,
    /// Fails unless the interval's lower end is above −max_regression: the data must show the
    /// category lost no more than the allowance (a non-inferiority test; needs large categories).
    NonInferiority,
}

impl RegressionRule {
    pub fn as_str(self) -> &'static str {
        match self {
            RegressionRule::ClearRegression => "clear-regression",
            RegressionRule::NonInferiority => "non-inferiority",
        }
    }
}

/// The whole policy. Field docs give the meaning; docs/policy.md gives ranges and defaults.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Policy {
    /// The set must hold at least this many `expect: answer` questions.
    pub min_questions: usize,
    pub lift: LiftPolicy,
    pub refusal: RefusalPolicy,
    pub categories: CategoryPolicy,
    /// Left out of summary.json while unset, so reports of policies without it are unchanged.
    #[serde(skip_serializing_if = "FactPolicy::is_unset")]
    pub facts: FactPolicy,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct LiftPolicy {
    /// The metric whose lift gates the verdict (and whose per-category lifts are judged).
    pub metric: Metric,
    /// The lower end of the lift interval must be strictly above this.
    pub min_ci_low: f64,
    /// Which interval the check reads.
    pub interval: IntervalKind,
    /// The smallest lift worth rolling out; only used to warn when the set is too small to
    /// detect it (minimum detectable lift above this).
    pub target: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RefusalPolicy {
    /// The candidate must decline at least this share of `expect: refuse` questions.
    pub min_out_of_scope: f64,
    /// The candidate may decline at most this share of `expect: answer` questions.
    pub max_false_refusal: f64,
    /// Phrases added to the refusal detector's default list (used by `grade`).
    pub extra_phrases: Vec<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct CategoryPolicy {
    /// The largest allowed loss of any category, on the gate metric's scale.
    pub max_regression: f64,
    /// Only categories with at least this many `expect: answer` questions are judged.
    pub min_questions: usize,
    pub rule: RegressionRule,
}

#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct FactPolicy {
    /// When set, the candidate's share of questions with a contradicted fact may exceed the
    /// baseline's by at most this (0.0: no more contradictions than the baseline). Unset: no
    /// check.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub max_contradiction_increase: Option<f64>,
}

impl FactPolicy {
    pub fn is_unset(&self) -> bool {
        self.max_contradiction_increase.is_none()
    }
}

impl Default for Policy {
    fn default() -> Self {
        Policy {
            min_questions: 100,
            lift: LiftPolicy::default(),
            refusal: RefusalPolicy::default(),
            categories: CategoryPolicy::default(),
            facts: FactPolicy::default(),
        }
    }
}

impl Default for LiftPolicy {
    fn default() -> Self {
        LiftPolicy {
            metric: Metric::TokenF1,
            min_ci_low: 0.0,
            interval: IntervalKind::Bca,
            target: 0.03,
        }
    }
}

impl Default for RefusalPolicy {
    fn default() -> Self {
        RefusalPolicy {
            min_out_of_scope: 0.8,
            max_false_refusal: 0.1,
            extra_phrases: Vec::new(),
        }
    }
}

impl Default for CategoryPolicy {
    fn default() -> Self {
        CategoryPolicy {
            max_regression: 0.05,
            min_questions: 10,
            rule: RegressionRule::ClearRegression,
        }
    }
}

/// Longest accepted policy file: a policy is a few dozen lines.
const MAX_POLICY_BYTES: u64 = 1 << 20;

impl Policy {
    /// The policy in `path`, or the built-in default when `path` is `None`.
    pub fn load_or_default(path: Option<&Path>) -> Result<Policy> {
        match path {
            Some(p) => Policy::load(p),
            None => Ok(Policy::default()),
        }
    }

    /// Reads and validates a policy file.
    pub fn load(path: &Path) -> Result<Policy> {
        let meta =
            std::fs::metadata(path).map_err(|e| Error::file(path, format!("cannot open: {e}")))?;
        if meta.len() > MAX_POLICY_BYTES {
            return Err(Error::file(
                path,
                "is larger than 1 MiB; is this a policy file?",
            ));
        }
        let bytes =
            std::fs::read(path).map_err(|e| Error::file(path, format!("cannot read: {e}")))?;
        let text = String::from_utf8(bytes).map_err(|e| {
            let at = e.utf8_error().valid_up_to();
            let line = e.as_bytes()[..at].iter().filter(|&&b| b == b'\n').count() + 1;
            Error::line(path, line, format!("not valid UTF-8: {}", e.utf8_error()))
        })?;
        Policy::parse(path, &text)
    }

    /// Parses and validates policy text; `path` names the source in messages.
    pub fn parse(path: &Path, text: &str) -> Result<Policy> {
        let policy: Policy = toml::from_str(text).map_err(|e| toml_error(path, text, &e))?;
        policy.validate(path, text)?;
        Ok(policy)
    }

    fn validate(&self, path: &Path, text: &str) -> Result<()> {
        let unit = |section: &str, key: &str, v: f64, lo: f64, hi: f64| -> Result<()> {
            if v.is_finite() && (lo..=hi).contains(&v) {
                return Ok(());
            }
            Err(range_error(
                path,
                text,
                section,
                key,
                &format!("{v}"),
                &format!("from {lo} to {hi}"),
            ))
        };
        if self.min_questions < 1 {
            return Err(range_error(
                path,
                text,
                "",
                "min_questions",
                "0",
                "a whole number, 1 or more",
            ));
        }
        unit("lift", "min_ci_low", self.lift.min_ci_low, -1.0, 1.0)?;
        unit("lift", "target", self.lift.target, 0.0, 1.0)?;
        unit(
            "refusal",
            "min_out_of_scope",
            self.refusal.min_out_of_scope,
            0.0,
            1.0,
        )?;
        unit(
            "refusal",
            "max_false_refusal",
            self.refusal.max_false_refusal,
            0.0,
            1.0,
        )?;
        unit(
            "categories",
            "max_regression",
            self.categories.max_regression,
            0.0,
            1.0,
        )?;
        if let Some(v) = self.facts.max_contradiction_increase {
            unit("facts", "max_contradiction_increase", v, 0.0, 1.0)?;
        }
        if self.categories.min_questions < 2 {
            let v = self.categories.min_questions.to_string();
            return Err(range_error(
                path,
                text,
                "categories",
                "min_questions",
                &v,
                "a whole number, 2 or more",
            ));
        }
        for (i, phrase) in self.refusal.extra_phrases.iter().enumerate() {
            if phrase.trim().is_empty() {
                let line = key_line(text, "refusal", "extra_phrases");
                return Err(Error::field(
                    path,
                    line,
                    format!("refusal.extra_phrases[{i}]"),
                    "must not be empty",
                ));
            }
        }
        Ok(())
    }
}

fn range_error(
    path: &Path,
    text: &str,
    section: &str,
    key: &str,
    value: &str,
    allowed: &str,
) -> Error {
    let name = if section.is_empty() {
        key.to_string()
    } else {
        format!("{section}.{key}")
    };
    Error::field(
        path,
        key_line(text, section, key),
        name,
        format!("is {value}; allowed: {allowed}"),
    )
}

/// Turns a TOML/serde error into one naming the file, the line and (for unknown or mistyped
/// keys) the dotted key.
fn toml_error(path: &Path, text: &str, e: &toml::de::Error) -> Error {
    let line = e.span().map(|s| line_of(text, s.start));
    let message = e.message().trim().to_string();
    let key = backticked(&message);
    match (key, e.span()) {
        (Some(key), Some(span)) if message.starts_with("unknown field") => {
            let name = qualified(&section_at(text, span.start), key);
            Error::field(
                path,
                line,
                name,
                format!("{message}; see docs/policy.md for the keys a policy may hold"),
            )
        }
        (_, Some(span)) => {
            let line = line_of(text, span.start);
            // A wrongly typed value: name the key written on that line.
            match key_on_line(text, line) {
                Some(key) => {
                    let name = qualified(&section_at(text, span.start), key);
                    Error::field(
                        path,
                        Some(line),
                        name,
                        format!("not a valid policy: {message}"),
                    )
                }
                None => Error::line(path, line, format!("not a valid policy: {message}")),
            }
        }
        _ => Error::file(path, format!("not a valid policy: {message}")),
    }
}

/// The first `name` in backticks in a serde message ("unknown field `x`, expected ...").
fn backticked(message: &str) -> Option<String> {
    let start = message.find('`')? + 1;
    let len = message[start..].find('`')?;
    Some(message[start..start + len].to_string())
}

/// The bare key assigned on a 1-based line (`key = value`), if the line is one.
fn key_on_line(text: &str, line: usize) -> Option<String> {
    let l = text.lines().nth(line.checked_sub(1)?)?;
    let (lhs, _) = l.split_once('=')?;
    let key = lhs.trim();
    let bare = !key.is_empty()
        && key
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-' || c == '.');
    bare.then(|| key.to_string())
}

/// 1-based line of a byte offset.
fn line_of(text: &str, offset: usize) -> usize {
    let end = offset.min(text.len());
    text.as_bytes()[..end]
        .iter()
        .filter(|&&b| b == b'\n')
        .count()
        + 1
}

/// `section.key`, or `key` at the top level.
fn qualified(section: &str, key: String) -> String {
    if section.is_empty() {
        key
    } else {
        format!("{section}.{key}")
    }
}

/// The `[table]` header in force at a byte offset ("" for the top level).
fn section_at(text: &str, offset: usize) -> String {
    let mut section = String::new();
    let mut pos = 0;
    for line in text.split_inclusive('\n') {
        if pos > offset {
            break;
        }
        if let Some(name) = table_header(line) {
            section = name;
        }
        pos += line.len();
    }
    section
}

fn table_header(line: &str) -> Option<String> {
    let t = line.trim();
    let inner = t.strip_prefix('[')?;
    let end = inner.find(']')?;
    Some(inner[..end].trim().trim_matches('[').trim().to_string())
}

/// The line where `key` is set inside `[section]` (or at the top level), if it is written
/// there; inline tables (`lift = { ... }`) are found by the table name.
fn key_line(text: &str, section: &str, key: &str) -> Option<usize> {
    let mut current = String::new();
    for (i, line) in text.lines().enumerate() {
        if let Some(name) = table_header(line) {
            current = name;
            continue;
        }
        let lhs = line.split('=').next().unwrap_or("").trim();
        if current == section && lhs == key {
            return Some(i + 1);
        }
        if current.is_empty() && !section.is_empty() && lhs == section {
            return Some(i + 1);
        }
        if current.is_empty() && lhs == format!("{section}.{key}") {
            return Some(i + 1);
        }
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<Policy> {
        Policy::parse(Path::new("gate.toml"), text)
    }

    #[test]
    fn empty_file_is_the_default() {
        assert_eq!(parse("").unwrap(), Policy::default());
    }

    #[test]
    fn full_file_parses() {
        let p = parse(
            "min_questions = 40\n[lift]\nmetric = \"rouge_l\"\nmin_ci_low = -0.01\ninterval = \"percentile\"\ntarget = 0.05\n\
             [refusal]\nmin_out_of_scope = 0.9\nmax_false_refusal = 0.05\nextra_phrases = [\"not my department\"]\n\
             [categories]\nmax_regression = 0.1\nmin_questions = 5\nrule = \"non-inferiority\"\n",
        )
        .unwrap();
        assert_eq!(p.min_questions, 40);
        assert_eq!(p.lift.metric, Metric::RougeL);
        assert_eq!(p.lift.interval, IntervalKind::Percentile);
        assert_eq!(
            p.refusal.extra_phrases,
            vec!["not my department".to_string()]
        );
        assert_eq!(p.categories.rule, RegressionRule::NonInferiority);
        assert_eq!(p.facts.max_contradiction_increase, None);
        let p = parse("[facts]\nmax_contradiction_increase = 0.02\n").unwrap();
        assert_eq!(p.facts.max_contradiction_increase, Some(0.02));
    }

    #[test]
    fn unknown_keys_name_file_line_and_key() {
        let err = parse("min_questions = 10\n[lift]\nmetric = \"token_f1\"\nmin_ci_lo = 0.0\n")
            .unwrap_err()
            .to_string();
        assert!(
            err.starts_with("gate.toml:4: field `lift.min_ci_lo`"),
            "{err}"
        );
        let err = parse("min_question = 10\n").unwrap_err().to_string();
        assert!(
            err.starts_with("gate.toml:1: field `min_question`"),
            "{err}"
        );
        let err = parse("[gate]\nx = 1\n").unwrap_err().to_string();
        assert!(
            err.contains("gate.toml:1") && err.contains("`gate`"),
            "{err}"
        );
    }

    #[test]
    fn out_of_range_values_name_key_and_range() {
        let err = parse("[refusal]\n\nmin_out_of_scope = 1.5\n")
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("gate.toml:3: field `refusal.min_out_of_scope`"),
            "{err}"
        );
        assert!(err.contains("from 0 to 1"), "{err}");
        let err = parse("[categories]\nmin_questions = 1\n")
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("field `categories.min_questions`") && err.contains("2 or more"),
            "{err}"
        );
        let err = parse("min_questions = 0\n").unwrap_err().to_string();
        assert!(err.contains("gate.toml:1: field `min_questions`"), "{err}");
        let err = parse("[lift]\nmetric = \"bleu\"\n")
            .unwrap_err()
            .to_string();
        assert!(err.contains("gate.toml:2") && err.contains("bleu"), "{err}");
        let err = parse("[facts]\nmax_contradiction_increase = -0.1\n")
            .unwrap_err()
            .to_string();
        assert!(
            err.contains("gate.toml:2: field `facts.max_contradiction_increase`"),
            "{err}"
        );
        let err = parse("[refusal]\nextra_phrases = [\" \"]\n")
            .unwrap_err()
            .to_string();
        assert!(err.contains("refusal.extra_phrases[0]"), "{err}");
    }
}
