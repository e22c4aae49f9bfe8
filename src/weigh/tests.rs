//! Unit tests of the weighing logic on small hand-made grades: the category rules, questions
//! without a score, and which interval the gate reads.

use super::*;
use crate::policy::{IntervalKind, RegressionRule};
use crate::report::summary::{CheckKind, PolicySource};

/// A set of `n` in-scope questions in category "a" (ids q0, q1, ...) followed by `refuse`
/// out-of-scope ones in category "oos".
fn set(n: usize, refuse: usize) -> QuestionSet {
    let mut text = String::new();
    for i in 0..n {
        text.push_str(&format!(
            "{{\"id\":\"q{i}\",\"question\":\"Q{i}?\",\"references\":[\"r\"],\"category\":\"a\"}}\n"
        ));
    }
    for i in 0..refuse {
        text.push_str(&format!(
            "{{\"id\":\"x{i}\",\"question\":\"X{i}?\",\"expect\":\"refuse\",\"category\":\"oos\"}}\n"
        ));
    }
    QuestionSet::parse(Path::new("set.jsonl"), text.as_bytes()).unwrap()
}

/// Grades of `set` with token F1 and ROUGE-L `f1[i]` on in-scope question i (exact match 1 when
/// it is 1), and `refused` on every out-of-scope one.
fn grades(set: &QuestionSet, f1: &[Option<f64>], refused: bool) -> Vec<GradeRecord> {
    set.questions
        .iter()
        .enumerate()
        .map(|(i, q)| {
            let score = if q.expect == Expect::Answer {
                f1[i]
            } else {
                None
            };
            GradeRecord {
                id: q.id.clone(),
                category: q.category.clone(),
                expect: q.expect,
                exact_match: score.map(|s| u8::from(s == 1.0)),
                token_f1: score,
                rouge_l: score,
                refused: q.expect == Expect::Refuse && refused,
                fact_recall: None,
                fact_contradiction: None,
                semantic: None,
                answer: String::new(),
            }
        })
        .collect()
}

fn inputs() -> Inputs {
    let file = |p: &str| InputFile {
        path: p.into(),
        sha256: "0".repeat(64),
    };
    Inputs {
        questions: file("set.jsonl"),
        baseline: file("base.grades"),
        candidate: file("cand.grades"),
        policy: PolicySource {
            path: None,
            sha256: None,
            source: "built-in".into(),
        },
        approximations: vec![],
    }
}

fn run(set: &QuestionSet, base: &[GradeRecord], cand: &[GradeRecord], policy: &Policy) -> Summary {
    weigh(&WeighInput {
        set,
        baseline: base,
        candidate: cand,
        policy,
        settings: Settings::new(2000, 7, 0.95).unwrap(),
        inputs: inputs(),
    })
    .unwrap()
}

/// Scores that alternate around a mean, so the lift interval has width.
fn wobble(n: usize, mean: f64, spread: f64) -> Vec<Option<f64>> {
    (0..n)
        .map(|i| {
            let s = if i % 2 == 0 { spread } else { -spread };
            Some((mean + s * ((i % 5) as f64 / 4.0)).clamp(0.0, 1.0))
        })
        .collect()
}

fn category_check(s: &Summary) -> &Check {
    s.verdict
        .checks
        .iter()
        .find(|c| c.kind() == CheckKind::Category("a"))
        .expect("category a is judged")
}

#[test]
fn a_small_uncertain_loss_fails_non_inferiority_but_not_clear_regression() {
    // 20 questions lose 0.02 on average with a wide spread: the loss is within the 0.05
    // allowance on average, but the interval reaches below −0.05.
    let set = set(20, 0);
    let base = grades(&set, &wobble(20, 0.5, 0.0), false);
    let cand = grades(&set, &wobble(20, 0.48, 0.3), false);
    let mut policy = Policy::default();

    policy.categories.rule = RegressionRule::ClearRegression;
    let s = run(&set, &base, &cand, &policy);
    let c = &s.categories["a"];
    let (lo, hi) = (c.ci_low.unwrap(), c.ci_high.unwrap());
    assert!(
        lo < -0.05 && hi > -0.05,
        "interval {lo} to {hi} straddles the allowance"
    );
    let check = category_check(&s);
    assert!(check.pass, "the data do not show a clear loss beyond 0.05");
    assert_eq!(check.value, Some(hi));
    assert_eq!(check.comparison, Comparison::AtLeast);

    policy.categories.rule = RegressionRule::NonInferiority;
    let s = run(&set, &base, &cand, &policy);
    let check = category_check(&s);
    assert!(!check.pass, "the data cannot rule out a loss beyond 0.05");
    assert_eq!(check.value, Some(lo));
    assert_eq!(check.comparison, Comparison::Above);
    assert!(check
        .reason
        .as_deref()
        .unwrap()
        .contains("may have got worse"));
}

