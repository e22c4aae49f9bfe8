//! `liftgate vet`: the whole job in one command. Answer the held-out set with the baseline and
//! every candidate (base + adapter, merged checkpoints, ...), grade each, weigh each candidate
//! against the baseline, write everything into one report directory and print the verdict.
//! The stages are the same functions `answer`, `grade` and `weigh` call; with several
//! candidates `weigh::lineup` adds the Holm check and "lift kept", and each candidate's full
//! report goes into `<name>/`.
//!
//! With no `--model/--adapter/--questions` it runs the bundled demo: the Tidewren Ferry
//! Cooperative base model and adapter under `demo/models/` and `eval-sets/ferry-faq.jsonl`.
//!
//! Every input is checked before a report directory is claimed (`report::dir`); if a later
//! stage of a new run fails the directory is removed again, so a failed run leaves nothing
//! half-written. A run stopped by Ctrl-C/SIGTERM or killed keeps its directory: the answers are
//! saved one by one in journals, and the same command continues it, in `--report DIR` when
//! given, else in the newest unfinished directory under `reports/` made for the same question
//! set and generation settings.

use super::args::{self, NamedVariant};
use super::Outcome;
use crate::answer::{self, Member};
use crate::cli::VetArgs;
use crate::embed::Embedder;
use crate::error::{Error, Result};
use crate::formats::questions::QuestionSet;
use crate::fsutil;
use crate::grade;
use crate::history::{self, RecordOptions};
use crate::interrupt::StopFlag;
use crate::model::lora::Adapter;
use crate::model::{BaseQuant, Merge};
use crate::policy::Policy;
use crate::report::summary::Leakage;
use crate::report::{self, dir};
use crate::score::RefusalDetector;
use crate::weigh::lineup::Candidate;
use crate::weigh::{self, WeighInput};
use std::path::{Path, PathBuf};

/// The bundled demo, relative to the project root.
const DEMO_MODEL: &str = "demo/models/base";
const DEMO_ADAPTER: &str = "demo/models/adapter";
const DEMO_QUESTIONS: &str = "eval-sets/ferry-faq.jsonl";
/// Demo answers are one or two sentences; the cap keeps the demo quick.
const DEMO_MAX_NEW_TOKENS: usize = 48;
/// The name of the candidate `--adapter` gives.
const DEFAULT_CANDIDATE: &str = "candidate";

/// Everything a vet run needs, checked against each other before any work.
struct Settings {
    /// Where the finished run is recorded; None with --no-history.
    history: Option<RecordOptions>,
    /// The baseline first, then the candidates; names unique.
    variants: Vec<NamedVariant>,
    questions: PathBuf,
    stats: weigh::Settings,
    policy: Policy,
}

