//! `liftgate answer`: answer every question of a set with one model variant (base, or base +
//! LoRA adapter merged at load), greedy, on CPU (interface.md; issue 3).
//!
//! Two stages as elsewhere: the clap arguments become validated [`AnswerSettings`]; then
//! [`answer_to`] loads model, adapter and tokenizer, builds every prompt first (so a template
//! error stops the run before any work), decodes, saves each answer to the journal
//! (`crate::journal`) as it finishes, and at the end writes the answers file with the
//! [`RunInfo`] beside it. A stopped or killed run is continued by the same command.
//! `vet` calls the same function.

use super::Outcome;
use crate::answers::AnswerRecord;
use crate::chat::ChatTokenizer;
use crate::cli::AnswerArgs;
use crate::error::{Error, Result};
use crate::fsutil;
use crate::generate::{
    self, AdapterInfo, Decoding, FileDigest, GenerationInfo, GenerationSettings, ModelInfo,
    QuestionsInfo, RunInfo, TemplateInfo,
};
use crate::interrupt::StopFlag;
use crate::journal::{self, Contents, Journal, RunIdentity};
use crate::model::{self, WeightFormat};
use crate::questions::QuestionSet;
use indicatif::{ProgressBar, ProgressStyle};
use std::path::{Path, PathBuf};
use std::time::Instant;

/// Validated settings of one answering run.
#[derive(Debug, Clone, PartialEq)]
pub struct AnswerSettings {
    pub model: PathBuf,
    pub adapter: Option<PathBuf>,
    pub system: Option<String>,
    pub decoding: Decoding,
    pub max_new_tokens: usize,
    pub batch: usize,
    /// None: all cores (candle's default).
    pub threads: Option<usize>,
    pub ignore_eos: bool,
    /// Show a progress bar on stderr.
    pub progress: bool,
    /// Discard saved answers of an earlier run instead of continuing it.
    pub restart: bool,
    /// How the runner holds the weights (f32 unless asked otherwise).
    pub weights: WeightFormat,
}

impl AnswerSettings {
    /// Checks paths and numbers; every problem is a usage error (exit 2) naming the path.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        model: &Path,
        adapter: Option<&Path>,
        system: Option<&str>,
        max_new_tokens: usize,
        batch: usize,
        threads: Option<usize>,
        ignore_eos: bool,
    ) -> Result<Self> {
        if !model.is_dir() {
            return Err(Error::usage(format!(
                "--model {}: not a directory (expected a Hugging Face model directory with config.json, *.safetensors, tokenizer.json)",
                model.display()
            )));
        }
        if let Some(a) = adapter {
            if !a.is_dir() {
                return Err(Error::usage(format!(
                    "--adapter {}: not a directory (expected a peft adapter directory with adapter_config.json and adapter_model.safetensors)",
                    a.display()
                )));
            }
        }
        if max_new_tokens == 0 {
            return Err(Error::usage("--max-new-tokens must be at least 1"));
        }
        if batch == 0 {
            return Err(Error::usage("--batch must be at least 1"));
        }
        if threads == Some(0) {
            return Err(Error::usage("--threads must be at least 1"));
        }
        Ok(AnswerSettings {
            model: model.to_path_buf(),
            adapter: adapter.map(Path::to_path_buf),
            system: system.map(str::to_string),
            decoding: Decoding::Greedy,
            max_new_tokens,
            batch,
            threads,
            ignore_eos,
            progress: true,
            restart: false,
            weights: WeightFormat::F32,
        })
    }
}

/// The records of a run and what produced them.
#[derive(Debug, Clone)]
pub struct AnswerRun {
    pub records: Vec<AnswerRecord>,
    pub info: RunInfo,
}

pub fn run(args: &AnswerArgs) -> Result<Outcome> {
    let g = &args.generation;
    let settings = AnswerSettings::new(
        &args.model,
        args.adapter.as_deref(),
        g.system.as_deref(),
        g.max_new_tokens,
        g.batch,
        g.threads,
        g.ignore_eos,
    )?;
    if !args.questions.is_file() {
        return Err(Error::usage(format!(
            "--questions {}: no such file",
            args.questions.display()
        )));
    }
    check_out_path(&args.out, &args.questions)?;
    let settings = AnswerSettings {
        restart: args.restart,
        weights: g.weights,
        ..settings
    };
    let set = QuestionSet::load(&args.questions)?;
    let stop = StopFlag::install()?;
    answer_to(&args.out, &settings, &set, &stop)?;
    Ok(Outcome::Success)
}

/// The output must not be a directory and must not overwrite an input.
fn check_out_path(out: &Path, questions: &Path) -> Result<()> {
    if out.is_dir() {
        return Err(Error::usage(format!(
            "--out {}: is a directory; expected a file path",
            out.display()
        )));
    }
    if fsutil::same_file(out, questions) {
        return Err(Error::usage(format!(
            "--out {} is the --questions file; choose another path so the input is not overwritten",
            out.display()
        )));
    }
    Ok(())
}

