//! One answering run: load the variant, decode every question, save each answer to the resume
//! journal as it finishes (`crate::formats::journal`), and write the answers file with its run
//! record at the end. A stopped or killed run is continued by the same command.

use super::generate::{self, GenerationSettings, Job};
use super::{prompts, Settings, Split};
use crate::chat::ChatTokenizer;
use crate::error::{Error, Result};
use crate::formats::answers::{self, AnswerRecord};
use crate::formats::journal::{self, Contents, Journal, RunIdentity};
use crate::formats::questions::QuestionSet;
use crate::formats::run_record::{
    self, AdapterInfo, BaseQuantInfo, FileDigest, GenerationInfo, ModelInfo, QuestionsInfo,
    RunInfo, ShardInfo, TemplateInfo,
};
use crate::fsutil;
use crate::interrupt::StopFlag;
use crate::model::{self, Merge};
use indicatif::{ProgressBar, ProgressStyle};
use std::borrow::Cow;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// The records of a run and what produced them.
#[derive(Debug, Clone)]
pub struct AnswerRun {
    pub records: Vec<AnswerRecord>,
    pub info: RunInfo,
}

/// Sets the compute thread count once per process: rayon's global pool (used by the
/// products, one task per weight panel) and candle's own pool, which reads `RAYON_NUM_THREADS` when first used
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
    /// Per variant.
    infos: Vec<RunInfo>,
}