/// The demo when no model is given, else the user's paths (clap makes --model and --questions
/// go together).
fn settings(args: &VetArgs) -> Result<Settings> {
    let (model, adapter, questions, generation) = match (&args.model, &args.questions) {
        (Some(model), Some(questions)) => (
            model.clone(),
            args.adapter.clone(),
            questions.clone(),
            args::default_generation(&args.generation)?,
        ),
        (None, None) if args.adapter.is_none() => {
            let root = demo_root().ok_or_else(|| {
                Error::usage(format!(
                    "the bundled demo was not found: run `liftgate vet` from the liftgate project directory (it needs {DEMO_MODEL}, {DEMO_ADAPTER} and {DEMO_QUESTIONS}), or give --model, --adapter and --questions"
                ))
            })?;
            (
                root.join(DEMO_MODEL),
                Some(root.join(DEMO_ADAPTER)),
                root.join(DEMO_QUESTIONS),
                args::generation(&args.generation, DEMO_MAX_NEW_TOKENS)?,
            )
        }
        _ => {
            return Err(Error::usage(
                "give --model and --questions with --adapter or --candidate, or none of --model, --adapter and --questions to run the bundled demo",
            ))
        }
    };
    args::check_name("--baseline-name", &args.baseline_name)?;
    let mut baseline = answer::Settings::new(
        &model,
        None,
        Merge::Unmerged,
        generation.clone(),
        args.restart,
    )?;
    baseline.name = Some(args.baseline_name.clone());
    let mut variants = vec![NamedVariant {
        settings: baseline,
        from: None,
    }];
    if let Some(adapter) = &adapter {
        let mut candidate = answer::Settings::new(
            &model,
            Some(adapter),
            Merge::Unmerged,
            generation.clone(),
            args.restart,
        )?;
        candidate.name = Some(DEFAULT_CANDIDATE.to_string());
        variants.push(NamedVariant {
            settings: candidate,
            from: None,
        });
    }
    for spec in &args.candidate {
        variants.push(args::candidate(spec, &model, &generation, args.restart)?);
    }
    if variants.len() < 2 {
        return Err(Error::usage(
            "nothing to compare: give --adapter DIR or at least one --candidate SPEC",
        ));
    }
    check_names(&mut variants)?;
    if !questions.is_file() {
        return Err(Error::usage(format!(
            "--questions {}: no such file",
            questions.display()
        )));
    }
    let (stats, policy) = args::stats(&args.stats)?;
    let reports_parent = args
        .report
        .as_deref()
        .map_or("reports".into(), history::parent_of);
    let history = RecordOptions::resolve(&args.history, &reports_parent, "vet")?;
    Ok(Settings {
        history,
        variants,
        questions,
        stats,
        policy,
    })
}

/// Names must be unique (they name files), and `from=` must name another candidate. An
/// artifact of the same adapter as an unmerged candidate comes from it unless `from=` says
/// otherwise.
fn check_names(variants: &mut [NamedVariant]) -> Result<()> {
    let names: Vec<String> = variants.iter().map(|v| name_of(v).to_string()).collect();
    for (i, n) in names.iter().enumerate() {
        if names[..i].iter().any(|m| m.eq_ignore_ascii_case(n)) {
            return Err(Error::usage(format!(
                "the name `{n}` is used by two variants (names are file names and report rows, so each must be unique, ignoring case); set name= in --candidate, or --baseline-name"
            )));
        }
    }
    for i in 1..variants.len() {
        if let Some(f) = &variants[i].from {
            if !names[1..].iter().any(|m| m == f) || f == &names[i] {
                return Err(Error::usage(format!(
                    "--candidate name={}: from={f} names no other candidate (candidates: {})",
                    names[i],
                    names[1..].join(", ")
                )));
            }
            continue;
        }
        let s = &variants[i].settings;
        if s.merge == Merge::Unmerged || s.adapter.is_none() {
            continue;
        }
        let same = |a: &Path, b: &Path| {
            a == b || matches!((a.canonicalize(), b.canonicalize()), (Ok(x), Ok(y)) if x == y)
        };
        let source = (1..variants.len()).find(|&j| {
            let t = &variants[j].settings;
            j != i
                && t.merge == Merge::Unmerged
                && same(&t.model, &s.model)
                && matches!((&t.adapter, &s.adapter), (Some(x), Some(y)) if same(x, y))
        });
        variants[i].from = source.map(|j| names[j].clone());
    }
    Ok(())
}

fn name_of(v: &NamedVariant) -> &str {
    v.settings.name.as_deref().unwrap_or(DEFAULT_CANDIDATE)
}

/// The variant in words, for the report.
fn describe(s: &answer::Settings) -> String {
    if let Some(g) = &s.gguf {
        if s.gguf_tokenizer {
            return format!("GGUF {} (its own tokenizer)", g.display());
        }
        return format!("GGUF {} (tokenizer of {})", g.display(), s.model.display());
    }
    let base = match s.base {
        None => s.model.display().to_string(),
        Some(q) => format!("{} in {}", s.model.display(), q.describe()),
    };
    match (&s.adapter, s.merge) {
        (None, _) => format!("model {base}"),
        (Some(a), m) => format!("{base} + adapter {}, {}", a.display(), m.describe()),
    }
}