/// Sets the compute thread count once per process: rayon's global pool (used by gemm's
/// parallel matmul) and candle's own pool, which reads `RAYON_NUM_THREADS` when first used
/// (candle-core 0.11.1 `utils::get_num_threads`).
fn set_threads(n: Option<usize>) -> usize {
    if let Some(n) = n {
        static ONCE: std::sync::Once = std::sync::Once::new();
        ONCE.call_once(|| {
            std::env::set_var("RAYON_NUM_THREADS", n.to_string());
            // An error means the pool already exists (a second run in one process).
            let _ = rayon::ThreadPoolBuilder::new()
                .num_threads(n)
                .build_global();
        });
    }
    candle_core::utils::get_num_threads()
}

/// What a run needs before decoding: everything loaded and checked, every prompt built.
struct Prepared {
    chat: ChatTokenizer,
    loaded: model::LoadedModel,
    prompts: Vec<Vec<u32>>,
    gen: GenerationSettings,
    info: RunInfo,
}

/// Loads the model (with the adapter merged) and tokenises every prompt; every input error
/// surfaces here, before anything is written.
fn prepare(settings: &AnswerSettings, set: &QuestionSet) -> Result<Prepared> {
    let threads = set_threads(settings.threads);
    // The config first: a wrong or unsupported model fails before the tokenizer is read.
    model::config::ModelSpec::load(&settings.model)?;
    let chat = ChatTokenizer::load(&settings.model)?;
    // Every prompt before any model work: a template error (e.g. a rejected system role) stops
    // the run with nothing computed.
    let mut prompts = Vec::with_capacity(set.len());
    for q in &set.questions {
        let ids = chat
            .encode_prompt(settings.system.as_deref(), &q.question)
            .map_err(|e| match e {
                Error::Input { location, message } => Error::Input {
                    location,
                    message: format!(
                        "{message} (while building the prompt of question {:?}, {}:{})",
                        q.id,
                        set.path.display(),
                        q.line
                    ),
                },
                other => other,
            })?;
        if ids.is_empty() {
            return Err(Error::line(
                &set.path,
                q.line,
                format!("question {:?} gives an empty prompt", q.id),
            ));
        }
        prompts.push(ids);
    }
    let loaded = model::load_as(
        &settings.model,
        settings.adapter.as_deref(),
        settings.weights,
    )?;
    let spec = &loaded.spec;
    if let Some((i, bad)) = prompts.iter().enumerate().find_map(|(i, p)| {
        p.iter()
            .find(|&&t| t as usize >= spec.vocab_size)
            .map(|t| (i, *t))
    }) {
        return Err(Error::file(
            settings.model.join("tokenizer.json"),
            format!(
                "token id {bad} in the prompt of question {:?} is outside the model's vocabulary ({} rows); tokenizer and weights do not belong together",
                set.questions[i].id, spec.vocab_size
            ),
        ));
    }
    if !loaded.generation.unsupported_keys.is_empty() {
        eprintln!(
            "liftgate: warning: {} sets {} which transformers applies even under greedy decoding; liftgate ignores them, so answers may differ from the reference library",
            settings.model.join("generation_config.json").display(),
            loaded.generation.unsupported_keys.join(", ")
        );
    }
    let gen = GenerationSettings {
        decoding: settings.decoding,
        max_new_tokens: settings.max_new_tokens,
        eos: loaded.generation.eos.clone(),
        ignore_eos: settings.ignore_eos,
        repetition_penalty: loaded.generation.repetition_penalty.map(|p| p as f32),
    };
    let info = RunInfo {
        tool: "liftgate".to_string(),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        model: model_info(&settings.model, &loaded)?,
        adapter: loaded.adapter.as_ref().map(|(a, summary)| AdapterInfo {
            path: settings
                .adapter
                .as_deref()
                .map(|p| p.display().to_string())
                .unwrap_or_default(),
            fingerprint: a.fingerprint().to_string(),
            modules_merged: summary.modules_merged,
        }),
        chat_template: TemplateInfo {
            fingerprint: chat.template_fingerprint(),
            from_model: chat.has_template(),
        },
        generation: GenerationInfo {
            decoding: settings.decoding.as_str().to_string(),
            max_new_tokens: settings.max_new_tokens,
            ignore_eos: settings.ignore_eos,
            eos_token_ids: gen.eos.clone(),
            eos_source: if loaded.generation.from_generation_config {
                "generation_config.json".to_string()
            } else {
                "config.json".to_string()
            },
            system: settings.system.clone(),
            repetition_penalty: loaded.generation.repetition_penalty,
            ignored_generation_config_keys: loaded.generation.unsupported_keys.clone(),
            batch: settings.batch,
            threads,
        },
        questions: QuestionsInfo {
            path: set.path.display().to_string(),
            fingerprint: set.fingerprint.clone(),
            count: set.len(),
        },
        compute_dtype: settings.weights.compute_dtype().to_string(),
    };
    Ok(Prepared {
        chat,
        loaded,
        prompts,
        gen,
        info,
    })
}

