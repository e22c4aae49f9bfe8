//! The summary.json format: one serde struct tree, written by `weigh` and `vet`.
//!
//! docs/interface.md fixes the core fields and they are kept exactly:
//! `metrics.<exact_match|token_f1|rouge_l>.{baseline, candidate, lift, ci_low, ci_high,
//! p_value, n}`, a `refusal` block, a `categories` block, and `verdict.{go, checks[]}` with each
//! check's `name`, `threshold`, `value` and `pass`. Everything else is an extension (new fields
//! may be added; none of these are renamed without a migration note).
//!
//! Scales: every score, share, lift and interval end is a fraction in [0, 1] (lifts in
//! [−1, 1]), never a percentage. A number that cannot be computed (no questions) is `null`.
//! The file holds no timestamps or timings, so the same inputs and seed give identical bytes.

use crate::formats::questions::Expect;
use crate::policy::{IntervalKind, Policy};
use crate::stats::Interval;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Questions listed under "worse" and under "better" in [`Changes`].
pub const CHANGES_LISTED: usize = 10;

/// Refusal calls listed in [`Refusal::calls`], of each kind (out-of-scope questions, in-scope
/// answers counted as declined).
pub const REFUSAL_CALLS_LISTED: usize = 100;

/// The kinds of [`Refusal::calls`] in the order the reports list them: what a call must be, the
/// list's title, and what the reports say when it is empty.
pub const REFUSAL_CALL_KINDS: [(Expect, &str, &str); 2] = [
    (
        Expect::Refuse,
        "Out-of-scope questions, every one",
        "The question set has no out-of-scope questions.",
    ),
    (
        Expect::Answer,
        "In-scope questions with an answer counted as declined",
        "No in-scope answer was counted as declined.",
    ),
];

/// What the reports say before the refusal calls: what the detector is and what the list
/// leaves out (its measured figures: docs/scoring.md).
pub const REFUSAL_CALLS_NOTE: &str = "The refusal shares count an answer as declined when its wording declines. \
Rules read the wording; they do not understand it. On real model output they have missed declines worded in ways \
they had not seen, and counted a few answers as declines wrongly (liftgate's measured figures: docs/scoring.md). \
Before relying on the refusal checks, read these answers and recount where a call is wrong. In-scope answers that \
decline in words the rules missed are not listed here: they show in the sample of answers a person reads.";

/// Value of [`Summary::format`]; bumped when a field changes meaning.
pub const FORMAT: &str = "liftgate-summary/1";

/// The root object of summary.json.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    /// Always [`FORMAT`].
    pub format: String,
    /// liftgate's version.
    pub tool_version: String,
    /// The files weighed, with SHA-256 fingerprints of their contents.
    pub inputs: Inputs,
    /// Statistics settings.
    pub settings: Settings,
    /// The policy in force (the file's, or the built-in default), every key filled in.
    pub policy: Policy,
    /// Per-metric paired comparison over `expect: answer` questions.
    pub metrics: Metrics,
    /// Exact McNemar test on the exact-match discordant pairs.
    pub mcnemar: McNemar,
    pub refusal: Refusal,
    /// Fact recall and contradictions; absent when the grades files hold no fact scores
    /// (graded before fact scoring).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub facts: Option<Facts>,
    /// Held-out questions found in the training file (`vet --train`); absent without it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub leakage: Option<Leakage>,
    /// Per category (sorted by name), the gate metric's comparison.
    pub categories: BTreeMap<String, CategorySummary>,
    /// Minimum detectable lift of the gate metric for this sample size.
    pub mde: Mde,
    /// Questions whose gate-metric score changed most.
    pub changes: Changes,
    /// Plain-words warnings (small sample, degenerate intervals, ...).
    pub warnings: Vec<String>,
    pub verdict: Verdict,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Inputs {
    pub questions: InputFile,
    pub baseline: InputFile,
    pub candidate: InputFile,
    /// `null` path and fingerprint when the built-in default policy was used.
    pub policy: PolicySource,
    /// How the answers behind each grades file were computed, when not f32 (from the grades'
    /// and answers' run.json records): e.g. bf16 weights, an approximation of the model.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub approximations: Vec<String>,
}

pub use crate::formats::run_record::InputFile;

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PolicySource {
    pub path: Option<String>,
    pub sha256: Option<String>,
    /// `"file"` or `"built-in"`.
    pub source: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// Bootstrap resamples, and random sign flips of the permutation tests.
    pub resamples: usize,
    pub seed: u64,
    /// Confidence level of every interval (bootstrap and Wilson).
    pub confidence: f64,
    /// The interval the gate reads and that `ci_low`/`ci_high` hold: `"bca"` or `"percentile"`.
    pub interval: IntervalKind,
    /// How the lift intervals are made.
    pub bootstrap_method: String,
    /// How every `p_value` of a lift is computed.
    pub p_value_method: String,
    /// Where the random numbers come from.
    pub rng: String,
}