/// Which variants share one loaded copy of their base: the unmerged variants of one model
/// directory (adapters that can only be merged excepted) answer together; every other variant
/// answers alone. Groups come in the order of their first variant.
fn groups(variants: &[NamedVariant]) -> Result<Vec<Vec<usize>>> {
    // Key: the model directory and how its base is held; None: a variant that answers alone.
    type Key = Option<(PathBuf, Option<BaseQuant>)>;
    let mut out: Vec<(Key, Vec<usize>)> = Vec::new();
    for (i, v) in variants.iter().enumerate() {
        let s = &v.settings;
        let shares = s.merge == Merge::Unmerged
            && s.gguf.is_none()
            && match &s.adapter {
                None => true,
                Some(a) => Adapter::load(a)?.needs_merge().is_none(),
            };
        let key = shares.then(|| {
            (
                s.model.canonicalize().unwrap_or_else(|_| s.model.clone()),
                s.base,
            )
        });
        match out.iter_mut().find(|(k, _)| key.is_some() && *k == key) {
            Some((_, members)) => members.push(i),
            None => out.push((key, vec![i])),
        }
    }
    Ok(out.into_iter().map(|(_, m)| m).collect())
}

pub fn run(args: &VetArgs) -> Result<Outcome> {
    let settings = settings(args)?;
    let set = QuestionSet::load(&settings.questions)?;
    // Grading needs references: refuse before hours of answering, not after.
    set.check_references()?;
    // Likewise a bad embedding model directory, or a policy gating on a score that needs one.
    let embedder = args.embedder.as_deref().map(Embedder::load).transpose()?;
    // And a bad training file.
    let leakage = args
        .train
        .as_deref()
        .map(|t| leakage(&set, t, embedder.as_ref()))
        .transpose()?;
    if settings.policy.lift.metric == crate::policy::Metric::Semantic && embedder.is_none() {
        return Err(Error::usage(
            "the policy gates on semantic similarity (lift.metric = \"semantic\"), which needs --embedder DIR",
        ));
    }
    let stop = StopFlag::install()?;
    if let Some((spec, from)) =
        super::answer::shard_spec(args.shard.as_deref(), |k| std::env::var(k).ok())?
    {
        return answer_shard(args, &settings, &set, spec, &from, &stop);
    }

    let reports = Path::new("reports");
    let name = dir::set_name(&settings.questions);
    let generation = &settings.variants[0].settings.generation;
    let unfinished = match (&args.report, args.restart) {
        (None, false) => dir::find_unfinished(reports, &name, &set, generation),
        _ => None,
    };
    let claim = match (&args.report, unfinished) {
        (Some(given), _) => dir::claim_given_dir(given)?,
        (None, Some(claim)) => claim,
        (None, None) => dir::claim_dated_dir(reports, &name)?,
    };
    if claim.fresh {
        eprintln!("liftgate: vet: report directory {}", claim.dir.display());
    } else {
        eprintln!(
            "liftgate: vet: continuing the unfinished run in {} (pass --restart to start over)",
            claim.dir.display()
        );
    }
    match vet_into(
        &claim.dir,
        &settings,
        &set,
        args,
        leakage,
        embedder.as_ref(),
        &stop,
    ) {
        Ok(outcome) => Ok(outcome),
        Err(e @ Error::Interrupted { .. }) => Err(e),
        Err(e) => {
            claim.discard_if_fresh();
            Err(e)
        }
    }
}

