//! The trend of recorded runs, and like-for-like comparisons: pure computation over data the
//! store has loaded (no files, no clock).
//!
//! A question set changes between runs: questions are added, removed, or edited (their text,
//! references, expectation or category). A score over the whole set then moves for two
//! reasons at once, the model and the questions. So next to each run's own numbers (copied
//! from its summary.json), the trend computes:
//!
//! - the **set change** since the previous run shown: questions added, removed, edited (same
//!   id, different content hash), and "unverified" (same id, content unknown because the run
//!   was imported without its question set);
//! - the **common unchanged questions**: ids present in every run shown with the same known
//!   content hash; each run's means on exactly those questions ("like for like");
//! - **paired comparisons** of the candidates of two runs on the questions the two share
//!   unchanged: per question `d_i = later − earlier`, the mean `d̄` with a paired bootstrap
//!   interval (`stats::bootstrap`, the same resampling `weigh` uses for a lift: whole
//!   questions resampled with replacement, the three metrics jointly). When the interval lies
//!   entirely below zero, the data show the later candidate scores lower on those questions:
//!   the comparison says so in plain words.

use crate::formats::questions::Expect;
use crate::policy::Metric;
use crate::stats::bootstrap::{lift_intervals, paired_bootstrap, resample_means};
use serde::{Deserialize, Serialize};
use std::collections::{HashMap, HashSet};

/// Value of [`Trend::format`].
pub const FORMAT: &str = "liftgate-trend/1";

/// Random-stream domain of the comparisons' bootstraps (see `stats::rng`: the domains used by
/// `weigh` are below `1 << 22`), plus the comparison's index.
pub const DOMAIN_COMPARISON: u32 = 1 << 23;

/// One question of a recorded set revision, as the history knows it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct QuestionKey {
    pub id: String,
    /// SHA-256 of the question's content (question, references, expect, category); `None`
    /// when unknown (a run imported without its question set).
    pub content_hash: Option<String>,
    pub expect: Expect,
}

/// Per-question grades of one variant, aligned with its set revision's questions.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Scores {
    pub exact_match: Vec<Option<f64>>,
    pub token_f1: Vec<Option<f64>>,
    pub rouge_l: Vec<Option<f64>>,
    pub refused: Vec<bool>,
}

impl Scores {
    pub fn metric(&self, m: Metric) -> &[Option<f64>] {
        match m {
            Metric::ExactMatch => &self.exact_match,
            // The history keeps the three text-overlap metrics only (docs/history.md): a run
            // gated on semantic similarity is followed on token F1, as an unknown gate name is.
            Metric::TokenF1 | Metric::Semantic => &self.token_f1,
            Metric::RougeL => &self.rouge_l,
        }
    }

    pub fn len(&self) -> usize {
        self.refused.len()
    }

    pub fn is_empty(&self) -> bool {
        self.refused.is_empty()
    }
}

/// How a set changed from one run to the next.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct SetChange {
    /// Ids in the later set only.
    pub added: usize,
    /// Ids in the earlier set only.
    pub removed: usize,
    /// Ids in both whose content hash differs.
    pub edited: usize,
    /// Ids in both whose content is unknown in one of the runs (imported without the set).
    pub unverified: usize,
}

impl SetChange {
    pub fn is_none(&self) -> bool {
        *self == SetChange::default()
    }

    /// "none", or e.g. "+2 added, 3 edited".
    pub fn describe(&self) -> String {
        let mut parts = Vec::new();
        if self.added > 0 {
            parts.push(format!("{} added", self.added));
        }
        if self.removed > 0 {
            parts.push(format!("{} removed", self.removed));
        }
        if self.edited > 0 {
            parts.push(format!("{} edited", self.edited));
        }
        if self.unverified > 0 {
            parts.push(format!("{} unverified", self.unverified));
        }
        if parts.is_empty() {
            "unchanged".into()
        } else {
            parts.join(", ")
        }
    }
}

/// Questions added, removed, edited and unverified from `earlier` to `later`, matched by id.
pub fn set_change(earlier: &[QuestionKey], later: &[QuestionKey]) -> SetChange {
    let before: HashMap<&str, &QuestionKey> = earlier.iter().map(|q| (q.id.as_str(), q)).collect();
    let after: HashSet<&str> = later.iter().map(|q| q.id.as_str()).collect();
    let mut change = SetChange::default();
    for q in later {
        match before.get(q.id.as_str()) {
            None => change.added += 1,
            Some(p) => match (&p.content_hash, &q.content_hash) {
                (Some(a), Some(b)) if a == b => {}
                (Some(_), Some(_)) => change.edited += 1,
                _ => change.unverified += 1,
            },
        }
    }
    change.removed = earlier
        .iter()
        .filter(|q| !after.contains(q.id.as_str()))
        .count();
    change
}

