//! Reading the store back into a [`trend::Trend`]: the runs in time order, the set changes
//! between them, like-for-like means and the candidate comparisons.

use super::*;

/// What `trend` shows.
#[derive(Debug, Clone)]
pub struct TrendOptions {
    /// Only runs of this set name.
    pub set: Option<String>,
    /// Only the last N runs of each set.
    pub last: Option<usize>,
    /// Compare these two runs (ids or labels) instead of consecutive runs.
    pub between: Option<(String, String)>,
    /// Without `between`: only the last N consecutive pairs of each set (None: all).
    pub pairs: Option<usize>,
    pub boot: trend::BootSettings,
}

/// Reads the history and builds the trend.
pub fn build_trend(store: &Store, opts: &TrendOptions) -> Result<trend::Trend> {
    let all = store.runs(opts.set.as_deref())?;
    if all.is_empty() {
        return Err(Error::usage(match &opts.set {
            Some(s) => format!(
                "{}: no recorded runs of the question set {s:?}",
                store.path().display()
            ),
            None => format!("{}: no recorded runs yet", store.path().display()),
        }));
    }
    // Series by set name; the last N of each.
    let mut by_set: BTreeMap<String, Vec<&StoredRun>> = BTreeMap::new();
    for r in &all {
        by_set.entry(r.set_name.clone()).or_default().push(r);
    }
    if let Some(n) = opts.last {
        for runs in by_set.values_mut() {
            let skip = runs.len().saturating_sub(n);
            runs.drain(..skip);
        }
    }
    let mut revisions: BTreeMap<String, Vec<QuestionKey>> = BTreeMap::new();
    for runs in by_set.values() {
        for r in runs {
            if !revisions.contains_key(&r.set_fingerprint) {
                revisions.insert(
                    r.set_fingerprint.clone(),
                    store.revision(&r.set_fingerprint)?,
                );
            }
        }
    }
    let rev = |r: &StoredRun| -> &[QuestionKey] { &revisions[&r.set_fingerprint] };
    let mut scores_cache: BTreeMap<(i64, usize), Scores> = BTreeMap::new();
    let mut series = Vec::new();
    for (name, runs) in &by_set {
        let revs: Vec<&[QuestionKey]> = runs.iter().map(|r| rev(r)).collect();
        // Work per distinct revision, not per run: a long history has few revisions.
        let distinct: std::collections::BTreeSet<&str> =
            runs.iter().map(|r| r.set_fingerprint.as_str()).collect();
        let distinct_revs: Vec<&[QuestionKey]> = distinct
            .iter()
            .map(|fp| revisions[*fp].as_slice())
            .collect();
        let common = trend::common_unchanged(&distinct_revs);
        let at_of: BTreeMap<&str, Vec<usize>> = distinct
            .iter()
            .map(|fp| (*fp, trend::positions(&revisions[*fp], &common)))
            .collect();
        let mut out_runs = Vec::with_capacity(runs.len());
        for (k, r) in runs.iter().enumerate() {
            // The same file fingerprint is the same bytes: unchanged.
            let change = (k > 0).then(|| {
                if runs[k - 1].set_fingerprint == r.set_fingerprint {
                    trend::SetChange::default()
                } else {
                    trend::set_change(revs[k - 1], revs[k])
                }
            });
            let (b, c) = (baseline_idx(r), candidate_idx(r));
            for idx in [b, c] {
                if let Entry::Vacant(e) = scores_cache.entry((r.id, idx)) {
                    e.insert(store.scores(r.id, idx)?);
                }
            }
            let lfl = trend::means_at(
                revs[k],
                &scores_cache[&(r.id, b)],
                &scores_cache[&(r.id, c)],
                &at_of[r.set_fingerprint.as_str()],
            );
            // Only the candidates' grades of the compared runs are needed again.
            scores_cache.remove(&(r.id, b));
            scores_cache.remove(&(r.id, c));
            out_runs.push(trend_run(r, revs[k].len(), change, lfl));
        }
        let set_changed = distinct.len() > 1
            || distinct_revs
                .iter()
                .any(|r| r.iter().any(|q| q.content_hash.is_none()));
        series.push(trend::Series {
            set_name: name.clone(),
            revisions: distinct.len(),
            set_changed,
            common_unchanged_questions: common.len(),
            runs: out_runs,
        });
    }
    // Comparisons.
    let mut pairs: Vec<(&str, &StoredRun, &StoredRun)> = Vec::new();
    if let Some((a, b)) = &opts.between {
        let ra = find_run(&all, a, store.path())?;
        let rb = find_run(&all, b, store.path())?;
        let (earlier, later) =
            if (ra.finished_at.as_str(), ra.id) <= (rb.finished_at.as_str(), rb.id) {
                (ra, rb)
            } else {
                (rb, ra)
            };
        if earlier.id == later.id {
            return Err(Error::usage(format!(
                "--between {a} {b}: both name run {}; give two different runs",
                earlier.id
            )));
        }
        for r in [earlier, later] {
            if !revisions.contains_key(&r.set_fingerprint) {
                revisions.insert(
                    r.set_fingerprint.clone(),
                    store.revision(&r.set_fingerprint)?,
                );
            }
        }
        pairs.push(("between", earlier, later));
    } else {
        for runs in by_set.values() {
            let windows: Vec<&[&StoredRun]> = runs.windows(2).collect();
            let skip = opts.pairs.map_or(0, |n| windows.len().saturating_sub(n));
            for w in &windows[skip..] {
                pairs.push(("consecutive", w[0], w[1]));
            }
        }
    }
    let mut comparisons = Vec::new();
    for (k, (kind, e, l)) in pairs.into_iter().enumerate() {
        let (re, rl) = (
            &revisions[&e.set_fingerprint],
            &revisions[&l.set_fingerprint],
        );
        let ids = trend::common_unchanged(&[re, rl]);
        let (ce, cl) = (candidate_idx(e), candidate_idx(l));
        for (run, idx) in [(e.id, ce), (l.id, cl)] {
            if let Entry::Vacant(e) = scores_cache.entry((run, idx)) {
                e.insert(store.scores(run, idx)?);
            }
        }
        let metrics = trend::compare_candidates(
            re,
            &scores_cache[&(e.id, ce)],
            rl,
            &scores_cache[&(l.id, cl)],
            &ids,
            opts.boot,
            trend::DOMAIN_COMPARISON + k as u32,
        );
        let gate = metric_named(&l.gate_metric).unwrap_or(Metric::TokenF1);
        let d = metrics.get(gate);
        let sentence = trend::comparison_sentence(
            &trend::run_name(e.id, e.label.as_deref()),
            &trend::run_name(l.id, l.label.as_deref()),
            ids.len(),
            gate,
            d,
            opts.boot.confidence,
        );
        comparisons.push(trend::Comparison {
            kind: kind.to_string(),
            earlier: e.id,
            later: l.id,
            earlier_label: e.label.clone(),
            later_label: l.label.clone(),
            shared_questions: ids.len(),
            gate_metric: gate.as_str().to_string(),
            regression: d.clearly_worse,
            metrics: metrics.clone(),
            sentence,
        });
    }
    Ok(trend::Trend {
        format: trend::FORMAT.to_string(),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        history: store.path().display().to_string(),
        comparison_settings: trend::ComparisonSettings {
            resamples: opts.boot.resamples,
            seed: opts.boot.seed,
            confidence: opts.boot.confidence,
            interval: "bca".into(),
            method: "paired bootstrap of the mean per-question difference between the two runs' candidates, on the questions both runs hold with unchanged content (questions resampled with replacement, the three metrics jointly); BCa interval (Efron 1987)".into(),
        },
        series,
        comparisons,
    })
}