/// Loads the model (one copy of the base with every variant's adapter) and tokenises every
/// prompt of `part` (the whole `set`, or one shard of it); every input error surfaces here,
/// before anything is written.
fn prepare(
    members: &[Member],
    set: &QuestionSet,
    part: &QuestionSet,
    shard: Option<&ShardInfo>,
) -> Result<Prepared> {
    let first = members
        .first()
        .ok_or_else(|| Error::internal("an answering group needs a variant"))?
        .settings;
    if members.iter().any(|m| {
        m.settings.model != first.model
            || m.settings.generation != first.generation
            || m.settings.shard != first.shard
            || m.settings.base != first.base
            || m.settings.gguf != first.gguf
            || m.settings.gguf_tokenizer != first.gguf_tokenizer
            || (members.len() > 1
                && (m.settings.merge != Merge::Unmerged || m.settings.gguf.is_some()))
    }) {
        return Err(Error::internal(
            "the variants of one answering group must share model, base, generation, shard and be unmerged",
        ));
    }
    let g = &first.generation;
    let threads = set_threads(g.threads);
    // The config first: a wrong or unsupported model fails before the tokenizer is read.
    let gguf = match &first.gguf {
        Some(path) => Some(model::gguf::GgufFile::open(path)?),
        None => None,
    };
    match &gguf {
        Some(g) => {
            g.spec()?;
        }
        None => {
            model::config::ModelSpec::load(&first.model)?;
        }
    }
    let chat = match &gguf {
        Some(g) if first.gguf_tokenizer => crate::chat::gguf::load(&g.path, |k| g.meta(k))?,
        Some(g) => {
            let chat = ChatTokenizer::load(&first.model)?;
            compare_templates(g, &chat, &first.model, g.chat_template())?;
            chat
        }
        None => ChatTokenizer::load(&first.model)?,
    };
    drop(gguf);
    // The file that gave the tokenizer, for messages.
    let tokenizer_file = match &first.gguf {
        Some(g) if first.gguf_tokenizer => g.clone(),
        _ => first.model.join("tokenizer.json"),
    };
    // Every prompt before any model work: a template error (e.g. a rejected system role) stops
    // the run with nothing computed.
    let prompts = prompts::build(&chat, g.system.as_deref(), part)?;
    let loaded = match members {
        [_] if first.gguf.is_some() => {
            model::load_gguf(first.gguf.as_deref().unwrap_or(Path::new("")))?
        }
        [one] if first.base.is_none() => model::load_as(
            &first.model,
            one.settings.adapter.as_deref(),
            one.settings.merge,
            g.weights,
        )?,
        _ => {
            let adapters: Vec<Option<&Path>> = members
                .iter()
                .map(|m| m.settings.adapter.as_deref())
                .collect();
            model::load_group_as(&first.model, &adapters, g.weights, first.base)?
        }
    };
    let spec = &loaded.spec;
    if let Some((i, bad)) = prompts.iter().enumerate().find_map(|(i, p)| {
        p.iter()
            .find(|&&t| t as usize >= spec.vocab_size)
            .map(|t| (i, *t))
    }) {
        return Err(Error::file(
            &tokenizer_file,
            format!(
                "token id {bad} in the prompt of question {:?} is outside the model's vocabulary ({} rows); tokenizer and weights do not belong together",
                part.questions[i].id, spec.vocab_size
            ),
        ));
    }
    if !loaded.generation.unsupported_keys.is_empty() {
        eprintln!(
            "liftgate: warning: {} sets {} which transformers applies even under greedy decoding; liftgate ignores them, so answers may differ from the reference library",
            first.model.join("generation_config.json").display(),
            loaded.generation.unsupported_keys.join(", ")
        );
    }
    let gen = GenerationSettings {
        decoding: g.decoding,
        max_new_tokens: g.max_new_tokens,
        eos: loaded.generation.eos.clone(),
        ignore_eos: g.ignore_eos,
        repetition_penalty: loaded.generation.repetition_penalty.map(|p| p as f32),
    };
    let tokenizer_dir = (!first.gguf_tokenizer).then_some(first.model.as_path());
    let model = model_info(tokenizer_dir, first.gguf.as_deref(), &loaded)?;
    let mut infos = Vec::with_capacity(members.len());
    for (m, applied) in members.iter().zip(&loaded.adapters) {
        if let Some(why) = applied.as_ref().and_then(|a| a.merged_because.as_deref()) {
            eprintln!(
                "liftgate: {}: applied merged in f32, not unmerged: {why}",
                m.settings
                    .adapter
                    .as_deref()
                    .unwrap_or(Path::new(""))
                    .display()
            );
        }
        infos.push(RunInfo {
            tool: "liftgate".to_string(),
            tool_version: env!("CARGO_PKG_VERSION").to_string(),
            variant: m.settings.name.clone(),
            model: model.clone(),
            adapter: applied.as_ref().map(|a| AdapterInfo {
                path: m
                    .settings
                    .adapter
                    .as_deref()
                    .map(|p| p.display().to_string())
                    .unwrap_or_default(),
                fingerprint: a.adapter.fingerprint().to_string(),
                modules_merged: a.modules,
                applied: a.merge.describe().to_string(),
                merged_because: a.merged_because.clone(),
            }),
            chat_template: TemplateInfo {
                fingerprint: chat.template_fingerprint(),
                from_model: chat.has_template(),
            },
            generation: GenerationInfo {
                decoding: g.decoding.as_str().to_string(),
                max_new_tokens: g.max_new_tokens,
                ignore_eos: g.ignore_eos,
                eos_token_ids: gen.eos.clone(),
                eos_source: if first.gguf.is_some() {
                    "the GGUF file's tokenizer.ggml.eos_token_id".to_string()
                } else if loaded.generation.from_generation_config {
                    "generation_config.json".to_string()
                } else {
                    "config.json".to_string()
                },
                system: g.system.clone(),
                repetition_penalty: loaded.generation.repetition_penalty,
                ignored_generation_config_keys: loaded.generation.unsupported_keys.clone(),
                batch: g.batch,
                threads,
            },
            questions: QuestionsInfo {
                path: set.path.display().to_string(),
                fingerprint: set.fingerprint.clone(),
                count: set.len(),
            },
            compute_dtype: g.weights.compute_dtype().to_string(),
            base_quant: loaded.quant.map(base_quant_info),
            shard: shard.cloned(),
        });
    }
    Ok(Prepared {
        chat,
        loaded,
        prompts,
        gen,
        infos,
    })
}

/// One variant of an answering group: its settings and where its answers go.
pub struct Member<'a> {
    pub out: &'a Path,
    pub settings: &'a Settings,
    /// `out` holds answers gathered from the shards of a job array: they must be this run's
    /// (same identity), and are never answered again on the gathering machine.
    pub gathered: bool,
}

/// Answers every question of `set` (of its shard `settings.shard`, when given) into `out` (and
/// `<out>.run.json`), resumably.
///
/// Each finished answer is appended to the journal `<out>.partial` at once. A journal left by
/// an earlier run with the same [`RunIdentity`] is continued (its questions are not answered
/// again); one from a different run is refused (exit 2) unless `settings.restart`. A complete
/// `<out>` from the same identity is kept as it is. When every question is answered, `<out>`
/// is written in the set's order, atomically, and the journal removed. A stop signal ends the
/// run with [`Error::Interrupted`] after the answer being saved.
pub fn answer_to(
    out: &Path,
    settings: &Settings,
    set: &QuestionSet,
    stop: &StopFlag,
) -> Result<AnswerRun> {
    let mut runs = answer_group(
        &[Member {
            out,
            settings,
            gathered: false,
        }],
        set,
        stop,
    )?;
    runs.pop()
        .ok_or_else(|| Error::internal("an answering group returned no run"))
}