/// The ids present in every revision with one and the same known content hash, in the order
/// of the first revision. Empty when `revisions` is empty.
pub fn common_unchanged<'a>(revisions: &[&'a [QuestionKey]]) -> Vec<&'a str> {
    let Some((first, rest)) = revisions.split_first() else {
        return Vec::new();
    };
    let maps: Vec<HashMap<&str, Option<&str>>> = rest
        .iter()
        .map(|r| {
            r.iter()
                .map(|q| (q.id.as_str(), q.content_hash.as_deref()))
                .collect()
        })
        .collect();
    first
        .iter()
        .filter(|q| {
            let Some(hash) = q.content_hash.as_deref() else {
                return false;
            };
            maps.iter()
                .all(|m| m.get(q.id.as_str()) == Some(&Some(hash)))
        })
        .map(|q| q.id.as_str())
        .collect()
}

/// The position of each of `ids` in `revision` (every id must be in it).
pub fn positions(revision: &[QuestionKey], ids: &[&str]) -> Vec<usize> {
    let at: HashMap<&str, usize> = revision
        .iter()
        .enumerate()
        .map(|(i, q)| (q.id.as_str(), i))
        .collect();
    ids.iter().filter_map(|id| at.get(id).copied()).collect()
}

/// A metric's means on a subset of questions, named as in summary.json.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MeanPair {
    pub baseline: Option<f64>,
    pub candidate: Option<f64>,
    /// Mean paired difference, candidate minus baseline.
    pub lift: Option<f64>,
    /// In-scope questions where both variants have a score.
    pub n: usize,
}

/// The three metrics, in summary.json's order and names.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MetricSet<T> {
    pub exact_match: T,
    pub token_f1: T,
    pub rouge_l: T,
}

impl<T> MetricSet<T> {
    pub fn get(&self, m: Metric) -> &T {
        match m {
            Metric::ExactMatch => &self.exact_match,
            // The history keeps the three text-overlap metrics only (docs/history.md): a run
            // gated on semantic similarity is followed on token F1, as an unknown gate name is.
            Metric::TokenF1 | Metric::Semantic => &self.token_f1,
            Metric::RougeL => &self.rouge_l,
        }
    }

    pub fn from_fn(mut f: impl FnMut(Metric) -> T) -> Self {
        MetricSet {
            exact_match: f(Metric::ExactMatch),
            token_f1: f(Metric::TokenF1),
            rouge_l: f(Metric::RougeL),
        }
    }
}

/// Means of one run's baseline and candidate on the questions at `at` (positions in the run's
/// revision), over `expect: answer` questions where both have a score: the rule `weigh` uses
/// for summary.json's means, so on an unchanged set these equal the run's own.
pub fn means_at(
    revision: &[QuestionKey],
    baseline: &Scores,
    candidate: &Scores,
    at: &[usize],
) -> MetricSet<MeanPair> {
    MetricSet::from_fn(|m| {
        let (b, c) = (baseline.metric(m), candidate.metric(m));
        let (mut sb, mut sc, mut sd, mut n) = (0.0, 0.0, 0.0, 0usize);
        for &i in at {
            if revision[i].expect != Expect::Answer {
                continue;
            }
            if let (Some(x), Some(y)) = (b[i], c[i]) {
                sb += x;
                sc += y;
                sd += y - x;
                n += 1;
            }
        }
        let mean = |s: f64| (n > 0).then(|| s / n as f64);
        MeanPair {
            baseline: mean(sb),
            candidate: mean(sc),
            lift: mean(sd),
            n,
        }
    })
}

/// One metric of a paired comparison of two candidates.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PairedDifference {
    /// The earlier candidate's mean on the shared in-scope questions.
    pub earlier: Option<f64>,
    /// The later candidate's mean on the same questions.
    pub later: Option<f64>,
    /// Mean per-question difference, later minus earlier.
    pub difference: Option<f64>,
    /// BCa bootstrap interval of the difference.
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    /// Shared in-scope questions where both have a score.
    pub n: usize,
    /// The whole interval is below zero: the later candidate is clearly worse.
    pub clearly_worse: bool,
    /// The whole interval is above zero: the later candidate is clearly better.
    pub clearly_better: bool,
}

