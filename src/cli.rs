//! Command-line definition (docs/interface.md, "Flags"). Parsing only: each command
//! turns its arguments into validated settings in its own module under `commands`. Defaults
//! are the constants of the stage that owns them.

use crate::answer::DEFAULT_BATCH;
use crate::model::{BaseQuant, Merge, WeightFormat};
use crate::weigh::{DEFAULT_CONFIDENCE, DEFAULT_RESAMPLES, DEFAULT_SEED};
use clap::{Args, Parser, Subcommand};
use std::path::PathBuf;

#[derive(Debug, Parser)]
#[command(
    name = "liftgate",
    version,
    about = "Shows, on held-out questions, whether a LoRA fine-tune answers better than its base model, and gives a go/no-go verdict.",
    propagate_version = true
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Answer every question of a set with one model variant (base, or base + adapter), on CPU.
    Answer(AnswerArgs),
    /// Join the answers of every shard of one run (`answer --shard`) into the answers file and
    /// run record a whole run writes.
    Gather(GatherArgs),
    /// Score an answers file against the set's references: one row of scores per question.
    Grade(GradeArgs),
    /// Compare a baseline's grades with a candidate's: paired statistics, gate checks, verdict.
    Weigh(WeighArgs),
    /// The whole job: answer with base and with base + adapter, grade both, weigh.
    /// With no arguments it runs the bundled demo.
    Vet(VetArgs),
    /// The recorded runs of a question set in time order, like for like where the set changed,
    /// and candidate-against-candidate comparisons (docs/history.md).
    Trend(TrendArgs),
    /// Record earlier report directories (summary.json and grades) in the history.
    Record(RecordArgs),
    /// List held-out questions that repeat or closely reword a training question.
    Leaks(LeaksArgs),
}

/// Generation settings shared by `answer` and `vet`.
#[derive(Debug, Args, Clone)]
pub struct GenerationArgs {
    /// System message given to the chat template.
    #[arg(long, value_name = "TEXT")]
    pub system: Option<String>,
    /// Stop each answer after this many new tokens [default: 128; 48 for the bundled demo].
    #[arg(long, value_name = "N")]
    pub max_new_tokens: Option<usize>,
    /// Questions decoded together (cache slots; a finished slot takes the next question at
    /// once). Answers do not depend on it; larger batches read each weight once for more
    /// tokens, at the cost of KV-cache memory.
    #[arg(long, value_name = "N", default_value_t = DEFAULT_BATCH)]
    pub batch: usize,
    /// Compute threads (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Generate exactly --max-new-tokens tokens, ignoring end-of-sequence (for benchmarks).
    #[arg(long)]
    pub ignore_eos: bool,
    /// Weight format of the runner. `f32` computes as the reference library does; `bf16`
    /// rounds weights and activations of the matrix products to bfloat16 (about 1.5x as fast
    /// on CPUs with AVX-512 BF16, half the weight memory) and is an approximation of the model,
    /// recorded as such in run.json and the report.
    #[arg(long, value_enum, value_name = "FORMAT", default_value_t = WeightFormat::F32)]
    pub weights: WeightFormat,
}

