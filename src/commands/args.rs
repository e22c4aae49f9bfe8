//! Arguments to settings, shared by the commands that answer (`answer`, `vet`, `gather`) and the
//! ones that weigh (`weigh`, `vet`): one fallible step each, every default taken from the stage that owns
//! it.

use crate::answer::{self, Decoding, Generation};
use crate::cli::{GenerationArgs, StatsArgs};
use crate::error::{Error, Result};
use crate::model::{BaseQuant, Merge};
use crate::policy::Policy;
use crate::weigh;
use std::path::{Path, PathBuf};

/// The generation options; `max_new_tokens` applies when `--max-new-tokens` is not given.
pub fn generation(args: &GenerationArgs, max_new_tokens: usize) -> Result<Generation> {
    Generation {
        system: args.system.clone(),
        decoding: Decoding::Greedy,
        max_new_tokens: args.max_new_tokens.unwrap_or(max_new_tokens),
        ignore_eos: args.ignore_eos,
        batch: args.batch,
        threads: args.threads,
        weights: args.weights,
    }
    .checked()
}

/// [`generation`] with the default number of new tokens.
pub fn default_generation(args: &GenerationArgs) -> Result<Generation> {
    generation(args, answer::DEFAULT_MAX_NEW_TOKENS)
}

/// `--questions` is a file and `--out` a file path other than it (`answer`, `gather`).
pub fn check_questions_and_out(questions: &Path, out: &Path) -> Result<()> {
    if !questions.is_file() {
        return Err(Error::usage(format!(
            "--questions {}: no such file",
            questions.display()
        )));
    }
    if out.is_dir() {
        return Err(Error::usage(format!(
            "--out {}: is a directory; expected a file path",
            out.display()
        )));
    }
    if crate::fsutil::same_file(out, questions) {
        return Err(Error::usage(format!(
            "--out {} is the --questions file; choose another path so the input is not overwritten",
            out.display()
        )));
    }
    Ok(())
}

/// The statistics settings and the policy (the file's, or the built-in default).
pub fn stats(args: &StatsArgs) -> Result<(weigh::Settings, Policy)> {
    let settings = weigh::Settings::new(args.resamples, args.seed, args.confidence)?;
    let policy = Policy::load_or_default(args.policy.as_deref())?;
    Ok((settings, policy))
}

/// A variant named on the command line: settings plus the candidate it was made from.
pub struct NamedVariant {
    pub settings: answer::Settings,
    /// `from=NAME`: the candidate this artifact was made from.
    pub from: Option<String>,
}

/// Letters, digits, `.`, `_` and `-`, 1 to 40 characters, not starting with `.` (it goes into
/// file names).
pub fn check_name(flag: &str, name: &str) -> Result<()> {
    let ok = !name.is_empty()
        && name.len() <= 40
        && !name.starts_with('.')
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '-'));
    if ok {
        Ok(())
    } else {
        Err(Error::usage(format!(
            "{flag}: the name `{name}` is not usable in file names: use 1 to 40 letters, digits, `.`, `_` or `-`, not starting with `.`"
        )))
    }
}