/// Answers every question of `set` into `out` (and `<out>.run.json`), resumably.
///
/// Each finished answer is appended to the journal `<out>.partial` at once. A journal left by
/// an earlier run with the same [`RunIdentity`] is continued (its questions are not answered
/// again); one from a different run is refused (exit 2) unless `settings.restart`. A complete
/// `<out>` from the same identity is kept as it is. When every question is answered, `<out>`
/// is written in the set's order, atomically, and the journal removed. A stop signal ends the
/// run with [`Error::Interrupted`] after the answer being saved.
pub fn answer_to(
    out: &Path,
    settings: &AnswerSettings,
    set: &QuestionSet,
    stop: &StopFlag,
) -> Result<AnswerRun> {
    let prep = prepare(settings, set)?;
    let identity = RunIdentity::of(&prep.info);
    let jpath = journal::journal_path(out);
    let n = set.len();
    if !settings.restart && !jpath.exists() {
        if let Some(done) = finished_run(out, &identity, set) {
            eprintln!(
                "liftgate: {} is already complete for this model, adapter, question set and settings; kept as it is (pass --restart to answer again)",
                out.display()
            );
            return Ok(done);
        }
    }
    stop.check(|| format!("nothing answered yet; {} not written", out.display()))?;

    let mut journal = Journal::open(&jpath)?;
    let mut rows: Vec<Option<AnswerRecord>> = vec![None; n];
    let contents = if settings.restart {
        None
    } else {
        Some(journal.read(set)?)
    };
    match contents {
        Some(Contents {
            identity: Some(old),
            records,
            valid_len,
            dropped_line,
        }) => {
            check_same_run(&jpath, &old, &identity)?;
            journal.resume(valid_len)?;
            let kept = records.len();
            for (i, row) in records {
                rows[i] = Some(row);
            }
            let dropped = match dropped_line {
                Some(line) => format!(" (line {line}, cut off mid-write, dropped)"),
                None => String::new(),
            };
            eprintln!(
                "liftgate: continuing from {}: {kept} of {n} questions already answered{dropped}",
                jpath.display()
            );
        }
        _ => journal.start(&identity)?,
    }

    let Prepared {
        chat,
        loaded,
        prompts,
        gen,
        info,
    } = prep;
    // Longest prompts first, so the slowest sequences start early and the last slots do not
    // run alone at the end; the answers do not depend on the order.
    let mut todo: Vec<usize> = (0..n).filter(|&i| rows[i].is_none()).collect();
    todo.sort_by_key(|&i| (std::cmp::Reverse(prompts[i].len()), i));
    // Read by both callbacks below, counted by one.
    let saved = std::cell::Cell::new(n - todo.len());
    let saved_note = |saved: usize| {
        format!(
            "{saved} of {n} answers saved in {}; {} not written yet",
            jpath.display(),
            out.display()
        )
    };
    stop.check(|| saved_note(saved.get()))?;
    let bar = progress_bar(settings.progress, n as u64);
    bar.set_position(saved.get() as u64);
    let started = Instant::now();
    let mut new_tokens_total = 0usize;
    let result = if todo.is_empty() {
        Ok(())
    } else {
        generate::generate_stream(
            &loaded.decoder,
            &prompts,
            &todo,
            &gen,
            settings.batch,
            &mut |i, g| {
                let row = answer_record(&chat, &set.questions[i].id, g)?;
                journal.append(&row)?;
                rows[i] = Some(row);
                saved.set(saved.get() + 1);
                bar.inc(1);
                stop.check(|| saved_note(saved.get()))
            },
            &mut |k| {
                new_tokens_total += k;
                let secs = started.elapsed().as_secs_f64().max(1e-9);
                bar.set_message(format!("{:.1} tokens/s", new_tokens_total as f64 / secs));
                // A stop request ends decoding after this step; answers in flight are
                // computed again by the next run.
                stop.check(|| saved_note(saved.get()))
            },
        )
    };
    bar.finish_and_clear();
    result?;
    let secs = started.elapsed().as_secs_f64();
    if settings.progress {
        eprintln!(
            "answered {} questions: {new_tokens_total} new tokens in {secs:.3} s ({:.1} tokens/s)",
            todo.len(),
            new_tokens_total as f64 / secs.max(1e-9)
        );
    }

    let mut records = Vec::with_capacity(n);
    for (q, row) in set.questions.iter().zip(rows) {
        records.push(
            row.ok_or_else(|| Error::internal(format!("question {:?} was not answered", q.id)))?,
        );
    }
    let run = AnswerRun { records, info };
    write_outputs(out, &run)?;
    journal.remove()?;
    Ok(run)
}