#[test]
fn a_clear_large_loss_fails_both_rules() {
    let set = set(20, 0);
    let base = grades(&set, &wobble(20, 0.8, 0.05), false);
    let cand = grades(&set, &wobble(20, 0.3, 0.05), false);
    for rule in [
        RegressionRule::ClearRegression,
        RegressionRule::NonInferiority,
    ] {
        let mut policy = Policy::default();
        policy.categories.rule = rule;
        let s = run(&set, &base, &cand, &policy);
        assert!(!category_check(&s).pass, "{rule:?}");
        assert!(!s.verdict.go);
    }
}

#[test]
fn categories_below_the_minimum_are_shown_but_not_judged() {
    let set = set(5, 0);
    let base = grades(&set, &wobble(5, 0.9, 0.0), false);
    let cand = grades(&set, &wobble(5, 0.1, 0.0), false);
    let s = run(&set, &base, &cand, &Policy::default());
    assert!(!s.categories["a"].judged);
    assert_eq!(s.categories["a"].n, 5);
    assert!(s
        .verdict
        .checks
        .iter()
        .all(|c| !matches!(c.kind(), CheckKind::Category(_))));
    assert!(s.warnings.iter().any(|w| w.contains("No category has 10")));
}

#[test]
fn unscored_questions_are_left_out_of_the_lift_with_a_warning() {
    let set = set(12, 0);
    let mut f1 = wobble(12, 0.5, 0.2);
    let base = grades(&set, &f1, false);
    // The candidate's grades lack a score on two questions (say, graded against a set whose
    // references were blank there).
    f1[3] = None;
    f1[7] = None;
    let cand = grades(&set, &f1, false);
    let s = run(&set, &base, &cand, &Policy::default());
    assert_eq!(s.metrics.token_f1.n, 10);
    assert_eq!(s.metrics.token_f1.lift, Some(0.0));
    assert!(s
        .warnings
        .iter()
        .any(|w| w.starts_with("2 in-scope question(s) have no token F1 score")));
    // The question count the policy checks is the set's, not the scored ones.
    let min = s
        .verdict
        .checks
        .iter()
        .find(|c| c.kind() == CheckKind::MinQuestions)
        .unwrap();
    assert_eq!(min.value, Some(12.0));
}

#[test]
fn metrics_scored_on_different_questions_are_resampled_one_by_one() {
    // Exact match missing where token F1 is present: the metrics no longer cover the same
    // questions, so each gets its own bootstrap (the joint resampling needs equal rows).
    let set = set(12, 0);
    let base = grades(&set, &wobble(12, 0.4, 0.2), false);
    let mut cand = grades(&set, &wobble(12, 0.6, 0.35), false);
    cand[0].exact_match = None;
    let s = run(&set, &base, &cand, &Policy::default());
    assert_eq!(s.metrics.exact_match.n, 11);
    assert_eq!(s.metrics.token_f1.n, 12);
    let f1 = &s.metrics.token_f1;
    assert!(
        f1.ci_low < f1.ci_high,
        "a varying difference gives an interval of some width"
    );
    for m in [
        &s.metrics.exact_match,
        &s.metrics.token_f1,
        &s.metrics.rouge_l,
    ] {
        let (lo, hi, lift) = (m.ci_low.unwrap(), m.ci_high.unwrap(), m.lift.unwrap());
        assert!(
            lo - 1e-12 <= lift && lift <= hi + 1e-12,
            "{lo} <= {lift} <= {hi}"
        );
    }
}

