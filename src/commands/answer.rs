//! `liftgate answer`: answer every question of a set with one model variant (base, or base +
//! LoRA adapter merged at load), greedy, on CPU (interface.md; issue 3).
//!
//! Two stages as elsewhere: the clap arguments become validated [`AnswerSettings`]; then
//! [`answer_set`] loads model, adapter and tokenizer, builds every prompt first (so a template
//! error stops the run before any work), decodes in batches and returns the records with the
//! [`RunInfo`] that [`write_outputs`] stores beside them. `vet` calls the same two functions.

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
use crate::model;
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
    check_out_path(&args.out)?;
    let set = QuestionSet::load(&args.questions)?;
    let run = answer_set(&settings, &set)?;
    write_outputs(&args.out, &run)?;
    Ok(Outcome::Success)
}

/// The output must not be a directory and must not overwrite an input.
fn check_out_path(out: &Path) -> Result<()> {
    if out.is_dir() {
        return Err(Error::usage(format!(
            "--out {}: is a directory; expected a file path",
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

/// Loads the model (with the adapter merged), tokenises every prompt, decodes in batches.
pub fn answer_set(settings: &AnswerSettings, set: &QuestionSet) -> Result<AnswerRun> {
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
    let loaded = model::load(&settings.model, settings.adapter.as_deref())?;
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

    // Batches of similar prompt lengths waste less on padding; output does not depend on it.
    let mut order: Vec<usize> = (0..prompts.len()).collect();
    order.sort_by_key(|&i| (prompts[i].len(), i));
    let bar = progress_bar(settings.progress, set.len() as u64);
    let started = Instant::now();
    let mut new_tokens_total = 0usize;
    let mut results: Vec<Option<generate::Generated>> = vec![None; prompts.len()];
    generate::generate_stream(
        &loaded.decoder,
        &prompts,
        &order,
        &gen,
        settings.batch,
        &mut |i, g| {
            results[i] = Some(g);
            bar.inc(1);
            Ok(())
        },
        &mut |n| {
            new_tokens_total += n;
            let secs = started.elapsed().as_secs_f64().max(1e-9);
            bar.set_message(format!("{:.1} tokens/s", new_tokens_total as f64 / secs));
        },
    )?;
    bar.finish_and_clear();
    let secs = started.elapsed().as_secs_f64();
    if settings.progress {
        eprintln!(
            "answered {} questions: {new_tokens_total} new tokens in {secs:.3} s ({:.1} tokens/s)",
            set.len(),
            new_tokens_total as f64 / secs.max(1e-9)
        );
    }

    let mut records = Vec::with_capacity(set.len());
    for (q, g) in set.questions.iter().zip(results) {
        let g =
            g.ok_or_else(|| Error::internal(format!("question {:?} was not answered", q.id)))?;
        let text = chat.decode(g.answer_tokens())?;
        records.push(AnswerRecord {
            id: q.id.clone(),
            answer: generate::strip_like_python(&text).to_string(),
            finish: g.finish,
            prompt_tokens: g.prompt_tokens,
            new_tokens: g.tokens.len(),
            ms: g.ms,
        });
    }

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
        compute_dtype: "f32".to_string(),
    };
    Ok(AnswerRun { records, info })
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