/// The three metrics in a fixed order, then semantic similarity when both grades files have it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Metrics {
    pub exact_match: MetricSummary,
    pub token_f1: MetricSummary,
    pub rouge_l: MetricSummary,
    /// Absent unless both variants were graded with `--embedder`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub semantic: Option<MetricSummary>,
}

impl Metrics {
    /// The summary of one metric; `None` only for semantic similarity when it was not graded.
    pub fn get(&self, metric: crate::policy::Metric) -> Option<&MetricSummary> {
        use crate::policy::Metric;
        match metric {
            Metric::ExactMatch => Some(&self.exact_match),
            Metric::TokenF1 => Some(&self.token_f1),
            Metric::RougeL => Some(&self.rouge_l),
            Metric::Semantic => self.semantic.as_ref(),
        }
    }

    /// Every metric present, in report order: the three, then semantic similarity if graded.
    pub fn present(&self) -> Vec<(crate::policy::Metric, &MetricSummary)> {
        use crate::policy::Metric;
        Metric::ALL
            .into_iter()
            .chain([Metric::Semantic])
            .filter_map(|m| self.get(m).map(|s| (m, s)))
            .collect()
    }
}

/// One metric: means over the `expect: answer` questions where both variants have a score.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MetricSummary {
    pub baseline: Option<f64>,
    pub candidate: Option<f64>,
    /// Mean paired difference, candidate minus baseline.
    pub lift: Option<f64>,
    /// The policy's interval kind (`settings.interval`) at `settings.confidence`.
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    /// Two-sided p-value of lift = 0 (`settings.p_value_method`).
    pub p_value: Option<f64>,
    /// Questions compared.
    pub n: usize,
    /// Both bootstrap intervals.
    pub percentile: Option<Interval>,
    pub bca: Option<Interval>,
    pub p_value_method: String,
    /// Questions where the candidate scored higher, lower, the same.
    pub better: usize,
    pub worse: usize,
    pub same: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct McNemar {
    /// Exact match right for the baseline only (b) and for the candidate only (c).
    pub baseline_only: u64,
    pub candidate_only: u64,
    pub both: u64,
    pub neither: u64,
    /// `min(1, 2·P(X ≤ min(b, c)))`, X ~ Binomial(b + c, 1/2); 1 when b + c = 0.
    pub p_value: f64,
    pub method: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Refusal {
    /// `expect: refuse` questions: the share each variant correctly declines.
    pub out_of_scope: RefusalRates,
    /// `expect: answer` questions: the share each variant wrongly declines.
    pub false_refusal: RefusalRates,
    /// `"wilson"`, at `settings.confidence`.
    pub interval: String,
    /// The detector's calls behind these shares, for a person to check: every out-of-scope
    /// question, then every in-scope question where either variant was counted as declining,
    /// each kind in the set's order and up to [`REFUSAL_CALLS_LISTED`]. Empty in summaries
    /// written before the list existed.
    #[serde(default)]
    pub calls: Vec<RefusalCall>,
    /// Calls of either kind beyond [`REFUSAL_CALLS_LISTED`], not listed.
    #[serde(default)]
    pub calls_left_off: usize,
}

/// One question's refusal call for both variants.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RefusalCall {
    pub id: String,
    pub category: String,
    pub question: String,
    /// `refuse` (out of scope) or `answer` (in scope).
    pub expect: Expect,
    pub baseline_answer: String,
    /// Whether the detector counted the baseline's answer as a decline.
    pub baseline_declined: bool,
    pub candidate_answer: String,
    pub candidate_declined: bool,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RefusalRates {
    /// Questions of this kind.
    pub n: u64,
    pub baseline: Rate,
    pub candidate: Rate,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Rate {
    /// Questions declined.
    pub declined: u64,
    /// `declined / n`; null when n = 0.
    pub share: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
}

/// The leak check of `vet --train` (docs/scoring.md, "Leakage").
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Leakage {
    /// The training file checked, with its SHA-256.
    pub train: InputFile,
    /// Held-out questions flagged, by kind.
    pub exact: usize,
    pub normalised: usize,
    pub near: usize,
    /// Containment at or above which a question counts as a near duplicate.
    pub threshold: f64,
    /// With an embedding model: questions flagged only by embedding cosine (kind "semantic"),
    /// and the cosine at or above which they are.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub semantic: Option<usize>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cosine_threshold: Option<f64>,
    /// The flagged questions' ids, in the set's order.
    pub ids: Vec<String>,
}

/// The fact scorer's results (docs/scoring.md, "Facts") over the in-scope questions whose
/// references state a fact and which both grades files score.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Facts {
    /// Questions compared.
    pub n: usize,
    /// Fact recall per variant and its paired lift, as for the other metrics (same interval
    /// kind, confidence and p-value method).
    pub recall: MetricSummary,
    /// Share of the questions where each variant states a conflicting fact.
    pub contradiction: ContradictionRates,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ContradictionRates {
    pub baseline: Share,
    pub candidate: Share,
    /// `"wilson"`, at `settings.confidence`.
    pub interval: String,
}

/// A count of questions out of [`Facts::n`], its share and the share's interval.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Share {
    pub count: u64,
    /// `count / n`; null when n = 0.
    pub share: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CategorySummary {
    /// `expect: answer` questions compared on the gate metric.
    pub n: usize,
    /// `expect: refuse` questions in the category (not part of the lift).
    pub refuse_questions: usize,
    pub baseline: Option<f64>,
    pub candidate: Option<f64>,
    pub lift: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    pub p_value: Option<f64>,
    /// Holm-adjusted over all categories with a p-value.
    pub p_value_holm: Option<f64>,
    /// Whether the category regression check judged it (n ≥ categories.min_questions).
    pub judged: bool,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Mde {
    /// The gate metric.
    pub metric: String,
    pub alpha: f64,
    pub power: f64,
    /// `(z_{1−α/2} + z_{power})·sd/√n`; null when n < 2 or sd = 0 (see `note`).
    pub value: Option<f64>,
    /// Sample sd of the paired differences.
    pub sd_diff: Option<f64>,
    pub n: usize,
    /// The policy's `lift.target`.
    pub target: f64,
    /// Questions needed for the target at the observed sd; null when not estimable.
    pub questions_for_target: Option<u64>,
    pub method: String,
    pub note: Option<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Changes {
    pub metric: String,
    /// Largest drops first.
    pub worse: Vec<Change>,
    /// Largest gains first.
    pub better: Vec<Change>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Change {
    pub id: String,
    pub category: String,
    pub question: String,
    pub references: Vec<String>,
    pub baseline_answer: String,
    pub candidate_answer: String,
    pub baseline_score: f64,
    pub candidate_score: f64,
    /// candidate − baseline.
    pub change: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Verdict {
    /// True only when every check passes.
    pub go: bool,
    pub checks: Vec<Check>,
}

/// One gate check: the measured `value` compared with `threshold` by `comparison`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Check {
    /// Stable identifier, e.g. `min_questions`, `lift.token_f1`, `refusal.out_of_scope`,
    /// `refusal.false_refusal`, `facts.contradiction`, `category.<name>`.
    pub name: String,
    /// What is checked, in plain words.
    pub description: String,
    pub threshold: f64,
    /// Null when there was nothing to measure (the check then fails, unless said otherwise).
    pub value: Option<f64>,
    /// How value must compare with threshold to pass: `">"`, `">="` or `"<="`.
    pub comparison: Comparison,
    pub pass: bool,
    /// On failure, why, in plain words for non-engineers.
    pub reason: Option<String>,
}

/// How a check's value must compare with its threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Comparison {
    #[serde(rename = ">")]
    Above,
    #[serde(rename = ">=")]
    AtLeast,
    #[serde(rename = "<=")]
    AtMost,
}

impl Comparison {
    pub fn as_str(self) -> &'static str {
        match self {
            Comparison::Above => ">",
            Comparison::AtLeast => ">=",
            Comparison::AtMost => "<=",
        }
    }
}

/// What a check measures, read from its stable `name`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CheckKind<'a> {
    /// A count of questions.
    MinQuestions,
    /// The lower end of a metric's lift interval.
    Lift,
    /// A share of questions declined (`refusal.*`).
    Refusal,
    /// A difference of two shares of questions (`facts.contradiction`).
    Facts,
    /// A category's lift interval end; the category's name.
    Category(&'a str),
}

impl Check {
    pub fn kind(&self) -> CheckKind<'_> {
        if self.name == "min_questions" {
            CheckKind::MinQuestions
        } else if self.name.starts_with("refusal.") {
            CheckKind::Refusal
        } else if self.name.starts_with("facts.") {
            CheckKind::Facts
        } else if let Some(category) = self.name.strip_prefix("category.") {
            CheckKind::Category(category)
        } else {
            CheckKind::Lift
        }
    }
}