#[derive(Debug, Args)]
pub struct AnswerArgs {
    /// Hugging Face-layout model directory (config.json, *.safetensors, tokenizer.json, ...).
    /// Required, except with --gguf: then it only gives the tokenizer and chat template, and
    /// without it those stored in the GGUF file are used.
    #[arg(long, value_name = "DIR", required_unless_present = "gguf")]
    pub model: Option<PathBuf>,
    /// LoRA adapter directory written by peft (adapter_config.json, adapter_model.safetensors).
    /// Applied unmerged, as trained, unless --merge says otherwise.
    #[arg(long, value_name = "DIR")]
    pub adapter: Option<PathBuf>,
    /// Merge the adapter into the base first: `f32` (in f32, as peft's merge_and_unload on the
    /// base loaded in float32), `bf16` or `f16` (as a team gets when it merges on a base loaded
    /// in that dtype and saves the merged checkpoint: every weight rounded to it).
    #[arg(long, value_enum, value_name = "DTYPE", requires = "adapter")]
    pub merge: Option<Merge>,
    /// Hold the base model's linear layers quantised to 4 bits as bitsandbytes does for QLoRA
    /// (blocks of 64, absmax scales), computing in f32: `nf4` (with double quantisation of the
    /// scales, the base QLoRA trains against), `nf4-single`, `fp4`, `fp4-single` (scales kept
    /// in f32). Embeddings, norms and the output head stay as stored. Default: the base as
    /// stored.
    #[arg(long, value_enum, value_name = "QUANT")]
    pub base: Option<BaseQuant>,
    /// Answer with the model in this GGUF file (f32, f16, bf16, q4_0, q4_1, q5_0, q5_1, q8_0 and
    /// the k-quants q2_k to q6_k; llama, qwen2 and qwen3 architectures), its weights kept in
    /// their stored blocks and computed in f32; --model then gives the tokenizer and chat
    /// template, else the file's own (its `tokenizer.ggml.*` metadata and
    /// `tokenizer.chat_template`) are used.
    #[arg(long, value_name = "FILE", conflicts_with_all = ["adapter", "merge", "base"])]
    pub gguf: Option<PathBuf>,
    /// A short name for this variant, recorded in the run record.
    #[arg(long, value_name = "NAME")]
    pub name: Option<String>,
    /// Question set (JSONL).
    #[arg(long, value_name = "FILE")]
    pub questions: PathBuf,
    /// Answers file to write (JSONL); `<FILE>.run.json` is written beside it. While running,
    /// finished answers are saved to `<FILE>.partial`; rerunning the same command continues
    /// from there, and reuses a complete `<FILE>` made with the same model, adapter, set and
    /// settings.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Start over: discard the saved answers of an earlier, unfinished or finished, run with
    /// this --out instead of continuing it (needed when model, adapter, set or settings
    /// changed).
    #[arg(long)]
    pub restart: bool,
    /// Answer only shard K of N of the set (K counted from 0: 0/4 … 3/4), for one task of a
    /// cluster job array; `auto` reads K and N from the scheduler (a Slurm array's
    /// SLURM_ARRAY_TASK_ID, or a Kubernetes Indexed Job's JOB_COMPLETION_INDEX with
    /// LIFTGATE_SHARD_COUNT). Without this flag the LIFTGATE_SHARD environment variable, when
    /// set, gives the same values. Join the shards with `liftgate gather`.
    #[arg(long, value_name = "K/N|auto")]
    pub shard: Option<String>,
    #[command(flatten)]
    pub generation: GenerationArgs,
}

#[derive(Debug, Args)]
pub struct GatherArgs {
    /// Question set (JSONL) the shards answered.
    #[arg(long, value_name = "FILE")]
    pub questions: PathBuf,
    /// Answers file to write (JSONL); `<FILE>.run.json` is written beside it.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// The answers file of every shard of the run (each with its `.run.json` beside it).
    #[arg(value_name = "SHARD_ANSWERS", required = true)]
    pub shards: Vec<PathBuf>,
}