/// One task of a job array: every variant answers shard `spec` of the set into
/// `--report DIR`/shards (one copy of each base, as a whole run), nothing is graded or weighed.
/// Tasks of one array write into the same directory at once, so none of them claims it; each
/// shard file has its own journal lock.
fn answer_shard(
    args: &VetArgs,
    settings: &Settings,
    set: &QuestionSet,
    spec: answer::ShardSpec,
    from: &str,
    stop: &StopFlag,
) -> Result<Outcome> {
    let report = args.report.as_deref().ok_or_else(|| {
        Error::usage(format!(
            "{from}: the tasks of a job array must write into one directory: give --report DIR on storage every task sees"
        ))
    })?;
    if report.join("summary.json").exists() || report.join("report.md").exists() {
        return Err(Error::usage(format!(
            "--report {}: already holds a finished report; choose a new directory for this job array",
            report.display()
        )));
    }
    let shards = report.join(dir::SHARDS_DIR);
    fsutil::create_dir(&shards)?;
    let info = answer::Split::of(set, spec.count)?.info(spec.index);
    eprintln!(
        "liftgate: vet: answering shard {} of {} (counted from 0; taken from {from}): {} of the {} questions, split {}",
        spec.index,
        spec.count,
        info.questions,
        set.len(),
        info.split.chars().take(12).collect::<String>()
    );
    let variants: Vec<answer::Settings> = settings
        .variants
        .iter()
        .map(|v| answer::Settings {
            shard: Some(spec),
            ..v.settings.clone()
        })
        .collect();
    let outs: Vec<PathBuf> = settings
        .variants
        .iter()
        .map(|v| shards.join(dir::shard_answers_file(name_of(v), spec.index, spec.count)))
        .collect();
    for group in groups(&settings.variants)? {
        stop.check(|| format!("the answers saved so far are kept in {}", shards.display()))?;
        let members: Vec<Member> = group
            .iter()
            .map(|&i| Member {
                out: &outs[i],
                settings: &variants[i],
                gathered: false,
            })
            .collect();
        answer::answer_group(&members, set, stop)?;
    }
    eprintln!(
        "liftgate: vet: shard {} of {} answered into {}; when every shard is answered, run the same command without --shard to gather, grade and weigh",
        spec.index,
        spec.count,
        shards.display()
    );
    Ok(Outcome::Success)
}

/// Joins the shard answers under `dir`/shards of every variant that has no answers file yet
/// (exit 2 naming a missing, unfinished or foreign shard); returns which variants were gathered.
fn gather_shards(dir: &Path, names: &[&str], set: &QuestionSet) -> Result<Vec<bool>> {
    let mut gathered = vec![false; names.len()];
    if !dir::has_shards(dir) {
        return Ok(gathered);
    }
    for (i, n) in names.iter().enumerate() {
        let out = dir.join(dir::answers_file(n));
        let parts = dir::shard_files(dir, n);
        if parts.is_empty() {
            return Err(Error::usage(format!(
                "{}: holds shard answers, but none of {n} (files {n}.K-of-N.answers.jsonl): answer every shard with every variant of this command (vet --shard) before gathering",
                dir.join(dir::SHARDS_DIR).display()
            )));
        }
        if !out.exists() {
            eprintln!(
                "liftgate: vet: gathering {} shard answers files of {n}",
                parts.len()
            );
            answer::gather(set, &parts, &out)?;
        }
        gathered[i] = true;
    }
    Ok(gathered)
}