fn metric_named(name: &str) -> Option<Metric> {
    Metric::ALL.into_iter().find(|m| m.as_str() == name)
}

fn baseline_idx(r: &StoredRun) -> usize {
    r.variants
        .iter()
        .find(|v| v.role == "baseline")
        .map_or(0, |v| v.idx)
}

/// The run's first candidate.
fn candidate_idx(r: &StoredRun) -> usize {
    r.variants
        .iter()
        .find(|v| v.role == "candidate")
        .map_or(1, |v| v.idx)
}

/// A run by id (digits) or label; a label given to several runs is ambiguous.
fn find_run<'a>(runs: &'a [StoredRun], key: &str, path: &Path) -> Result<&'a StoredRun> {
    if let Ok(id) = key.parse::<i64>() {
        if let Some(r) = runs.iter().find(|r| r.id == id) {
            return Ok(r);
        }
    }
    let labelled: Vec<&StoredRun> = runs
        .iter()
        .filter(|r| r.label.as_deref() == Some(key))
        .collect();
    match labelled.as_slice() {
        [one] => Ok(one),
        [] => Err(Error::usage(format!(
            "--between: no run with id or label {key:?} in {}",
            path.display()
        ))),
        many => Err(Error::usage(format!(
            "--between: the label {key:?} names {} runs ({}); give a run id",
            many.len(),
            many.iter()
                .map(|r| r.id.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ))),
    }
}

fn trend_run(
    r: &StoredRun,
    questions: usize,
    change: Option<trend::SetChange>,
    like_for_like: trend::MetricSet<trend::MeanPair>,
) -> trend::TrendRun {
    let c = candidate_idx(r);
    let metric = |m: Metric| {
        r.metrics
            .iter()
            .find(|(idx, name, _)| *idx == c && name == m.as_str())
            .map(|(_, _, v)| v.clone())
            .unwrap_or_default()
    };
    let variant = |role: &str| r.variants.iter().find(|v| v.role == role);
    let share = |f: fn(&store::StoredVariant) -> (u64, Option<f64>)| trend::SharePair {
        n: variant("baseline")
            .or(variant("candidate"))
            .map_or(0, |v| f(v).0),
        baseline: variant("baseline").and_then(|v| f(v).1),
        candidate: r.variants.iter().find(|v| v.idx == c).and_then(|v| f(v).1),
    };
    trend::TrendRun {
        run: r.id,
        label: r.label.clone(),
        finished_at: r.finished_at.clone(),
        source: r.source.clone(),
        report_dir: r.report_dir.clone(),
        set: trend::SetRevision {
            fingerprint: r.set_fingerprint.clone(),
            short: short(&r.set_fingerprint).to_string(),
            questions,
            change,
        },
        variants: r
            .variants
            .iter()
            .map(|v| trend::VariantInfo {
                index: v.idx,
                role: v.role.clone(),
                name: v.name.clone(),
                kind: v.kind.clone(),
            })
            .collect(),
        gate_metric: r.gate_metric.clone(),
        metrics: trend::MetricSet::from_fn(metric),
        refusal: trend::RefusalShares {
            out_of_scope: share(|v| v.out_of_scope),
            false_refusal: share(|v| v.false_refusal),
        },
        verdict: if r.verdict_go { "GO" } else { "NO-GO" }.to_string(),
        like_for_like,
    }
}

pub(super) fn short(fingerprint: &str) -> &str {
    &fingerprint[..fingerprint.len().min(12)]
}

// ---------------------------------------------------------------------------------------------
// Time.