/// The answers-file row of one generated answer.
fn answer_record(chat: &ChatTokenizer, id: &str, g: generate::Generated) -> Result<AnswerRecord> {
    let text = chat.decode(g.answer_tokens())?;
    Ok(AnswerRecord {
        id: id.to_string(),
        answer: generate::strip_like_python(&text).to_string(),
        finish: g.finish,
        prompt_tokens: g.prompt_tokens,
        new_tokens: g.tokens.len(),
        ms: g.ms,
    })
}

/// Refuses to continue a journal written by a different run, naming every field that differs.
fn check_same_run(journal: &Path, saved: &RunIdentity, now: &RunIdentity) -> Result<()> {
    let diffs = saved.differences(now);
    let Some((first, _, _)) = diffs.first() else {
        return Ok(());
    };
    let list: Vec<String> = diffs
        .iter()
        .map(|(field, was, is)| format!("{field} was {was}, is now {is}"))
        .collect();
    Err(Error::field(
        journal,
        Some(1),
        format!("identity.{first}"),
        format!(
            "these saved answers come from a different run ({}); rerun with the model, adapter, question set and settings they were made with to continue, or pass --restart to discard them and start over",
            list.join("; ")
        ),
    ))
}

/// A complete `out` whose `<out>.run.json` records the same identity, read back.
fn finished_run(out: &Path, identity: &RunIdentity, set: &QuestionSet) -> Option<AnswerRun> {
    let text = std::fs::read_to_string(run_json_path(out)).ok()?;
    let info: RunInfo = serde_json::from_str(&text).ok()?;
    if RunIdentity::of(&info) != *identity {
        return None;
    }
    let records = crate::answers::load_for_set(out, set).ok()?;
    Some(AnswerRun { records, info })
}

fn progress_bar(show: bool, len: u64) -> ProgressBar {
    if !show {
        return ProgressBar::hidden();
    }
    let bar = ProgressBar::new(len);
    let style = ProgressStyle::with_template(
        "{spinner} answering [{bar:30}] {pos}/{len} questions, {msg}, {elapsed} elapsed, ETA {eta}",
    )
    .unwrap_or_else(|_| ProgressStyle::default_bar())
    .progress_chars("=> ");
    bar.set_style(style);
    bar
}

/// Content fingerprint of the model directory: SHA-256 over the list of (file, SHA-256) for
/// config, generation config, weights (and index) and tokenizer files.
fn model_info(dir: &Path, loaded: &model::LoadedModel) -> Result<ModelInfo> {
    let mut files: Vec<PathBuf> = Vec::new();
    for name in [
        "config.json",
        "generation_config.json",
        "model.safetensors.index.json",
        "tokenizer.json",
        "tokenizer_config.json",
        "special_tokens_map.json",
        "chat_template.jinja",
    ] {
        let p = dir.join(name);
        if p.is_file() {
            files.push(p);
        }
    }
    files.extend(loaded.weight_files.iter().cloned());
    files.sort();
    let mut digests = Vec::with_capacity(files.len());
    let mut manifest = String::new();
    for f in &files {
        let sha = fsutil::sha256_file(f)?;
        let name = f
            .file_name()
            .map(|n| n.to_string_lossy().to_string())
            .unwrap_or_default();
        manifest.push_str(&format!("{name}\t{sha}\n"));
        digests.push(FileDigest { name, sha256: sha });
    }
    Ok(ModelInfo {
        path: dir.display().to_string(),
        fingerprint: fsutil::sha256_hex(manifest.as_bytes()),
        files: digests,
        model_type: loaded.spec.family.model_type().to_string(),
        architecture: loaded.spec.family.architecture().to_string(),
        stored_dtype: loaded.stored_dtype.clone(),
    })
}

/// `<out>` (JSONL) and `<out>.run.json`, each written atomically.
pub fn write_outputs(out: &Path, run: &AnswerRun) -> Result<()> {
    let run_path = run_json_path(out);
    let json = serde_json::to_vec_pretty(&run.info)
        .map_err(|e| Error::internal(format!("cannot serialise run.json: {e}")))?;
    fsutil::write_jsonl_atomic(out, &run.records)?;
    fsutil::write_atomic(&run_path, &json)
}

/// `<out>.run.json` beside the answers file.
pub fn run_json_path(out: &Path) -> PathBuf {
    let mut s = out.as_os_str().to_os_string();
    s.push(".run.json");
    PathBuf::from(s)
}