fn vet_into(
    dir: &Path,
    settings: &Settings,
    set: &QuestionSet,
    args: &VetArgs,
    leakage: Option<Leakage>,
    embedder: Option<&Embedder>,
    stop: &StopFlag,
) -> Result<Outcome> {
    let variants = &settings.variants;
    let names: Vec<&str> = variants.iter().map(name_of).collect();
    let answers_paths: Vec<PathBuf> = names
        .iter()
        .map(|n| dir.join(dir::answers_file(n)))
        .collect();
    let gathered = gather_shards(dir, &names, set)?;
    let mut runs: Vec<Option<answer::AnswerRun>> = vec![None; variants.len()];
    for group in groups(variants)? {
        stop.check(|| format!("the answers saved so far are kept in {}", dir.display()))?;
        let who: Vec<&str> = group.iter().map(|&i| names[i]).collect();
        eprintln!(
            "liftgate: vet: answering {} questions with {}{}",
            set.len(),
            who.join(", "),
            if group.len() > 1 {
                " (one copy of the base, rows of each variant in the same steps)"
            } else {
                ""
            }
        );
        let members: Vec<Member> = group
            .iter()
            .map(|&i| Member {
                out: &answers_paths[i],
                settings: &variants[i].settings,
                gathered: gathered[i],
            })
            .collect();
        let got = answer::answer_group(&members, set, stop)?;
        for (&i, run) in group.iter().zip(got) {
            runs[i] = Some(run);
        }
    }
    let runs: Vec<answer::AnswerRun> = runs
        .into_iter()
        .map(|r| r.ok_or_else(|| Error::internal("a variant was not answered")))
        .collect::<Result<_>>()?;
    stop.check(|| format!("all answers are saved in {}", dir.display()))?;
    // Per variant: what its comparison also measures besides the weights.
    let template_warnings = template_warnings(&names, &runs);
    for w in template_warnings.iter().flatten() {
        eprintln!("liftgate: warning: {w}");
    }

    let detector = RefusalDetector::with_extra_phrases(&settings.policy.refusal.extra_phrases);
    let mut graded = Vec::with_capacity(runs.len());
    for (n, run) in names.iter().zip(&runs) {
        let semantic = embedder
            .map(|e| grade::semantic_scores(e, set, &run.records))
            .transpose()?;
        let grades = grade::grade_set(set, &run.records, &detector, semantic.as_deref());
        let grades_path = dir.join(dir::grades_file(n));
        let answers_path = dir.join(dir::answers_file(n));
        grade::write_grades(&grades_path, &grades, set, &answers_path, embedder)?;
        graded.push((grades_path, grades));
    }
    eprintln!(
        "liftgate: vet: weighing ({} resamples, seed {})",
        settings.stats.resamples, settings.stats.seed
    );
    let (baseline_path, baseline) = &graded[0];
    let mut summaries = Vec::with_capacity(graded.len() - 1);
    for ((candidate_path, candidate), warnings) in graded[1..].iter().zip(&template_warnings[1..]) {
        let inputs = weigh::describe_inputs(
            set,
            baseline_path,
            candidate_path,
            args.stats.policy.as_deref(),
        )?;
        let mut summary = weigh::weigh(&WeighInput {
            set,
            baseline,
            candidate,
            policy: &settings.policy,
            settings: settings.stats,
            inputs,
        })?;
        summary.warnings.extend(warnings.iter().cloned());
        if let Some(l) = &leakage {
            let semantic = l.semantic.unwrap_or(0);
            let flagged = l.exact + l.normalised + l.near + semantic;
            if flagged > 0 {
                let by_meaning = match (l.semantic, l.cosine_threshold) {
                    (Some(n), Some(c)) => format!(", {n} by embedding cosine >= {c}"),
                    _ => String::new(),
                };
                summary.warnings.push(format!(
                    "{flagged} held-out question(s) repeat or closely reword a question of the training file {} ({} exact, {} after normalising, {} near duplicates{by_meaning}): the fine-tune may have seen their answers, which inflates the lift. List them with `liftgate leaks`.",
                    l.train.path, l.exact, l.normalised, l.near
                ));
            }
            summary.leakage = Some(l.clone());
        }
        summaries.push(summary);
    }
    if summaries.len() == 1 {
        let summary = &summaries[0];
        let (candidate_path, candidate) = &graded[1];
        report::write_report_dir(dir, summary)?;
        let graded = history::two((baseline, baseline_path), (candidate, candidate_path));
        history::record_after_report(settings.history.as_ref(), set, &graded, summary, dir);
        print!("{}", report::terminal::render(summary));
        println!("report: {}", dir.join("report.md").display());
        return Ok(Outcome::from_verdict(summary.verdict.go));
    }

    let mut candidates: Vec<Candidate> = summaries
        .iter_mut()
        .zip(&graded[1..])
        .zip(&variants[1..])
        .map(|((summary, (_, grades)), v)| Candidate {
            name: name_of(v),
            describe: describe(&v.settings),
            from: v.from.as_deref(),
            grades,
            summary,
        })
        .collect();
    let lineup = weigh::lineup::lineup(
        set,
        names[0],
        describe(&variants[0].settings),
        baseline,
        &mut candidates,
        &settings.policy,
        settings.stats,
    );
    drop(candidates);
    for (summary, n) in summaries.iter().zip(&names[1..]) {
        let sub = dir.join(n);
        fsutil::create_dir(&sub)?;
        report::write_report_dir(&sub, summary)?;
    }
    report::lineup::write(dir, &lineup)?;
    for ((summary, (candidate_path, candidate)), n) in
        summaries.iter().zip(&graded[1..]).zip(&names[1..])
    {
        let opts = settings.history.as_ref().map(|o| o.for_candidate(n));
        let pair = history::two((baseline, baseline_path), (candidate, candidate_path));
        history::record_after_report(opts.as_ref(), set, &pair, summary, &dir.join(n));
    }
    print!("{}", report::lineup::terminal(&lineup));
    println!("report: {}", dir.join("report.md").display());
    Ok(Outcome::from_verdict(lineup.go))
}