/// One variant's state while its group answers.
struct Pending {
    /// None for a variant complete already.
    journal: Option<Journal>,
    jpath: PathBuf,
    rows: Vec<Option<AnswerRecord>>,
    /// Complete already (kept as it was).
    done: Option<AnswerRun>,
}

/// As [`answer_to`] for several variants of one model (the base and unmerged adapters on it),
/// loaded once: their rows run through the same decoding steps over the shared base weights,
/// each variant saved to its own journal and answers file. Each variant's answers equal a run
/// of that variant alone.
pub fn answer_group(
    members: &[Member],
    set: &QuestionSet,
    stop: &StopFlag,
) -> Result<Vec<AnswerRun>> {
    let spec = members.first().and_then(|m| m.settings.shard);
    let (part, shard) = match spec {
        Some(s) => {
            let split = Split::of(set, s.count)?;
            (
                Cow::Owned(split.part(set, s.index)),
                Some(split.info(s.index)),
            )
        }
        None => (Cow::Borrowed(set), None),
    };
    let prep = prepare(members, set, &part, shard.as_ref())?;
    let set: &QuestionSet = &part;
    let n = set.len();
    let mut pending = Vec::with_capacity(members.len());
    for (m, info) in members.iter().zip(&prep.infos) {
        let identity = RunIdentity::of(info);
        let jpath = journal::journal_path(m.out);
        let restart = m.settings.restart;
        if !restart && !jpath.exists() {
            if let Some(done) = finished_run(m.out, &identity, set) {
                eprintln!(
                    "liftgate: {} is already complete for this model, adapter, question set and settings; kept as it is (pass --restart to answer again)",
                    m.out.display()
                );
                pending.push(Pending {
                    journal: None,
                    jpath,
                    rows: Vec::new(),
                    done: Some(done),
                });
                continue;
            }
        }
        if m.gathered {
            return Err(gathered_elsewhere(m.out, &identity));
        }
        stop.check(|| format!("nothing answered yet; {} not written", m.out.display()))?;
        let mut journal = Journal::open(&jpath)?;
        let mut rows: Vec<Option<AnswerRecord>> = vec![None; n];
        let contents = if restart {
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
        pending.push(Pending {
            journal: Some(journal),
            jpath,
            rows,
            done: None,
        });
    }

    let Prepared {
        chat,
        loaded,
        prompts,
        gen,
        infos,
    } = prep;
    // Longest prompts first, so the slowest sequences start early and the last slots do not
    // run alone at the end; a question's variants side by side, so their rows share steps. The
    // answers do not depend on the order.
    let mut todo: Vec<Job> = Vec::new();
    for (variant, p) in pending.iter().enumerate() {
        if p.done.is_none() {
            todo.extend(
                (0..n)
                    .filter(|&i| p.rows[i].is_none())
                    .map(|prompt| Job { prompt, variant }),
            );
        }
    }
    todo.sort_by_key(|j| {
        (
            std::cmp::Reverse(prompts[j.prompt].len()),
            j.prompt,
            j.variant,
        )
    });
    let total = pending.iter().filter(|p| p.done.is_none()).count() * n;
    // Read by both callbacks below, counted by one.
    let saved = std::cell::Cell::new(total - todo.len());
    let where_saved = match &pending[..] {
        [one] => one.jpath.display().to_string(),
        _ => "the .partial journals beside the answers files".to_string(),
    };
    let saved_note = |saved: usize| {
        format!("{saved} of {total} answers saved in {where_saved}; the answers files are not written yet")
    };
    stop.check(|| saved_note(saved.get()))?;
    let bar = progress_bar(total as u64);
    bar.set_position(saved.get() as u64);
    let started = Instant::now();
    let mut new_tokens_total = 0usize;
    // Steps that fed prompt tokens, and steps that only decoded (one new token per sequence).
    let (mut prompt, mut decoding) = (StepTotals::default(), StepTotals::default());
    let result = if todo.is_empty() {
        Ok(())
    } else {
        generate::generate_jobs(
            &loaded.decoder,
            &prompts,
            &todo,
            &gen,
            // --batch counts the sequences of each variant decoded together.
            members[0].settings.generation.batch * members.len(),
            &mut |job, g| {
                let row = prompts::answer_record(&chat, &set.questions[job.prompt].id, g)?;
                let p = &mut pending[job.variant];
                if let Some(j) = p.journal.as_mut() {
                    j.append(&row)?;
                }
                p.rows[job.prompt] = Some(row);
                saved.set(saved.get() + 1);
                bar.inc(1);
                stop.check(|| saved_note(saved.get()))
            },
            &mut |step| {
                new_tokens_total += step.produced;
                if step.prompt_tokens > 0 {
                    prompt.add(step);
                } else {
                    decoding.add(step);
                }
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
    eprintln!(
        "answered {} questions: {new_tokens_total} new tokens in {secs:.3} s ({:.1} tokens/s)",
        todo.len(),
        new_tokens_total as f64 / secs.max(1e-9)
    );
    eprintln!(
        "answering time: prompt steps {:.3} s ({} steps, {} prompt tokens, {} new tokens), decoding steps {:.3} s ({} steps, {} new tokens, {:.1} tokens/s)",
        prompt.secs,
        prompt.steps,
        prompt.prompt_tokens,
        prompt.produced,
        decoding.secs,
        decoding.steps,
        decoding.produced,
        decoding.produced as f64 / decoding.secs.max(1e-9)
    );

    let mut runs = Vec::with_capacity(members.len());
    for ((m, p), info) in members.iter().zip(pending).zip(infos) {
        if let Some(done) = p.done {
            runs.push(done);
            continue;
        }
        let mut records = Vec::with_capacity(n);
        for (q, row) in set.questions.iter().zip(p.rows) {
            records.push(
                row.ok_or_else(|| {
                    Error::internal(format!("question {:?} was not answered", q.id))
                })?,
            );
        }
        let run = AnswerRun { records, info };
        write_outputs(m.out, &run)?;
        if let Some(j) = p.journal {
            j.remove()?;
        }
        runs.push(run);
    }
    Ok(runs)
}

/// The steps of one kind added up: how many, their seconds, what they fed and produced.
#[derive(Debug, Default)]
struct StepTotals {
    steps: usize,
    secs: f64,
    prompt_tokens: usize,
    produced: usize,
}

impl StepTotals {
    fn add(&mut self, s: generate::Step) {
        self.steps += 1;
        self.secs += s.secs;
        self.prompt_tokens += s.prompt_tokens;
        self.produced += s.produced;
    }
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

/// Answers gathered from shards that this run cannot keep: made with other settings (named),
/// or unreadable. Answering the whole set again on the gathering machine would undo the job
/// array, so this is refused.
fn gathered_elsewhere(out: &Path, now: &RunIdentity) -> Error {
    let record = run_record::path_beside(out);
    let why = match run_record::read_answers_record(out) {
        Some(info) => RunIdentity::of(&info)
            .differences(now)
            .iter()
            .map(|(field, was, is)| format!("{field} was {was}, is now {is}"))
            .collect::<Vec<_>>()
            .join("; "),
        None => "its run record cannot be read".to_string(),
    };
    Error::field(
        &record,
        None,
        "identity",
        format!(
            "the answers gathered from the shards were made with other settings than this command gives ({why}); give the gathering command the same model, adapters, question set and settings as the shard tasks"
        ),
    )
}

/// A complete `out` whose `<out>.run.json` records the same identity, read back.
fn finished_run(out: &Path, identity: &RunIdentity, set: &QuestionSet) -> Option<AnswerRun> {
    let info = run_record::read_answers_record(out)?;
    if RunIdentity::of(&info) != *identity {
        return None;
    }
    let records = answers::load_for_set(out, set).ok()?;
    Some(AnswerRun { records, info })
}

/// Questions done, tokens/s and time left on stderr (drawn only when stderr is a terminal).
fn progress_bar(len: u64) -> ProgressBar {
    let bar = ProgressBar::new(len);
    let style = ProgressStyle::with_template(
        "{spinner} answering [{bar:30}] {pos}/{len} questions, {msg}, {elapsed} elapsed, ETA {eta}",
    )
    .unwrap_or_else(|_| ProgressStyle::default_bar())
    .progress_chars("=> ");
    bar.set_style(style);
    bar
}

/// The conversation both chat templates render when a GGUF file and a tokenizer directory
/// each bring one.
const SAMPLE_CONVERSATION: [(&str, &str); 3] = [
    ("system", "You answer questions from ferry passengers."),
    ("user", "When does the first ferry leave?"),
    ("assistant", "At 6:40 from the north pier."),
];

/// Warns, with both renderings of a sample conversation, when the GGUF file's chat template
/// renders differently from the one of the tokenizer directory (which is the one used): a
/// serving stack that reads the file's template would prompt the model differently.
fn compare_templates(
    g: &model::gguf::GgufFile,
    chat: &ChatTokenizer,
    dir: &Path,
    template: Option<&str>,
) -> Result<()> {
    let Some(source) = template else {
        return Ok(());
    };
    if !chat.has_template() {
        eprintln!(
            "liftgate: warning: {} has a chat template and {} has none; prompts are plain text, as the directory says, while a server reading the file would use its template",
            g.path.display(),
            dir.display(),
        );
        return Ok(());
    }
    let render = |c: &ChatTokenizer| {
        c.render_messages(&SAMPLE_CONVERSATION, true)
            .unwrap_or_else(|e| format!("(cannot render: {e})"))
    };
    let theirs = match ChatTokenizer::load(dir)?.with_template(source, &g.path) {
        Ok(c) => render(&c),
        Err(e) => format!("(cannot compile: {e})"),
    };
    let ours = render(chat);
    if theirs != ours {
        eprintln!(
            "liftgate: warning: the chat template in {} renders a sample conversation differently from the one in {}, which is used.\n--- {}:\n{ours}\n--- {}:\n{theirs}\n---",
            g.path.display(),
            dir.display(),
            dir.display(),
            g.path.display(),
        );
    }
    Ok(())
}

/// Content fingerprint of the model: SHA-256 over the list of (file, SHA-256) for config,
/// generation config, weights (and index) and tokenizer files; for a GGUF model, the GGUF file
/// and the tokenizer files of the directory (`dir` None: the file's own tokenizer, nothing
/// else is read).
fn model_info(
    dir: Option<&Path>,
    gguf: Option<&Path>,
    loaded: &model::LoadedModel,
) -> Result<ModelInfo> {
    let mut files: Vec<PathBuf> = Vec::new();
    let config: &[&str] = if gguf.is_some() {
        &[]
    } else {
        &[
            "config.json",
            "generation_config.json",
            "model.safetensors.index.json",
        ]
    };
    for name in config.iter().copied().chain([
        "tokenizer.json",
        "tokenizer_config.json",
        "special_tokens_map.json",
        "chat_template.jinja",
    ]) {
        let Some(dir) = dir else { break };
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
        path: gguf.or(dir).unwrap_or(Path::new("")).display().to_string(),
        fingerprint: fsutil::sha256_hex(manifest.as_bytes()),
        files: digests,
        model_type: loaded.spec.family.model_type().to_string(),
        architecture: loaded.spec.family.architecture().to_string(),
        stored_dtype: loaded.stored_dtype.clone(),
    })
}

/// The run record's account of a 4-bit base.
fn base_quant_info(q: model::BaseQuant) -> BaseQuantInfo {
    let double = q.double_quant();
    BaseQuantInfo {
        name: q.name().to_string(),
        method: "bitsandbytes 4-bit (QLoRA): blocks with an absmax scale, codes dequantised to f32 inside the products".to_string(),
        quant_type: q.quant_type().to_string(),
        block_size: crate::kernels::nf4::BLOCK,
        double_quant: double,
        double_quant_block_size: double.then_some(crate::kernels::nf4::BLOCK2),
        compute_dtype: "float32".to_string(),
        quantised: "the attention and MLP projections of every layer".to_string(),
        kept_as_stored: "embeddings, norms, output head, adapter weights".to_string(),
    }
}

/// `<out>` (JSONL) and `<out>.run.json`: both staged completely before either is renamed into
/// place, so a failure leaves neither half-written.
pub fn write_outputs(out: &Path, run: &AnswerRun) -> Result<()> {
    let run_path = run_record::path_beside(out);
    let json = serde_json::to_vec_pretty(&run.info)
        .map_err(|e| Error::internal(format!("cannot serialise run.json: {e}")))?;
    let staged_rows = fsutil::stage_jsonl(out, &run.records)?;
    let staged_json = fsutil::stage(&run_path, &json)?;
    fsutil::commit_staged(out, staged_rows)?;
    fsutil::commit_staged(&run_path, staged_json)
}