/// Parses one `--candidate` SPEC (`name=…,adapter=…,model=…,merge=…,base=…,from=…,gguf=…,
/// tokenizer=…`) into settings; `model` defaults to `default_model` (with `gguf`, the directory
/// whose tokenizer and chat template the GGUF model uses, the one the fine-tune was trained
/// with; `tokenizer=gguf` takes the file's own instead). Without `name=` the name is the
/// adapter's (else the model's) directory name, with the merge dtype (or the 4-bit base)
/// appended.
pub fn candidate(
    spec: &str,
    default_model: &Path,
    generation: &Generation,
    restart: bool,
) -> Result<NamedVariant> {
    let flag = format!("--candidate {spec}");
    let (mut name, mut model, mut adapter, mut merge, mut base, mut from, mut gguf) =
        (None, None, None, None, None, None, None);
    let mut tokenizer = None;
    for pair in spec.split(',').filter(|p| !p.trim().is_empty()) {
        let Some((key, value)) = pair.split_once('=') else {
            return Err(Error::usage(format!(
                "{flag}: `{pair}` is not KEY=VALUE (keys: name, adapter, model, merge, base, from, gguf, tokenizer)"
            )));
        };
        let value = value.trim();
        let slot = match key.trim() {
            "name" => &mut name,
            "adapter" => &mut adapter,
            "model" => &mut model,
            "merge" => &mut merge,
            "base" => &mut base,
            "from" => &mut from,
            "gguf" => &mut gguf,
            "tokenizer" => &mut tokenizer,
            other => {
                return Err(Error::usage(format!(
                    "{flag}: unknown key `{other}` (keys: name, adapter, model, merge, base, from, gguf, tokenizer)"
                )))
            }
        };
        if slot.replace(value.to_string()).is_some() {
            return Err(Error::usage(format!(
                "{flag}: `{}` is given twice",
                key.trim()
            )));
        }
    }
    let merge = match merge.as_deref() {
        None => Merge::Unmerged,
        Some(v) => <Merge as clap::ValueEnum>::from_str(v, true)
            .map_err(|_| Error::usage(format!("{flag}: merge={v}: expected f32, bf16 or f16")))?,
    };
    let base = match base.as_deref() {
        None => None,
        Some(v) => Some(
            <BaseQuant as clap::ValueEnum>::from_str(v, false).map_err(|_| {
                Error::usage(format!(
                    "{flag}: base={v}: expected nf4, nf4-single, fp4 or fp4-single"
                ))
            })?,
        ),
    };
    if gguf.is_some() && (adapter.is_some() || merge != Merge::Unmerged || base.is_some()) {
        return Err(Error::usage(format!(
            "{flag}: gguf=FILE is a finished export: adapter, merge and base do not apply to it (model=DIR may give its tokenizer)"
        )));
    }
    let own_tokenizer = match tokenizer.as_deref() {
        None | Some("model") => false,
        Some("gguf") if gguf.is_none() => {
            return Err(Error::usage(format!(
                "{flag}: tokenizer=gguf takes the tokenizer stored in a GGUF file: give gguf=FILE"
            )))
        }
        Some("gguf") if model.is_some() => {
            return Err(Error::usage(format!(
                "{flag}: tokenizer=gguf takes the file's own tokenizer and template, so model=DIR has nothing to give; drop one of them"
            )))
        }
        Some("gguf") => true,
        Some(v) => {
            return Err(Error::usage(format!(
                "{flag}: tokenizer={v}: expected gguf (the file's own tokenizer and chat template) or model (the directory's, the default)"
            )))
        }
    };
    if adapter.is_none() && model.is_none() && gguf.is_none() {
        return Err(Error::usage(format!(
            "{flag}: give adapter=DIR (the baseline's model plus that adapter), model=DIR (a merged checkpoint), both, or gguf=FILE (a GGUF export)"
        )));
    }
    let gguf_path = gguf.map(PathBuf::from);
    let model_path = model
        .map(PathBuf::from)
        .unwrap_or_else(|| default_model.to_path_buf());
    let adapter_path = adapter.map(PathBuf::from);
    let name = match name {
        Some(n) => n,
        None => {
            let dir = gguf_path
                .as_deref()
                .or(adapter_path.as_deref())
                .unwrap_or(&model_path);
            let stem = match &gguf_path {
                Some(g) => g.file_stem(),
                None => dir.file_name(),
            };
            let stem = stem
                .map(|n| n.to_string_lossy().to_string())
                .unwrap_or_else(|| "candidate".to_string());
            let stem: String = stem
                .chars()
                .map(|c| {
                    if c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '-') {
                        c
                    } else {
                        '-'
                    }
                })
                .collect();
            match (merge, base) {
                (Merge::Unmerged, Some(q)) => format!("{stem}-{}", q.name()),
                (Merge::Unmerged, None) => stem,
                (Merge::F32, _) => format!("{stem}-merged-f32"),
                (Merge::Bf16, _) => format!("{stem}-merged-bf16"),
                (Merge::F16, _) => format!("{stem}-merged-f16"),
            }
        }
    };
    check_name(&flag, &name)?;
    if let Some(f) = &from {
        check_name(&flag, f)?;
    }
    let built = match &gguf_path {
        Some(g) if own_tokenizer => answer::Settings::gguf_alone(g, generation.clone(), restart),
        _ => answer::Settings::new(
            &model_path,
            adapter_path.as_deref(),
            merge,
            generation.clone(),
            restart,
        )
        .and_then(|s| s.on_base(base))
        .and_then(|s| s.with_gguf(gguf_path.as_deref())),
    };
    let mut settings = built.map_err(|e| match e {
        Error::Usage(m) => Error::usage(format!("{flag}: {m}")),
        other => other,
    })?;
    settings.name = Some(name);
    Ok(NamedVariant { settings, from })
}