#[test]
fn no_scored_question_gives_empty_metrics_and_a_failed_lift_check() {
    let set = set(0, 3);
    let base = grades(&set, &[], false);
    let cand = grades(&set, &[], true);
    let s = run(&set, &base, &cand, &Policy::default());
    assert_eq!(s.metrics.token_f1.n, 0);
    assert_eq!(s.metrics.token_f1.lift, None);
    let lift = s
        .verdict
        .checks
        .iter()
        .find(|c| c.kind() == CheckKind::Lift)
        .unwrap();
    assert!(!lift.pass);
    assert!(lift
        .reason
        .as_deref()
        .unwrap()
        .starts_with("No in-scope question"));
    assert_eq!(s.refusal.out_of_scope.candidate.share, Some(1.0));
    // No in-scope questions: the false-refusal share cannot be computed and the check fails.
    assert_eq!(s.refusal.false_refusal.candidate.share, None);
}

#[test]
fn the_gate_reads_the_interval_the_policy_names() {
    let set = set(30, 0);
    let base = grades(&set, &wobble(30, 0.4, 0.3), false);
    let cand = grades(&set, &wobble(30, 0.45, 0.3), false);
    for kind in [IntervalKind::Bca, IntervalKind::Percentile] {
        let mut policy = Policy::default();
        policy.lift.interval = kind;
        let s = run(&set, &base, &cand, &policy);
        let m = &s.metrics.token_f1;
        let want = match kind {
            IntervalKind::Bca => m.bca.unwrap(),
            IntervalKind::Percentile => m.percentile.unwrap(),
        };
        assert_eq!((m.ci_low, m.ci_high), (Some(want.low), Some(want.high)));
        assert_eq!(s.settings.interval, kind);
        let lift = s
            .verdict
            .checks
            .iter()
            .find(|c| c.kind() == CheckKind::Lift)
            .unwrap();
        assert_eq!(lift.value, Some(want.low));
    }
}

/// `grades` with fact scores: recall `recall[i]` and a contradiction where `contra[i]`.
fn with_facts(mut rows: Vec<GradeRecord>, recall: &[f64], contra: &[bool]) -> Vec<GradeRecord> {
    for (i, r) in rows.iter_mut().enumerate() {
        if r.expect == Expect::Answer {
            r.fact_recall = Some(recall[i % recall.len()]);
            r.fact_contradiction = Some(contra[i % contra.len()]);
        }
    }
    rows
}

fn facts_check(s: &Summary) -> Option<&Check> {
    s.verdict
        .checks
        .iter()
        .find(|c| c.kind() == CheckKind::Facts)
}

#[test]
fn facts_are_weighed_only_when_the_grades_hold_them() {
    let set = set(20, 0);
    let base = grades(&set, &wobble(20, 0.5, 0.1), false);
    let cand = grades(&set, &wobble(20, 0.6, 0.1), false);
    let s = run(&set, &base, &cand, &Policy::default());
    assert_eq!(s.facts, None);
    assert!(facts_check(&s).is_none());

    // Baseline: recall 0.5 everywhere, 2 of 20 contradicted; candidate: recall 1 on every
    // other question (mean 0.75), 5 of 20 contradicted (every fourth).
    let base = with_facts(
        base,
        &[0.5],
        &[
            false, false, false, false, false, false, false, false, false, true,
        ],
    );
    let cand = with_facts(cand, &[1.0, 0.5], &[true, false, false, false]);
    let s = run(&set, &base, &cand, &Policy::default());
    let f = s.facts.as_ref().unwrap();
    assert_eq!(f.n, 20);
    assert_eq!(f.recall.baseline, Some(0.5));
    assert_eq!(f.recall.candidate, Some(0.75));
    assert!((f.recall.lift.unwrap() - 0.25).abs() < 1e-12);
    assert!(f.recall.ci_low.unwrap() > 0.0 && f.recall.ci_high.unwrap() <= 0.5 + 1e-12);
    assert_eq!(f.contradiction.baseline.count, 2);
    assert_eq!(f.contradiction.candidate.count, 5);
    assert_eq!(f.contradiction.candidate.share, Some(0.25));
    let iv = crate::stats::proportions::wilson(5, 20, 0.95).unwrap();
    assert_eq!(f.contradiction.candidate.ci_low, Some(iv.low));
    // Not gated unless the policy asks.
    assert!(facts_check(&s).is_none());

    let mut policy = Policy::default();
    policy.facts.max_contradiction_increase = Some(0.0);
    let s = run(&set, &base, &cand, &policy);
    let c = facts_check(&s).unwrap();
    assert!(!c.pass);
    assert!((c.value.unwrap() - 0.15).abs() < 1e-12);
    assert!(
        c.reason.as_deref().unwrap().contains("5 of 20"),
        "{:?}",
        c.reason
    );
    policy.facts.max_contradiction_increase = Some(0.15);
    let s = run(&set, &base, &cand, &policy);
    assert!(facts_check(&s).unwrap().pass);
}