/// A candidate whose chat template or tokenizer differs from the baseline's is also measured
/// on that difference: say so, in that candidate's warnings (one list per variant; the
/// baseline's is empty).
fn template_warnings(names: &[&str], runs: &[answer::AnswerRun]) -> Vec<Vec<String>> {
    let tokenizer = |r: &answer::AnswerRun| {
        r.info
            .model
            .files
            .iter()
            .find(|f| f.name == "tokenizer.json")
            .map(|f| f.sha256.clone())
    };
    let base = &runs[0].info;
    let mut out = vec![Vec::new()];
    for (n, r) in names.iter().zip(runs).skip(1) {
        let mut mine = Vec::new();
        if r.info.chat_template.fingerprint != base.chat_template.fingerprint {
            mine.push(format!(
                "{n} renders prompts with another chat template than {} ({} against {}): the comparison then measures the template as well as the weights.",
                names[0], r.info.model.path, base.model.path
            ));
        }
        if tokenizer(r) != tokenizer(&runs[0]) {
            mine.push(format!(
                "{n} has another tokenizer.json than {} ({} against {}): the comparison then measures the tokenizer as well as the weights.",
                names[0], r.info.model.path, base.model.path
            ));
        }
        out.push(mine);
    }
    out
}

/// The project directory holding the demo: the current directory when it has one, else the
/// directory this binary was built from.
fn demo_root() -> Option<PathBuf> {
    let has_demo = |root: &Path| root.join(DEMO_MODEL).join("config.json").is_file();
    let cwd = PathBuf::from(".");
    if has_demo(&cwd) {
        return Some(cwd);
    }
    let built = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    has_demo(&built).then_some(built)
}

/// The leak check of `--train`: counts by kind and the flagged ids.
/// With an embedding model, also the questions flagged by embedding cosine alone, at the
/// `leaks` command's default threshold.
fn leakage(set: &QuestionSet, train: &Path, embedder: Option<&Embedder>) -> Result<Leakage> {
    use crate::score::leaks::{find_leaks, LeakKind, DEFAULT_COSINE_THRESHOLD, DEFAULT_THRESHOLD};
    let rows = crate::formats::training::load_questions(train)?;
    let questions: Vec<&str> = set.questions.iter().map(|q| q.question.as_str()).collect();
    let texts: Vec<&str> = rows.iter().map(|(_, t)| t.as_str()).collect();
    let mut leaks = find_leaks(&questions, &texts, DEFAULT_THRESHOLD);
    if let Some(e) = embedder {
        super::leaks::add_semantic(e, &questions, &texts, DEFAULT_COSINE_THRESHOLD, &mut leaks)?;
    }
    let count = |k: LeakKind| leaks.iter().filter(|l| l.kind == k).count();
    Ok(Leakage {
        train: crate::formats::run_record::InputFile {
            path: train.display().to_string(),
            sha256: crate::fsutil::sha256_file(train)?,
        },
        exact: count(LeakKind::Exact),
        normalised: count(LeakKind::Normalised),
        near: count(LeakKind::Near),
        threshold: DEFAULT_THRESHOLD,
        semantic: embedder.map(|_| count(LeakKind::Semantic)),
        cosine_threshold: embedder.map(|_| DEFAULT_COSINE_THRESHOLD),
        ids: leaks
            .iter()
            .map(|l| set.questions[l.question].id.clone())
            .collect(),
    })
}