/// Bootstrap settings of the comparisons.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BootSettings {
    pub resamples: usize,
    pub confidence: f64,
    pub seed: u64,
}

/// The later candidate against the earlier one, question by question on `ids` (shared,
/// unchanged questions; their `expect` is therefore the same in both revisions).
pub fn compare_candidates(
    earlier_rev: &[QuestionKey],
    earlier: &Scores,
    later_rev: &[QuestionKey],
    later: &Scores,
    ids: &[&str],
    boot: BootSettings,
    domain: u32,
) -> MetricSet<PairedDifference> {
    let pe = positions(earlier_rev, ids);
    let pl = positions(later_rev, ids);
    let pairs: Vec<(Vec<f64>, Vec<f64>)> = Metric::ALL
        .iter()
        .map(|&m| {
            let (e, l) = (earlier.metric(m), later.metric(m));
            let mut xs = Vec::new();
            let mut ys = Vec::new();
            for (&i, &j) in pe.iter().zip(&pl) {
                if later_rev[j].expect != Expect::Answer {
                    continue;
                }
                if let (Some(x), Some(y)) = (e[i], l[j]) {
                    xs.push(x);
                    ys.push(y);
                }
            }
            (xs, ys)
        })
        .collect();
    // The rows each metric covers: when all three cover the same questions (the usual case),
    // resample them jointly as `weigh` does.
    let rows: Vec<Vec<usize>> = Metric::ALL
        .iter()
        .map(|&m| {
            pe.iter()
                .zip(&pl)
                .enumerate()
                .filter(|(_, (&i, &j))| {
                    later_rev[j].expect == Expect::Answer
                        && earlier.metric(m)[i].is_some()
                        && later.metric(m)[j].is_some()
                })
                .map(|(k, _)| k)
                .collect()
        })
        .collect();
    let diffs: Vec<Vec<f64>> = pairs
        .iter()
        .map(|(x, y)| y.iter().zip(x).map(|(b, a)| b - a).collect())
        .collect();
    let same_rows = rows.iter().all(|r| *r == rows[0]);
    let lifts: Vec<Option<crate::stats::bootstrap::Lift>> = if same_rows && !diffs[0].is_empty() {
        let cols: Vec<&[f64]> = diffs.iter().map(Vec::as_slice).collect();
        let boots = resample_means(&cols, boot.resamples, boot.seed, domain);
        diffs
            .iter()
            .zip(&boots)
            .map(|(d, b)| Some(lift_intervals(d, b, boot.confidence)))
            .collect()
    } else {
        diffs
            .iter()
            .enumerate()
            .map(|(k, d)| {
                (!d.is_empty()).then(|| {
                    paired_bootstrap(
                        d,
                        boot.resamples,
                        boot.confidence,
                        boot.seed,
                        domain.wrapping_add(1 + k as u32),
                    )
                })
            })
            .collect()
    };
    let mut out = Metric::ALL.iter().map(|&m| {
        let k = m.index();
        let (x, y) = &pairs[k];
        let lift = &lifts[k];
        let iv = lift.as_ref().map(|l| l.bca);
        PairedDifference {
            earlier: crate::stats::mean(x),
            later: crate::stats::mean(y),
            difference: lift.as_ref().map(|l| l.estimate),
            ci_low: iv.map(|i| i.low),
            ci_high: iv.map(|i| i.high),
            n: x.len(),
            clearly_worse: iv.is_some_and(|i| i.high < 0.0),
            clearly_better: iv.is_some_and(|i| i.low > 0.0),
        }
    });
    MetricSet {
        exact_match: out.next().expect("three metrics"),
        token_f1: out.next().expect("three metrics"),
        rouge_l: out.next().expect("three metrics"),
    }
}

// ---------------------------------------------------------------------------------------------
// The trend.json tree. Renderers (terminal, markdown, and any later one) read only this.