#[test]
fn a_contradiction_check_without_fact_scores_fails_with_a_reason() {
    let set = set(20, 0);
    let base = grades(&set, &wobble(20, 0.5, 0.1), false);
    let cand = grades(&set, &wobble(20, 0.6, 0.1), false);
    let mut policy = Policy::default();
    policy.facts.max_contradiction_increase = Some(0.0);
    let s = run(&set, &base, &cand, &policy);
    let c = facts_check(&s).unwrap();
    assert!(!c.pass);
    assert_eq!(c.value, None);
    assert!(c
        .reason
        .as_deref()
        .unwrap()
        .contains("grade the answers again"));
}

#[test]
fn semantic_scores_are_weighed_only_when_both_variants_have_them_and_can_gate() {
    let set = set(40, 0);
    let base = grades(&set, &wobble(40, 0.5, 0.2), false);
    let cand = grades(&set, &wobble(40, 0.6, 0.2), false);
    let policy = Policy::default();
    let plain = run(&set, &base, &cand, &policy);
    assert!(plain.metrics.semantic.is_none());

    // Semantic scores 0.3 lower than F1 on both sides: the same lift, and the other metrics'
    // figures untouched (semantic similarity is resampled on its own stream).
    let with = |g: &[GradeRecord]| -> Vec<GradeRecord> {
        g.iter()
            .map(|r| GradeRecord {
                semantic: r.token_f1.map(|f| f - 0.3),
                ..r.clone()
            })
            .collect()
    };
    let (sb, sc) = (with(&base), with(&cand));
    let s = run(&set, &sb, &sc, &policy);
    let m = s.metrics.semantic.as_ref().expect("semantic weighed");
    assert!((m.lift.unwrap() - plain.metrics.token_f1.lift.unwrap()).abs() < 1e-12);
    assert_eq!(m.n, 40);
    assert_eq!(s.metrics.token_f1, plain.metrics.token_f1);
    assert_eq!(s.verdict, plain.verdict);

    let mut gate_semantic = Policy::default();
    gate_semantic.lift.metric = Metric::Semantic;
    let gated = run(&set, &sb, &sc, &gate_semantic);
    assert!(gated
        .verdict
        .checks
        .iter()
        .any(|c| c.name == "lift.semantic"));
    // Gating on semantic similarity without it is a usage error, not a silent pass.
    let err = weigh(&WeighInput {
        set: &set,
        baseline: &base,
        candidate: &cand,
        policy: &gate_semantic,
        settings: Settings::new(2000, 7, 0.95).unwrap(),
        inputs: inputs(),
    })
    .unwrap_err();
    assert!(err.to_string().contains("--embedder"), "{err}");
}