#[derive(Debug, Args)]
pub struct GradeArgs {
    /// Question set (JSONL) the answers belong to.
    #[arg(long, value_name = "FILE")]
    pub questions: PathBuf,
    /// Answers file (JSONL): written by `liftgate answer`, or by any other system; each row
    /// needs only `id` and `answer`.
    #[arg(long, value_name = "FILE")]
    pub answers: PathBuf,
    /// Grades file to write (JSONL).
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Gate policy (TOML); only its `[refusal]` phrase settings are used here.
    #[arg(long, value_name = "FILE")]
    pub policy: Option<PathBuf>,
    /// Grade answers whose `.run.json` records a different question-set fingerprint (with a
    /// warning), e.g. after correcting a reference answer; the ids must still match.
    #[arg(long)]
    pub allow_set_change: bool,
    /// Sentence-embedding model directory (sentence-transformers layout: modules.json,
    /// config.json, model.safetensors, tokenizer.json, 1_Pooling/config.json): adds the
    /// `semantic` score, the answer's cosine similarity to the closest reference.
    #[arg(long, value_name = "DIR")]
    pub embedder: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct LeaksArgs {
    /// Held-out question set (JSONL).
    #[arg(long, value_name = "FILE")]
    pub questions: PathBuf,
    /// Training pairs the fine-tune used (JSONL; a `question` string or a chat `messages` list
    /// a row).
    #[arg(long, value_name = "FILE")]
    pub train: PathBuf,
    /// Flag a question when at least this share of its word triples occur in one training
    /// question (containment, in (0, 1]).
    #[arg(long, value_name = "X", default_value_t = crate::score::leaks::DEFAULT_THRESHOLD)]
    pub threshold: f64,
    /// Sentence-embedding model directory (as for `grade --embedder`): also lists each held-out
    /// question's nearest training question by embedding cosine when it reaches
    /// --cosine-threshold.
    #[arg(long, value_name = "DIR")]
    pub embedder: Option<PathBuf>,
    /// With --embedder: flag a question whose nearest training question has at least this
    /// cosine similarity (in (0, 1]).
    #[arg(long, value_name = "X", default_value_t = crate::score::leaks::DEFAULT_COSINE_THRESHOLD, requires = "embedder")]
    pub cosine_threshold: f64,
}

/// Statistics settings shared by `weigh` and `vet`.
#[derive(Debug, Args, Clone)]
pub struct StatsArgs {
    /// Gate policy (TOML); the built-in default is documented in the README.
    #[arg(long, value_name = "FILE")]
    pub policy: Option<PathBuf>,
    /// Bootstrap resamples.
    #[arg(long, value_name = "N", default_value_t = DEFAULT_RESAMPLES)]
    pub resamples: usize,
    /// Seed for the bootstrap and permutation tests.
    #[arg(long, value_name = "N", default_value_t = DEFAULT_SEED)]
    pub seed: u64,
    /// Confidence level of the intervals.
    #[arg(long, value_name = "C", default_value_t = DEFAULT_CONFIDENCE)]
    pub confidence: f64,
}

#[derive(Debug, Args)]
pub struct WeighArgs {
    /// Question set (JSONL) both grades files belong to.
    #[arg(long, value_name = "FILE")]
    pub questions: PathBuf,
    /// Grades of the baseline (usually the base model).
    #[arg(long, value_name = "GRADES")]
    pub baseline: PathBuf,
    /// Grades of the candidate (usually base + adapter).
    #[arg(long, value_name = "GRADES")]
    pub candidate: PathBuf,
    /// Report directory for summary.json and report.md.
    #[arg(long, value_name = "DIR", default_value = "reports/latest")]
    pub report: PathBuf,
    #[command(flatten)]
    pub stats: StatsArgs,
    #[command(flatten)]
    pub history: HistoryArgs,
}

#[derive(Debug, Args)]
pub struct VetArgs {
    /// The baseline: a base model directory (omit --model, --adapter and --questions to run
    /// the bundled demo).
    #[arg(long, value_name = "DIR", requires = "questions")]
    pub model: Option<PathBuf>,
    /// A LoRA adapter directory: the candidate named `candidate`, the baseline's model plus
    /// this adapter, unmerged (as trained).
    #[arg(long, value_name = "DIR", requires = "model")]
    pub adapter: Option<PathBuf>,
    /// Held-out question set (JSONL).
    #[arg(long, value_name = "FILE", requires = "model")]
    pub questions: Option<PathBuf>,
    /// A candidate, as comma-separated KEY=VALUE pairs: `name=` (letters, digits, `.`, `_`,
    /// `-`), `adapter=DIR`, `model=DIR` (default: the baseline's model), `merge=f32|bf16|f16`
    /// (default: unmerged), `base=nf4|nf4-single|fp4|fp4-single` (the adapter on its base
    /// quantised to 4 bits as QLoRA trains it, see `answer --base`), `gguf=FILE` (a GGUF export,
    /// see `answer --gguf`; `model=DIR` then only gives its tokenizer and chat template),
    /// `tokenizer=gguf` (with `gguf=`: the tokenizer and chat template stored in the file
    /// instead of the directory's), `from=NAME` (the candidate this artifact was made from, for "how
    /// much of the lift it keeps"). Repeat for several candidates, e.g.
    /// `--candidate name=epoch2,adapter=runs/e2 --candidate name=e2-bf16,adapter=runs/e2,merge=bf16`.
    #[arg(long, value_name = "SPEC")]
    pub candidate: Vec<String>,
    /// The baseline's name in file names and the report.
    #[arg(long, value_name = "NAME", default_value = "baseline")]
    pub baseline_name: String,
    /// Report directory (default: reports/<date>-<set name>, never overwriting an earlier run).
    /// An unfinished run (stopped or killed while answering) is continued by the same command:
    /// in DIR when given, else in the newest unfinished directory under reports/ for the same
    /// set and settings.
    #[arg(long, value_name = "DIR")]
    pub report: Option<PathBuf>,
    /// Start over: do not continue an unfinished run; with --report, discard the answers
    /// saved in DIR.
    #[arg(long)]
    pub restart: bool,
    /// Training file of the fine-tune (JSONL, a `question` or chat `messages` a row): held-out
    /// questions that repeat or closely reword a training question are counted in the report,
    /// with a warning (as `liftgate leaks` lists them).
    #[arg(long, value_name = "FILE")]
    pub train: Option<PathBuf>,
    /// Answer only shard K of N of the set (K counted from 0), with every variant, into
    /// `--report DIR`/shards/, and stop: one task of a cluster job array (`auto` reads K and N
    /// from the scheduler, as `answer --shard`; LIFTGATE_SHARD stands for the flag). When every
    /// task is done, the same command without --shard (and without LIFTGATE_SHARD) gathers the
    /// shards and grades, weighs and reports as a single-machine run.
    #[arg(long, value_name = "K/N|auto", requires = "report")]
    pub shard: Option<String>,
    /// Sentence-embedding model directory (sentence-transformers layout: modules.json,
    /// config.json, model.safetensors, tokenizer.json, 1_Pooling/config.json): adds the
    /// `semantic` score, the answer's cosine similarity to the closest reference.
    #[arg(long, value_name = "DIR")]
    pub embedder: Option<PathBuf>,
    #[command(flatten)]
    pub stats: StatsArgs,
    #[command(flatten)]
    pub generation: GenerationArgs,
    #[command(flatten)]
    pub history: HistoryArgs,
}

/// Where `weigh` and `vet` record the run they finish (docs/history.md).
#[derive(Debug, Args, Clone, Default)]
pub struct HistoryArgs {
    /// History file (SQLite) to record this run in [default: history.sqlite beside the report
    /// directory, e.g. reports/history.sqlite].
    #[arg(long, value_name = "FILE", conflicts_with = "no_history")]
    pub history: Option<PathBuf>,
    /// Do not record this run in any history file.
    #[arg(long)]
    pub no_history: bool,
    /// A label for this run in the history, e.g. "training data v3".
    #[arg(long, value_name = "TEXT")]
    pub label: Option<String>,
}

#[derive(Debug, Args)]
pub struct TrendArgs {
    /// History file to read.
    #[arg(long, value_name = "FILE", default_value = "reports/history.sqlite")]
    pub history: PathBuf,
    /// Only runs of this question set (the set file's name without extension).
    #[arg(long, value_name = "NAME")]
    pub set: Option<String>,
    /// Only the last N runs of each question set.
    #[arg(long, value_name = "N")]
    pub last: Option<usize>,
    /// Compare the candidates of these two runs (ids or labels) instead of consecutive runs.
    #[arg(long, num_args = 2, value_names = ["A", "B"])]
    pub between: Option<Vec<String>>,
    /// Without --between: compare the candidates of the last N consecutive pairs of runs of
    /// each set (0: every consecutive pair; each comparison is a bootstrap).
    #[arg(long, value_name = "N", default_value_t = 10)]
    pub pairs: usize,
    /// Directory to write trend.md and trend.json into.
    #[arg(long, value_name = "DIR")]
    pub out: Option<PathBuf>,
    /// Bootstrap resamples of each comparison.
    #[arg(long, value_name = "N", default_value_t = 2000)]
    pub resamples: usize,
    /// Seed of the comparisons' bootstrap.
    #[arg(long, value_name = "N", default_value_t = 7)]
    pub seed: u64,
    /// Confidence level of the comparisons' intervals.
    #[arg(long, value_name = "C", default_value_t = 0.95)]
    pub confidence: f64,
}

#[derive(Debug, Args)]
pub struct RecordArgs {
    /// Report directories written by `weigh` or `vet` (each with summary.json).
    #[arg(value_name = "REPORT_DIR", required = true)]
    pub reports: Vec<PathBuf>,
    /// History file to record them in.
    #[arg(long, value_name = "FILE", default_value = "reports/history.sqlite")]
    pub history: PathBuf,
    /// The question set the reports were made with, when it is no longer at the path their
    /// summary.json records (it must have the recorded SHA-256).
    #[arg(long, value_name = "FILE")]
    pub questions: Option<PathBuf>,
    /// A label for the recorded runs.
    #[arg(long, value_name = "TEXT")]
    pub label: Option<String>,
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn cli_definition_is_consistent() {
        Cli::command().debug_assert();
    }
}