/// The root of trend.json.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Trend {
    /// Always [`FORMAT`].
    pub format: String,
    pub tool_version: String,
    /// The history file read.
    pub history: String,
    /// Settings of the paired comparisons.
    pub comparison_settings: ComparisonSettings,
    /// One series per question-set name, in name order; runs in time order.
    pub series: Vec<Series>,
    /// Candidate-against-candidate comparisons (consecutive runs of each series, or the two
    /// runs asked for).
    pub comparisons: Vec<Comparison>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ComparisonSettings {
    pub resamples: usize,
    pub seed: u64,
    pub confidence: f64,
    /// `"bca"`: the interval of [`PairedDifference`].
    pub interval: String,
    pub method: String,
}

/// The runs of one question set (by the set file's name).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Series {
    pub set_name: String,
    /// Distinct set revisions (file fingerprints) among the runs shown.
    pub revisions: usize,
    /// True when the runs shown were not all made on the same set content: their whole-set
    /// scores are then not one like-for-like series; read `like_for_like`.
    pub set_changed: bool,
    /// Questions in every run shown with unchanged content.
    pub common_unchanged_questions: usize,
    pub runs: Vec<TrendRun>,
}

/// One recorded run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TrendRun {
    /// The run's id in the history.
    pub run: i64,
    pub label: Option<String>,
    /// When the run finished (UTC, RFC 3339).
    pub finished_at: String,
    /// `vet`, `weigh` or `record` (imported).
    pub source: String,
    pub report_dir: String,
    pub set: SetRevision,
    pub variants: Vec<VariantInfo>,
    /// The policy's gate metric.
    pub gate_metric: String,
    /// The run's summary.json `metrics.<name>.{baseline, candidate, lift, ci_low, ci_high,
    /// p_value, n}`, unchanged.
    pub metrics: MetricSet<MetricValues>,
    /// The run's refusal shares, as summary.json's `refusal.<kind>.<variant>.share`.
    pub refusal: RefusalShares,
    /// `"GO"` or `"NO-GO"`.
    pub verdict: String,
    /// Means on the series' common unchanged questions.
    pub like_for_like: MetricSet<MeanPair>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SetRevision {
    pub fingerprint: String,
    /// The first 12 hex digits of the fingerprint.
    pub short: String,
    pub questions: usize,
    /// Change since the previous run shown of this series; null for the first.
    pub change: Option<SetChange>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct VariantInfo {
    pub index: usize,
    /// `baseline` or `candidate`.
    pub role: String,
    pub name: String,
    /// `base`, `base+adapter`, or `unknown` (no answers record).
    pub kind: String,
}

/// summary.json's core fields of one metric.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct MetricValues {
    pub baseline: Option<f64>,
    pub candidate: Option<f64>,
    pub lift: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    pub p_value: Option<f64>,
    pub n: usize,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct RefusalShares {
    pub out_of_scope: SharePair,
    pub false_refusal: SharePair,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct SharePair {
    pub n: u64,
    pub baseline: Option<f64>,
    pub candidate: Option<f64>,
}

/// The later run's candidate against the earlier run's.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Comparison {
    /// `"consecutive"` or `"between"` (asked for).
    pub kind: String,
    pub earlier: i64,
    pub later: i64,
    pub earlier_label: Option<String>,
    pub later_label: Option<String>,
    /// Questions both runs hold with unchanged content (in scope or not).
    pub shared_questions: usize,
    /// The later run's gate metric: the one the sentence and the flag speak of.
    pub gate_metric: String,
    pub metrics: MetricSet<PairedDifference>,
    /// The gate metric's interval lies entirely below zero.
    pub regression: bool,
    /// The comparison in one sentence.
    pub sentence: String,
}

/// `run 4 "v3"`, or `run 4` without a label.
pub fn run_name(id: i64, label: Option<&str>) -> String {
    match label {
        Some(l) if !l.is_empty() => format!("run {id} ({l})"),
        _ => format!("run {id}"),
    }
}

/// A signed three-decimal number with a real minus sign.
pub fn signed(x: f64) -> String {
    let s = format!("{x:+.3}");
    s.replacen('-', "\u{2212}", 1)
}

/// The sentence of a comparison, e.g. `run 4 (v3) vs run 3 (v2) on 131 shared questions:
/// token F1 +0.021 (−0.004 to +0.046)`, followed by a plain-words flag when the later run is
/// clearly worse on the gate metric.
pub fn comparison_sentence(
    earlier: &str,
    later: &str,
    shared: usize,
    gate: Metric,
    d: &PairedDifference,
    confidence: f64,
) -> String {
    let head = format!("{later} vs {earlier} on {shared} shared unchanged questions");
    let Some(diff) = d.difference else {
        return format!(
            "{head}: no in-scope question with a {} score in both runs, nothing to compare",
            gate.label()
        );
    };
    let mut s = format!("{head}: {} {}", gate.label(), signed(diff));
    if d.ci_low == Some(diff) && d.ci_high == Some(diff) && diff == 0.0 {
        s.push_str("; the two candidates score the same on every one of these questions");
        return s;
    }
    if let (Some(lo), Some(hi)) = (d.ci_low, d.ci_high) {
        s.push_str(&format!(" ({} to {})", signed(lo), signed(hi)));
    }
    if d.clearly_worse {
        s.push_str(&format!(
            ". REGRESSION: {later} answers these questions clearly worse than {earlier} (the whole {:.0}% interval is below zero)",
            confidence * 100.0
        ));
    } else if d.clearly_better {
        s.push_str(&format!(
            "; {later} is clearly better on these questions (the whole interval is above zero)"
        ));
    } else {
        s.push_str("; the data do not show a clear difference");
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    fn key(id: &str, hash: Option<&str>) -> QuestionKey {
        QuestionKey {
            id: id.into(),
            content_hash: hash.map(str::to_string),
            expect: Expect::Answer,
        }
    }

    fn scores(f1: &[Option<f64>]) -> Scores {
        Scores {
            exact_match: f1
                .iter()
                .map(|v| v.map(|x| (x >= 1.0) as u8 as f64))
                .collect(),
            token_f1: f1.to_vec(),
            rouge_l: f1.to_vec(),
            refused: vec![false; f1.len()],
        }
    }

    #[test]
    fn set_change_counts_added_removed_edited_and_unverified() {
        let a = [
            key("q1", Some("h1")),
            key("q2", Some("h2")),
            key("q3", Some("h3")),
            key("q4", None),
        ];
        let b = [
            key("q2", Some("h2")),
            key("q3", Some("h3-edited")),
            key("q4", Some("h4")),
            key("q5", Some("h5")),
            key("q6", Some("h6")),
        ];
        let c = set_change(&a, &b);
        assert_eq!(
            c,
            SetChange {
                added: 2,
                removed: 1,
                edited: 1,
                unverified: 1
            }
        );
        assert_eq!(c.describe(), "2 added, 1 removed, 1 edited, 1 unverified");
        assert!(set_change(&a, &a[..3]).removed == 1);
        assert!(set_change(&b, &b).is_none());
        assert_eq!(set_change(&b, &b).describe(), "unchanged");
    }

    #[test]
    fn common_unchanged_keeps_ids_in_every_revision_with_one_known_hash() {
        let r1 = [
            key("q1", Some("h1")),
            key("q2", Some("h2")),
            key("q3", Some("h3")),
            key("q4", None),
        ];
        let r2 = [
            key("q3", Some("h3")),
            key("q2", Some("h2")),
            key("q1", Some("h1-new")),
            key("q4", None),
        ];
        let r3 = [
            key("q2", Some("h2")),
            key("q3", Some("h3")),
            key("q9", Some("h9")),
        ];
        assert_eq!(common_unchanged(&[&r1, &r2]), vec!["q2", "q3"]);
        assert_eq!(common_unchanged(&[&r1, &r2, &r3]), vec!["q2", "q3"]);
        // Unknown content is never taken as unchanged, even against itself.
        assert_eq!(common_unchanged(&[&r1]), vec!["q1", "q2", "q3"]);
        assert!(common_unchanged(&[]).is_empty());
        // Positions follow each revision's own order.
        assert_eq!(positions(&r2, &["q2", "q3"]), vec![1, 0]);
    }

    #[test]
    fn means_follow_weigh_rules_on_the_chosen_questions() {
        let mut rev = vec![
            key("a", Some("1")),
            key("b", Some("2")),
            key("c", Some("3")),
        ];
        rev[2].expect = Expect::Refuse;
        let base = scores(&[Some(0.5), None, None]);
        let cand = scores(&[Some(1.0), Some(0.25), None]);
        let m = means_at(&rev, &base, &cand, &[0, 1, 2]);
        // Only `a` is in scope with both scores.
        assert_eq!(m.token_f1.n, 1);
        assert_eq!(m.token_f1.baseline, Some(0.5));
        assert_eq!(m.token_f1.candidate, Some(1.0));
        assert_eq!(m.token_f1.lift, Some(0.5));
        let none = means_at(&rev, &base, &cand, &[1, 2]);
        assert_eq!(none.token_f1.n, 0);
        assert_eq!(none.token_f1.baseline, None);
    }

    #[test]
    fn paired_comparison_uses_only_shared_questions_in_each_revisions_order() {
        // The later revision reorders the questions and adds one; the comparison must pair by id.
        let earlier_rev: Vec<QuestionKey> = (0..40)
            .map(|i| key(&format!("q{i}"), Some(&format!("h{i}"))))
            .collect();
        let mut later_rev: Vec<QuestionKey> = earlier_rev.iter().rev().cloned().collect();
        later_rev.push(key("new", Some("hn")));
        let e: Vec<Option<f64>> = (0..40).map(|i| Some(0.5 + 0.01 * (i % 5) as f64)).collect();
        // Later: 0.2 lower on every shared question, whatever the order; the new one scores 1.
        let mut l: Vec<Option<f64>> = (0..40)
            .rev()
            .map(|i| Some(0.3 + 0.01 * (i % 5) as f64 + 0.001 * (i % 3) as f64))
            .collect();
        l.push(Some(1.0));
        let ids = common_unchanged(&[&earlier_rev, &later_rev]);
        assert_eq!(ids.len(), 40);
        let boot = BootSettings {
            resamples: 1000,
            confidence: 0.95,
            seed: 7,
        };
        let c = compare_candidates(
            &earlier_rev,
            &scores(&e),
            &later_rev,
            &scores(&l),
            &ids,
            boot,
            DOMAIN_COMPARISON,
        );
        let d = &c.token_f1;
        assert_eq!(d.n, 40);
        // Mean difference: −0.2 + 0.001 × mean(i mod 3 over 0..40) = −0.2 + 0.001 × 39/40.
        let want = -0.2 + 0.001 * (0..40).map(|i| (i % 3) as f64).sum::<f64>() / 40.0;
        assert!((d.difference.unwrap() - want).abs() < 1e-12);
        assert!(d.clearly_worse && !d.clearly_better);
        assert!(d.ci_low.unwrap() <= want && want <= d.ci_high.unwrap());
        let s = comparison_sentence("run 1", "run 2", 40, Metric::TokenF1, d, 0.95);
        assert!(s.contains("REGRESSION"), "{s}");
        assert!(
            s.starts_with(
                "run 2 vs run 1 on 40 shared unchanged questions: token F1 \u{2212}0.199"
            ),
            "{s}"
        );

        // Same seed, same result; no difference gives a zero-width interval, no flag.
        let again = compare_candidates(
            &earlier_rev,
            &scores(&e),
            &later_rev,
            &scores(&l),
            &ids,
            boot,
            DOMAIN_COMPARISON,
        );
        assert_eq!(again, c);
        let same = compare_candidates(
            &earlier_rev,
            &scores(&e),
            &earlier_rev,
            &scores(&e),
            &ids,
            boot,
            DOMAIN_COMPARISON,
        );
        assert_eq!(same.token_f1.difference, Some(0.0));
        assert!(!same.token_f1.clearly_worse && !same.token_f1.clearly_better);
    }

    #[test]
    fn noisy_equal_candidates_are_not_flagged() {
        let rev: Vec<QuestionKey> = (0..60).map(|i| key(&format!("q{i}"), Some("h"))).collect();
        // Differences alternate +0.3 / −0.3: mean 0, wide interval around it.
        let e: Vec<Option<f64>> = (0..60).map(|_| Some(0.5)).collect();
        let l: Vec<Option<f64>> = (0..60)
            .map(|i| Some(if i % 2 == 0 { 0.8 } else { 0.2 }))
            .collect();
        let ids: Vec<&str> = rev.iter().map(|q| q.id.as_str()).collect();
        let c = compare_candidates(
            &rev,
            &scores(&e),
            &rev,
            &scores(&l),
            &ids,
            BootSettings {
                resamples: 2000,
                confidence: 0.95,
                seed: 3,
            },
            DOMAIN_COMPARISON,
        );
        let d = &c.token_f1;
        assert!(d.difference.unwrap().abs() < 1e-12);
        assert!(d.ci_low.unwrap() < 0.0 && d.ci_high.unwrap() > 0.0);
        assert!(!d.clearly_worse);
        let s = comparison_sentence("run 1", "run 2", 60, Metric::TokenF1, d, 0.95);
        assert!(s.contains("do not show a clear difference"), "{s}");
    }
}