#[test]
fn a_large_sets_categories_are_resampled_with_the_metrics() {
    // 12,000 in-scope questions (at least stats::leaves::MIN_ROWS): the categories' resamples
    // and flips come from the metrics' draws. With one category, its resample is the whole
    // set's, so its interval and p-value equal the gate metric's exactly.
    let n = 12_000;
    assert!(n >= leaves::MIN_ROWS);
    let one = set(n, 3);
    let base = grades(&one, &wobble(n, 0.5, 0.3), false);
    let cand = grades(&one, &wobble(n, 0.52, 0.3), false);
    let s = run(&one, &base, &cand, &Policy::default());
    let a = &s.categories["a"];
    assert_eq!(a.n, n);
    assert_eq!(
        (a.ci_low, a.ci_high, a.p_value),
        (
            s.metrics.token_f1.ci_low,
            s.metrics.token_f1.ci_high,
            s.metrics.token_f1.p_value
        )
    );

    // Two categories, "up" gaining 0.05 on every question and "down" losing 0.05 with a
    // spread: each category's interval is its own (around its own lift, of the width its own
    // n gives), and the same whatever the thread count.
    let mut text = String::new();
    for i in 0..n {
        let cat = if i % 2 == 0 { "up" } else { "down" };
        text.push_str(&format!(
            "{{\"id\":\"q{i}\",\"question\":\"Q{i}?\",\"references\":[\"r\"],\"category\":\"{cat}\"}}\n"
        ));
    }
    let two = QuestionSet::parse(Path::new("set.jsonl"), text.as_bytes()).unwrap();
    let b: Vec<Option<f64>> = (0..n).map(|i| Some(0.4 + (i % 7) as f64 * 0.05)).collect();
    let c: Vec<Option<f64>> = (0..n)
        .map(|i| {
            let x = b[i].unwrap();
            Some(if i % 2 == 0 {
                x + 0.05
            } else {
                x - 0.05 + ((i / 2) % 3) as f64 * 0.02 - 0.02
            })
        })
        .collect();
    let base = grades(&two, &b, false);
    let cand = grades(&two, &c, false);
    let s = run(&two, &base, &cand, &Policy::default());
    let up = &s.categories["up"];
    assert_eq!(up.n, n / 2);
    // Every "up" difference is 0.05 up to rounding: an interval of no width at 0.05.
    assert!((up.lift.unwrap() - 0.05).abs() < 1e-12);
    assert!(up.ci_high.unwrap() - up.ci_low.unwrap() < 1e-12);
    let down = &s.categories["down"];
    let lift = down.lift.unwrap();
    assert!((lift + 0.05).abs() < 1e-9, "{lift}");
    // The differences in "down" are −0.07, −0.05, −0.03 in equal shares: sd √(0.0008/3) ≈
    // 0.01633, so the 95 % interval's half-width is 1.96 · 0.01633 / √6000 ≈ 0.000413.
    let half = (down.ci_high.unwrap() - down.ci_low.unwrap()) / 2.0;
    assert!((half - 0.000413).abs() < 0.00003, "{half}");
    assert!(down.p_value.unwrap() < 0.001 && up.p_value.unwrap() < 0.001);
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(1)
        .build()
        .unwrap();
    let again = pool.install(|| run(&two, &base, &cand, &Policy::default()));
    assert_eq!(
        serde_json::to_string(&again).unwrap(),
        serde_json::to_string(&s).unwrap()
    );
}

/// An artifact's questions that score below its source are listed side by side, largest drop
/// first (ties in set order), at most `WORSE_SHOWN`, with the total; questions it scores equal or
/// higher, and out-of-scope ones, are not.
#[test]
fn lift_kept_lists_the_questions_an_artifact_answers_worse() {
    use crate::report::lineup::WORSE_SHOWN;
    let n = 14;
    let s = set(n, 1);
    let base = grades(&s, &vec![Some(0.0); n], true);
    let src = grades(&s, &vec![Some(0.9); n], true);
    // q0: no drop; q1: higher; q2..q13: drops 0.1, 0.2, ... with q5 and q6 tied.
    let mut art_f1: Vec<Option<f64>> = vec![Some(0.9), Some(1.0)];
    art_f1.extend((2..n).map(|i| Some(0.9 - 0.05 * i as f64)));
    art_f1[6] = art_f1[5];
    let mut art = grades(&s, &art_f1, false);
    for (i, g) in art.iter_mut().enumerate() {
        g.answer = format!("artifact answer {i}");
    }
    let kept = lineup::lift_kept_for_tests(&s, &base, "q4", &art, "tuned", &src);
    assert_eq!(kept.worse_total, 12);
    assert_eq!(kept.worse.len(), WORSE_SHOWN);
    let ids: Vec<&str> = kept.worse.iter().map(|w| w.id.as_str()).collect();
    assert_eq!(
        ids,
        ["q13", "q12", "q11", "q10", "q9", "q8", "q7", "q5", "q6", "q4"]
    );
    let top = &kept.worse[0];
    assert_eq!(
        (top.question.as_str(), top.reference.as_str()),
        ("Q13?", "r")
    );
    assert_eq!(top.artifact_answer, "artifact answer 13");
    assert!((top.source_score - 0.9).abs() < 1e-12 && (top.artifact_score - 0.25).abs() < 1e-12);
}
