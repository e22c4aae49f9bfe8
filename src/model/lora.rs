//! PEFT LoRA adapters: reading `adapter_config.json` + `adapter_model.safetensors` and merging
//! them into the base weights at load time.
//!
//! The rules follow peft 0.21.2 (`peft/tuners/lora/{config,layer,variants,dora,model}.py`,
//! `peft/utils/{save_and_load,other}.py`, `peft/tuners/tuners_utils.py`) as summarised in
//! model-formats.md §5, and the tests compare the result with peft's own
//! `PeftModel.from_pretrained(base, dir).merge_and_unload()` (tests/reference/make_lora_fixtures.py).
//!
//! What the merge does, in order:
//! 1. **Replacements.** Every non-LoRA tensor of the adapter (a `modules_to_save` copy, a bias
//!    trained with `bias="all"`/`"lora_only"`, a `.base_layer.` full copy of a targeted
//!    embedding or head) overwrites the base tensor it names, after `base_model.model.` and
//!    `.base_layer` are stripped from its key.
//! 2. **LoRA modules.** With s = α/r (or α/√r with `use_rslora`), r and α resolved through
//!    `rank_pattern`/`alpha_pattern`:
//!    Linear W' = W + s·(B·A), b' = b + s·b_B with `lora_bias`;
//!    Embedding E' = E + s·(B_e·A_e)ᵀ;
//!    DoRA (`use_dora`): V = W + ΔW, then every output row (Linear) or every hidden column
//!    (Embedding) of V is rescaled to the trained magnitude m: W' = (m / ‖V‖₂) · V.
//!    ΔW is computed in f32 whatever dtype the adapter was stored in (peft's
//!    `autocast_adapter_dtype=True` upcasts on load) and added to the base with one rounding.
//!
//! Which modules carry adapters is decided by the tensors in the file. The config is still
//! checked against the base so that an adapter made for another model fails loudly instead of
//! merging partially: every adapter tensor must map to a base tensor of the right shape, every
//! module with LoRA tensors must be one the config selects, every module the config selects
//! must have its tensors, and every name in `target_modules` must exist in the base.
//!
//! Tied embeddings (`tie_word_embeddings` and no `lm_head.weight`): peft merges an `lm_head`
//! LoRA into the one shared tensor, so after the merge the *input embeddings* change too (this
//! differs from peft's unmerged forward pass, where only the head's output changes). liftgate
//! mirrors the merged model, since that is what gets shipped. A `modules_to_save` copy of the
//! head or of the embeddings gives that module its own tensor and unties the pair.

use crate::error::{Error, Result};
use candle_core::{DType, Device, Tensor};
use regex::Regex;
use serde_json::Value;
use sha2::{Digest, Sha256};
use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::{Path, PathBuf};

/// File names peft writes.
pub const CONFIG_FILE: &str = "adapter_config.json";
pub const WEIGHTS_FILE: &str = "adapter_model.safetensors";
const PICKLE_FILE: &str = "adapter_model.bin";

/// Prefix peft puts before every checkpoint name in an adapter file.
const KEY_PREFIX: &str = "base_model.model.";

/// The tied pair in every supported family (model-formats.md §1.3).
const EMBED_WEIGHT: &str = "model.embed_tokens.weight";
const HEAD_WEIGHT: &str = "lm_head.weight";
const HEAD_MODULE: &str = "lm_head";

/// Default `target_modules` when the config has null: peft's
/// `TRANSFORMERS_MODELS_TO_LORA_TARGET_MODULES_MAPPING` entry for llama, mistral, qwen2, qwen3,
/// gemma and gemma2 (`peft/utils/constants.py`).
const DEFAULT_TARGETS: [&str; 2] = ["q_proj", "v_proj"];

/// `init_lora_weights` values whose adapters assume a base modified at init (model-formats.md
/// §5.5). Converted adapters carry `init_lora_weights: true` and merge normally.
const RESIDUAL_INITS: [&str; 5] = ["pissa", "olora", "corda", "loftq", "lora_ga"];

/// Config fields that switch peft to another LoRA variant (`is_lora_variant` in
/// `peft/tuners/lora/config.py`, DoRA aside) or another adapter kind. A truthy value is refused.
const UNSUPPORTED_FIELDS: [(&str, &str); 11] = [
    ("alora_invocation_tokens", "aLoRA adapters activate only after their invocation tokens and cannot be merged into the base"),
    ("trainable_token_indices", "trainable token adapters are not supported"),
    ("target_parameters", "adapters on raw parameters (target_parameters) are not supported"),
    ("layer_replication", "layer replication changes the model's layer stack and is not supported"),
    ("use_qalora", "QA-LoRA adapters are not supported"),
    ("velora_config", "the VeLoRA variant is not supported"),
    ("monteclora_config", "the MonteCLoRA variant is not supported"),
    ("use_bdlora", "the BD-LoRA variant is not supported"),
    ("arrow_config", "the Arrow routing variant is not supported"),
    ("kasa_config", "the KaSA variant is not supported"),
    ("megatron_config", "Megatron parallel adapters are not supported"),
];

/// How `target_modules` selects modules (`check_target_module_exists`).
#[derive(Debug, Clone)]
enum Targets {
    /// A list: an entry equals the module name or is a dotted suffix of it.
    List(Vec<String>),
    /// A string: `re.fullmatch` against the full module name.
    Regex(String, Regex),
    /// `"all-linear"` left unexpanded: every Linear except the output head.
    AllLinear,
}

/// `exclude_modules`: same list / regex semantics as the targets, without layer filtering.
#[derive(Debug, Clone)]
enum Exclude {
    List(Vec<String>),
    Regex(Regex),
}

/// The parts of adapter_config.json that matter for merging, validated.
#[derive(Debug, Clone)]
pub struct Config {
    r: usize,
    alpha: f64,
    use_rslora: bool,
    use_dora: bool,
    lora_bias: bool,
    /// `(key, compiled (.*\.)?(key)$, value)` in file order.
    rank_pattern: Vec<(String, Regex, usize)>,
    alpha_pattern: Vec<(String, Regex, f64)>,
    targets: Targets,
    /// Whether `target_modules` was null (then the defaults apply).
    targets_defaulted: bool,
    exclude: Option<Exclude>,
    layers_to_transform: Option<Vec<i64>>,
    /// `(?:^|.*?\.)pattern\.(?P<idx>\d+)\.` per layers_pattern entry; empty means "any".
    layers_pattern: Vec<Regex>,
    /// `(^|.*\.)m($|\..*)` per modules_to_save entry, with the raw name.
    modules_to_save: Vec<(String, Regex)>,
}

/// Whether a LoRA module wraps an nn.Linear or an nn.Embedding.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ModuleKind {
    Linear,
    Embedding,
}

/// One adapted module: its f32 LoRA factors and resolved scaling.
#[derive(Debug, Clone)]
struct LoraModule {
    kind: ModuleKind,
    /// Linear: A [r, in], B [out, r]. Embedding: A_e [r, vocab], B_e [hidden, r].
    a: Tensor,
    b: Tensor,
    a_key: String,
    b_key: String,
    /// `lora_B.bias` [out] with lora_bias.
    b_bias: Option<(String, Tensor)>,
    /// DoRA `lora_magnitude_vector`: [out] for Linear, [hidden] for Embedding.
    magnitude: Option<(String, Tensor)>,
    rank: usize,
    alpha: f64,
    scaling: f64,
}

/// A full tensor of the adapter that overwrites a base tensor.
#[derive(Debug, Clone)]
struct Replacement {
    /// The key in adapter_model.safetensors.
    key: String,
    /// The base checkpoint name it maps to.
    target: String,
    /// The key had `.base_layer.`: a copy of the wrapped layer itself, not a separate module.
    base_layer: bool,
    tensor: Tensor,
}

/// A parsed, self-consistent adapter directory. Nothing about the base is known yet; `merge`
/// checks the fit.
#[derive(Debug)]
pub struct Adapter {
    config_path: PathBuf,
    weights_path: PathBuf,
    config: Config,
    /// By module name (checkpoint name without `.weight`), sorted.
    modules: BTreeMap<String, LoraModule>,
    /// Sorted by adapter key.
    replacements: Vec<Replacement>,
    fingerprint: String,
}

/// One merged module, for run.json.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct MergedModule {
    pub name: String,
    pub kind: ModuleKind,
    pub rank: usize,
    pub alpha: f64,
    pub scaling: f64,
    pub dora: bool,
    /// The base tensor that received ΔW (the embeddings for an `lm_head` LoRA on a tied model).
    pub into: String,
}

impl serde::Serialize for ModuleKind {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        s.serialize_str(match self {
            ModuleKind::Linear => "linear",
            ModuleKind::Embedding => "embedding",
        })
    }
}

/// What the merge did (for run.json and messages).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct MergeSummary {
    pub modules_merged: usize,
    /// Base tensors overwritten (or added) by full copies from the adapter, sorted.
    pub replaced: Vec<String>,
    pub modules: Vec<MergedModule>,
    /// `lm_head.weight` was added to the map (a modules_to_save copy untied the embeddings).
    pub untied: bool,
    /// An `lm_head` LoRA or copy went into the shared embedding tensor of a tied model.
    pub head_merged_into_embeddings: bool,
}

impl Adapter {
    /// Reads adapter_config.json and adapter_model.safetensors from `dir`.
    ///
    /// Refuses a pickled adapter_model.bin, unsupported variants and options, and files whose
    /// tensors disagree with each other or with the config (rank, DoRA, lora_bias).
    pub fn load(dir: &Path) -> Result<Self> {
        let config_path = dir.join(CONFIG_FILE);
        let weights_path = dir.join(WEIGHTS_FILE);
        if !dir.is_dir() {
            return Err(Error::file(dir, "adapter directory not found"));
        }
        let config_bytes = std::fs::read(&config_path).map_err(|e| {
            Error::file(
                &config_path,
                format!("cannot read the adapter config ({e}); a peft adapter directory holds {CONFIG_FILE} and {WEIGHTS_FILE}"),
            )
        })?;
        if !weights_path.exists() && dir.join(PICKLE_FILE).exists() {
            return Err(Error::file(
                dir.join(PICKLE_FILE),
                format!(
                    "pickled adapter weights are not read (loading a pickle can run code); \
                     save the adapter as {WEIGHTS_FILE} (peft `save_pretrained` with \
                     safe_serialization=True, the default)"
                ),
            ));
        }
        let weights_bytes = std::fs::read(&weights_path).map_err(|e| {
            Error::file(
                &weights_path,
                format!("cannot read the adapter weights: {e}"),
            )
        })?;
        let fingerprint = fingerprint(&config_bytes, &weights_bytes);

        let config = Config::parse(&config_path, &config_bytes)?;

        let tensors =
            candle_core::safetensors::load_buffer(&weights_bytes, &Device::Cpu).map_err(|e| {
                Error::file(
                    &weights_path,
                    format!("not a readable safetensors file: {e}"),
                )
            })?;
        drop(weights_bytes);
        let (modules, replacements) = parse_tensors(&config_path, &weights_path, &config, tensors)?;
        if modules.is_empty() && replacements.is_empty() {
            return Err(Error::file(&weights_path, "the adapter holds no tensors"));
        }
        Ok(Adapter {
            config_path,
            weights_path,
            config,
            modules,
            replacements,
            fingerprint,
        })
    }

    /// SHA-256 (hex) over the config and weights files: the hash of
    /// `"adapter_config.json\0" ‖ len ‖ bytes ‖ "adapter_model.safetensors\0" ‖ len ‖ bytes`,
    /// lengths as 8-byte little-endian.
    pub fn fingerprint(&self) -> &str {
        &self.fingerprint
    }

    pub fn config_path(&self) -> &Path {
        &self.config_path
    }

    pub fn weights_path(&self) -> &Path {
        &self.weights_path
    }

    /// Names of the modules that carry LoRA tensors, sorted.
    pub fn lora_modules(&self) -> impl Iterator<Item = &str> {
        self.modules.keys().map(String::as_str)
    }

    /// Whether the adapter is DoRA.
    pub fn is_dora(&self) -> bool {
        self.config.use_dora
    }
}

/// See [`Adapter::fingerprint`].
fn fingerprint(config: &[u8], weights: &[u8]) -> String {
    let mut h = Sha256::new();
    for (name, bytes) in [(CONFIG_FILE, config), (WEIGHTS_FILE, weights)] {
        h.update(name.as_bytes());
        h.update([0u8]);
        h.update((bytes.len() as u64).to_le_bytes());
        h.update(bytes);
    }
    h.finalize().iter().map(|b| format!("{b:02x}")).collect()
}

/// Python truthiness of a JSON value (`bool(x)`), as peft tests its optional fields.
fn truthy(v: &Value) -> bool {
    match v {
        Value::Null => false,
        Value::Bool(b) => *b,
        Value::Number(n) => n.as_f64().is_some_and(|x| x != 0.0),
        Value::String(s) => !s.is_empty(),
        Value::Array(a) => !a.is_empty(),
        Value::Object(o) => !o.is_empty(),
    }
}

fn compile(path: &Path, field: &str, pattern: &str, what: &str) -> Result<Regex> {
    Regex::new(pattern).map_err(|e| {
        Error::field(
            path,
            None,
            field,
            format!("{what} `{pattern}` is not a regular expression liftgate can evaluate: {e}"),
        )
    })
}

fn parse_config(path: &Path, json: &Value) -> Result<Config> {
    let obj = json
        .as_object()
        .ok_or_else(|| Error::file(path, "expected a JSON object"))?;
    let field_err = |field: &str, msg: String| Error::field(path, None, field, msg);
    let get = |k: &str| obj.get(k).filter(|v| !v.is_null());

    match obj.get("peft_type").and_then(Value::as_str) {
        Some("LORA") => {}
        Some(other) => {
            return Err(field_err(
                "peft_type",
                format!("expected \"LORA\", found \"{other}\": only LoRA adapters can be merged"),
            ))
        }
        None => {
            return Err(field_err(
                "peft_type",
                "missing or not a string; expected \"LORA\" (is this a peft adapter config?)"
                    .into(),
            ))
        }
    }
    for (field, why) in UNSUPPORTED_FIELDS {
        if let Some(v) = obj.get(field) {
            if truthy(v) {
                return Err(field_err(field, format!("is set ({v}): {why}")));
            }
        }
    }
    if let Some(v) = get("fan_in_fan_out") {
        if v.as_bool() != Some(false) {
            return Err(field_err(
                "fan_in_fan_out",
                format!("is {v}; expected false: the supported families store Linear weights as [out, in], so an adapter with fan_in_fan_out was made for another architecture"),
            ));
        }
    }
    if let Some(v) = get("init_lora_weights") {
        match v {
            Value::Bool(_) => {}
            Value::String(s) => {
                let lower = s.to_ascii_lowercase();
                if RESIDUAL_INITS.iter().any(|p| lower.starts_with(p)) {
                    return Err(field_err(
                        "init_lora_weights",
                        format!("is \"{s}\": this adapter expects a base modified at initialisation and cannot be merged into the original base; save it with peft's conversion (path_initial_model_for_weight_conversion) to get a plain LoRA adapter"),
                    ));
                }
            }
            other => {
                return Err(field_err(
                    "init_lora_weights",
                    format!("expected a boolean or a string, found {other}"),
                ))
            }
        }
    }

    let r = match get("r") {
        None => 8,
        Some(v) => positive_int(v).ok_or_else(|| {
            field_err("r", format!("expected a positive integer rank, found {v}"))
        })?,
    };
    let alpha = match get("lora_alpha") {
        None => 8.0,
        Some(v) => v
            .as_f64()
            .ok_or_else(|| field_err("lora_alpha", format!("expected a number, found {v}")))?,
    };
    let flag = |k: &str| -> Result<bool> {
        match get(k) {
            None => Ok(false),
            Some(Value::Bool(b)) => Ok(*b),
            Some(v) => Err(field_err(k, format!("expected true or false, found {v}"))),
        }
    };
    let use_rslora = flag("use_rslora")?;
    let use_dora = flag("use_dora")?;
    let lora_bias = flag("lora_bias")?;

    if let Some(v) = get("bias") {
        match v.as_str() {
            Some("none" | "all" | "lora_only") => {}
            _ => {
                return Err(field_err(
                    "bias",
                    format!("expected \"none\", \"all\" or \"lora_only\", found {v}"),
                ))
            }
        }
    }

    let pattern_map = |k: &str| -> Result<Vec<(String, Regex, Value)>> {
        let Some(v) = get(k) else {
            return Ok(Vec::new());
        };
        let map = v.as_object().ok_or_else(|| {
            field_err(
                k,
                format!("expected an object of pattern: value, found {v}"),
            )
        })?;
        map.iter()
            .map(|(key, val)| {
                // peft `get_pattern_key`: re.match(rf"(.*\.)?({key})$", module_name)
                let re = compile(path, k, &format!(r"^(?:.*\.)?(?:{key})$"), "pattern")?;
                Ok((key.clone(), re, val.clone()))
            })
            .collect()
    };
    let rank_pattern = pattern_map("rank_pattern")?
        .into_iter()
        .map(|(k, re, v)| match positive_int(&v) {
            Some(n) => Ok((k, re, n)),
            None => Err(field_err(
                "rank_pattern",
                format!("pattern `{k}`: expected a positive integer rank, found {v}"),
            )),
        })
        .collect::<Result<Vec<_>>>()?;
    let alpha_pattern = pattern_map("alpha_pattern")?
        .into_iter()
        .map(|(k, re, v)| match v.as_f64() {
            Some(a) => Ok((k, re, a)),
            None => Err(field_err(
                "alpha_pattern",
                format!("pattern `{k}`: expected a number, found {v}"),
            )),
        })
        .collect::<Result<Vec<_>>>()?;

    let (targets, targets_defaulted) = match get("target_modules") {
        None => (
            Targets::List(DEFAULT_TARGETS.iter().map(|s| s.to_string()).collect()),
            true,
        ),
        Some(Value::String(s)) if s.eq_ignore_ascii_case("all-linear") => (Targets::AllLinear, false),
        Some(Value::String(s)) => {
            let re = compile(path, "target_modules", &format!("^(?:{s})$"), "target regex")?;
            (Targets::Regex(s.clone(), re), false)
        }
        Some(Value::Array(items)) => (
            Targets::List(string_list(path, "target_modules", items)?),
            false,
        ),
        Some(v) => {
            return Err(field_err(
                "target_modules",
                format!("expected a list of module names, a regex string, \"all-linear\" or null, found {v}"),
            ))
        }
    };
    let exclude = match get("exclude_modules") {
        None => None,
        Some(Value::String(s)) => Some(Exclude::Regex(compile(
            path,
            "exclude_modules",
            &format!("^(?:{s})$"),
            "exclude regex",
        )?)),
        Some(Value::Array(items)) => {
            Some(Exclude::List(string_list(path, "exclude_modules", items)?))
        }
        Some(v) => {
            return Err(field_err(
                "exclude_modules",
                format!("expected a list of module names or a regex string, found {v}"),
            ))
        }
    };
    let layers_to_transform = match get("layers_to_transform") {
        None => None,
        Some(Value::Number(n)) => Some(vec![n.as_i64().ok_or_else(|| {
            field_err(
                "layers_to_transform",
                format!("expected a layer index, found {n}"),
            )
        })?]),
        Some(Value::Array(items)) => Some(
            items
                .iter()
                .map(|v| {
                    v.as_i64().ok_or_else(|| {
                        field_err(
                            "layers_to_transform",
                            format!("expected layer indices, found {v}"),
                        )
                    })
                })
                .collect::<Result<Vec<_>>>()?,
        ),
        Some(v) => {
            return Err(field_err(
                "layers_to_transform",
                format!("expected a layer index or a list of them, found {v}"),
            ))
        }
    }
    // peft: an empty list means "all layers".
    .filter(|l| !l.is_empty());
    if layers_to_transform.is_some() && matches!(targets, Targets::Regex(..)) {
        return Err(field_err(
            "layers_to_transform",
            "cannot be combined with a regex string in target_modules (peft refuses this config)"
                .into(),
        ));
    }
    let layers_pattern = match get("layers_pattern") {
        None => Vec::new(),
        Some(Value::String(s)) if s.is_empty() => Vec::new(),
        Some(Value::String(s)) => vec![s.clone()],
        Some(Value::Array(items)) => string_list(path, "layers_pattern", items)?,
        Some(v) => {
            return Err(field_err(
                "layers_pattern",
                format!("expected a string or a list of strings, found {v}"),
            ))
        }
    }
    .iter()
    .map(|p| {
        compile(
            path,
            "layers_pattern",
            &format!(r"^(?:^|.*?\.){p}\.(?P<idx>\d+)\."),
            "layers pattern",
        )
    })
    .collect::<Result<Vec<_>>>()?;
    let modules_to_save = match get("modules_to_save") {
        None => Vec::new(),
        Some(Value::Array(items)) => string_list(path, "modules_to_save", items)?
            .into_iter()
            .map(|m| {
                let re = compile(
                    path,
                    "modules_to_save",
                    &format!(r"^(^|.*\.){m}($|\..*)"),
                    "module name",
                )?;
                Ok((m, re))
            })
            .collect::<Result<Vec<_>>>()?,
        Some(v) => {
            return Err(field_err(
                "modules_to_save",
                format!("expected a list of module names, found {v}"),
            ))
        }
    };

    Ok(Config {
        r,
        alpha,
        use_rslora,
        use_dora,
        lora_bias,
        rank_pattern,
        alpha_pattern,
        targets,
        targets_defaulted,
        exclude,
        layers_to_transform,
        layers_pattern,
        modules_to_save,
    })
}

fn positive_int(v: &Value) -> Option<usize> {
    v.as_u64().filter(|&n| n > 0).map(|n| n as usize)
}

fn string_list(path: &Path, field: &str, items: &[Value]) -> Result<Vec<String>> {
    items
        .iter()
        .map(|v| {
            v.as_str().map(str::to_string).ok_or_else(|| {
                Error::field(
                    path,
                    None,
                    field,
                    format!("expected a list of strings, found {v}"),
                )
            })
        })
        .collect()
}

impl Config {
    /// Parses and validates the bytes of an adapter_config.json; `path` names the source in
    /// messages.
    pub fn parse(path: &Path, bytes: &[u8]) -> Result<Config> {
        let json: Value = serde_json::from_slice(bytes)
            .map_err(|e| Error::line(path, e.line(), format!("not valid JSON: {e}")))?;
        parse_config(path, &json)
    }

    /// peft `get_pattern_key` + lookup: the first pattern key, in file order, matching a whole
    /// dotted suffix of `module`.
    pub fn rank_for(&self, module: &str) -> usize {
        self.rank_pattern
            .iter()
            .find(|(_, re, _)| re.is_match(module))
            .map_or(self.r, |(_, _, v)| *v)
    }

    pub fn alpha_for(&self, module: &str) -> f64 {
        self.alpha_pattern
            .iter()
            .find(|(_, re, _)| re.is_match(module))
            .map_or(self.alpha, |(_, _, v)| *v)
    }

    /// s = α/r, or α/√r with rsLoRA (Kalajdzievski 2023, "A Rank Stabilization Scaling Factor
    /// for Fine-Tuning with LoRA"; peft `LoraLayer.update_layer`).
    pub fn scaling(&self, rank: usize, alpha: f64) -> f64 {
        if self.use_rslora {
            alpha / (rank as f64).sqrt()
        } else {
            alpha / rank as f64
        }
    }

    fn in_modules_to_save(&self, module: &str) -> bool {
        self.modules_to_save
            .iter()
            .any(|(_, re)| re.is_match(module))
    }

    fn excluded(&self, module: &str) -> bool {
        match &self.exclude {
            None => false,
            Some(Exclude::Regex(re)) => re.is_match(module),
            Some(Exclude::List(list)) => list.iter().any(|e| suffix_match(module, e)),
        }
    }

    /// peft `check_target_module_exists` for one module name. `is_linear` serves the
    /// unexpanded `"all-linear"` form.
    pub fn selects(&self, module: &str, is_linear: bool) -> bool {
        if self.excluded(module) || self.in_modules_to_save(module) {
            return false;
        }
        match &self.targets {
            Targets::Regex(_, re) => re.is_match(module),
            Targets::AllLinear => is_linear && module != HEAD_MODULE,
            Targets::List(list) => {
                if list.iter().any(|t| t == module) {
                    return true;
                }
                if !list.iter().any(|t| module.ends_with(&format!(".{t}"))) {
                    return false;
                }
                let Some(layers) = &self.layers_to_transform else {
                    return true;
                };
                let index = if self.layers_pattern.is_empty() {
                    // peft: re.match(r".*?\.[^.]*\.(?P<idx>\d+)\.", key), the first numbered segment
                    first_layer_index(module)
                } else {
                    self.layers_pattern.iter().find_map(|re| {
                        re.captures(module)
                            .and_then(|c| c.name("idx"))
                            .and_then(|m| m.as_str().parse::<i64>().ok())
                    })
                };
                index.is_some_and(|i| layers.contains(&i))
            }
        }
    }
}

/// An entry equals the name or is a dotted suffix of it.
fn suffix_match(module: &str, entry: &str) -> bool {
    module == entry || module.ends_with(&format!(".{entry}"))
}

fn first_layer_index(module: &str) -> Option<i64> {
    static RE: std::sync::OnceLock<Regex> = std::sync::OnceLock::new();
    let re = RE.get_or_init(|| Regex::new(r"^.*?\.[^.]*\.(?P<idx>\d+)\.").expect("valid regex"));
    re.captures(module)
        .and_then(|c| c.name("idx"))
        .and_then(|m| m.as_str().parse().ok())
}

/// Which part of a LoRA module an adapter key holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Part {
    A,
    B,
    BBias,
    EmbA,
    EmbB,
    Magnitude,
}

const PARTS: [(&str, Part); 7] = [
    (".lora_A.weight", Part::A),
    (".lora_B.weight", Part::B),
    (".lora_B.bias", Part::BBias),
    (".lora_embedding_A", Part::EmbA),
    (".lora_embedding_B", Part::EmbB),
    (".lora_magnitude_vector", Part::Magnitude),
    // older peft releases saved the magnitude as a sub-module parameter
    (".lora_magnitude_vector.weight", Part::Magnitude),
];

type Parsed = (BTreeMap<String, LoraModule>, Vec<Replacement>);

fn parse_tensors(
    config_path: &Path,
    weights_path: &Path,
    config: &Config,
    tensors: HashMap<String, Tensor>,
) -> Result<Parsed> {
    let tensor_err = |key: &str, msg: String| Error::field(weights_path, None, key, msg);
    let mut parts: BTreeMap<String, BTreeMap<&'static str, (Part, String, Tensor)>> =
        BTreeMap::new();
    let mut replacements = Vec::new();
    let mut keys: Vec<String> = tensors.keys().cloned().collect();
    keys.sort();
    let mut tensors = tensors;
    for key in keys {
        let Some(tensor) = tensors.remove(&key) else {
            continue;
        };
        let Some(name) = key.strip_prefix(KEY_PREFIX) else {
            return Err(tensor_err(
                &key,
                format!("unexpected tensor name: peft adapter keys start with `{KEY_PREFIX}`"),
            ));
        };
        let tensor = match tensor.dtype() {
            DType::F32 => tensor,
            DType::F16 | DType::BF16 | DType::F64 => tensor.to_dtype(DType::F32)?,
            other => {
                return Err(tensor_err(
                    &key,
                    format!("dtype {other:?} is not supported; expected F32, BF16 or F16 (quantised adapters are not read)"),
                ))
            }
        };
        if let Some((suffix, part)) = PARTS.iter().find(|(s, _)| name.ends_with(s)) {
            let module = &name[..name.len() - suffix.len()];
            let slot = match part {
                Part::A | Part::EmbA => "A",
                Part::B | Part::EmbB => "B",
                Part::BBias => "bias",
                Part::Magnitude => "magnitude",
            };
            let entry = parts.entry(module.to_string()).or_default();
            if entry.insert(slot, (*part, key.clone(), tensor)).is_some() {
                return Err(tensor_err(
                    &key,
                    format!("module `{module}` has this LoRA tensor twice"),
                ));
            }
        } else if name.contains(".lora_") || name.starts_with("lora_") {
            return Err(tensor_err(
                &key,
                "unrecognised LoRA tensor (expected …lora_A.weight, …lora_B.weight, …lora_B.bias, …lora_embedding_A/B or …lora_magnitude_vector; a key that still carries the adapter name was not saved by peft's save_pretrained)".into(),
            ));
        } else {
            let base_layer = name.contains(".base_layer.");
            let target = name.replace(".base_layer.", ".");
            replacements.push(Replacement {
                key,
                target,
                base_layer,
                tensor,
            });
        }
    }

    let mut modules = BTreeMap::new();
    for (module, mut slots) in parts {
        let (a_part, a_key, a) = slots.remove("A").ok_or_else(|| {
            Error::file(
                weights_path,
                format!("module `{module}` has a LoRA B tensor but no lora_A"),
            )
        })?;
        let (b_part, b_key, b) = slots.remove("B").ok_or_else(|| {
            Error::field(
                weights_path,
                None,
                &a_key,
                format!("module `{module}` has lora_A but no lora_B"),
            )
        })?;
        let kind = match (a_part, b_part) {
            (Part::A, Part::B) => ModuleKind::Linear,
            (Part::EmbA, Part::EmbB) => ModuleKind::Embedding,
            _ => {
                return Err(tensor_err(
                    &b_key,
                    format!("module `{module}` mixes Linear (lora_A/lora_B) and Embedding (lora_embedding_A/B) tensors"),
                ))
            }
        };
        let b_bias = slots.remove("bias").map(|(_, k, t)| (k, t));
        let magnitude = slots.remove("magnitude").map(|(_, k, t)| (k, t));

        let (a_dims, b_dims) = (a.dims().to_vec(), b.dims().to_vec());
        if a_dims.len() != 2 || b_dims.len() != 2 || a_dims[0] != b_dims[1] {
            return Err(tensor_err(
                &b_key,
                format!("shape {b_dims:?} does not pair with `{a_key}` of shape {a_dims:?}: expected A [r, in] and B [out, r] with the same r"),
            ));
        }
        let rank = config.rank_for(&module);
        if a_dims[0] != rank {
            return Err(Error::field(
                config_path,
                None,
                if config.rank_pattern.iter().any(|(_, re, _)| re.is_match(&module)) {
                    "rank_pattern"
                } else {
                    "r"
                },
                format!(
                    "gives rank {rank} for `{module}`, but {} holds `{a_key}` with rank {} (shape {a_dims:?})",
                    WEIGHTS_FILE, a_dims[0]
                ),
            ));
        }
        let out = b_dims[0];
        match (&b_bias, config.lora_bias, kind) {
            (Some((k, t)), true, ModuleKind::Linear) => {
                if t.dims() != [out] {
                    return Err(tensor_err(k, format!("shape {:?}, expected [{out}] (the rows of `{b_key}`)", t.dims())));
                }
            }
            (Some((k, _)), _, _) => {
                return Err(tensor_err(
                    k,
                    "a lora_B bias is present but adapter_config.json has lora_bias false (or the module is an embedding)".into(),
                ))
            }
            (None, true, ModuleKind::Linear) => {
                return Err(Error::field(
                    config_path,
                    None,
                    "lora_bias",
                    format!("is true, but {WEIGHTS_FILE} has no `{KEY_PREFIX}{module}.lora_B.bias`"),
                ))
            }
            (None, _, _) => {}
        }
        let mag_len = match kind {
            ModuleKind::Linear => out,
            ModuleKind::Embedding => b_dims[0],
        };
        match (&magnitude, config.use_dora) {
            (Some((k, t)), true) => {
                if t.dims() != [mag_len] {
                    return Err(tensor_err(
                        k,
                        format!("shape {:?}, expected [{mag_len}] (one magnitude per {})", t.dims(), match kind {
                            ModuleKind::Linear => "output row",
                            ModuleKind::Embedding => "hidden column",
                        }),
                    ));
                }
            }
            (Some((k, _)), false) => {
                return Err(tensor_err(
                    k,
                    "a DoRA magnitude vector is present but adapter_config.json has use_dora false".into(),
                ))
            }
            (None, true) => {
                return Err(Error::field(
                    config_path,
                    None,
                    "use_dora",
                    format!("is true, but {WEIGHTS_FILE} has no `{KEY_PREFIX}{module}.lora_magnitude_vector`"),
                ))
            }
            (None, false) => {}
        }
        let alpha = config.alpha_for(&module);
        modules.insert(
            module.clone(),
            LoraModule {
                kind,
                a,
                b,
                a_key,
                b_key,
                b_bias,
                magnitude,
                rank,
                alpha,
                scaling: config.scaling(rank, alpha),
            },
        );
    }
    Ok((modules, replacements))
}

/// One planned change, checked against the base before anything is modified.
enum Step {
    /// Overwrite (or add) a base tensor with an adapter tensor.
    Replace { target: String, tensor: Tensor },
    /// Give `lm_head` its own handle on the current embedding tensor before the embeddings are
    /// replaced (a modules_to_save embedding copy on a tied model). No data is copied.
    KeepHeadFromEmbed,
}

/// Merges the adapter into `weights` in place. ΔW is computed in f32 and added with one
/// rounding to the base dtype (§5.3). `tied`: lm_head shares the embedding tensor
/// (tie_word_embeddings and no `lm_head.weight` in the map).
///
/// Everything is checked before the first tensor changes, so on error `weights` is untouched.
/// Only one tensor is rebuilt at a time: the map never holds a second copy of the weights.
pub fn merge(
    weights: &mut HashMap<String, Tensor>,
    adapter: &Adapter,
    tied: bool,
) -> Result<MergeSummary> {
    let wpath = &adapter.weights_path;
    let cpath = &adapter.config_path;
    let config = &adapter.config;
    if tied && weights.contains_key(HEAD_WEIGHT) {
        return Err(Error::internal(
            "merge called with tied=true but lm_head.weight is in the weight map",
        ));
    }
    let embed_shape = weights.get(EMBED_WEIGHT).map(|t| t.dims().to_vec());

    // Base modules: every checkpoint name without its last component; `lm_head` too when tied.
    let mut base_modules: BTreeMap<String, bool> = BTreeMap::new(); // name -> has a 2-D weight
    for (name, t) in weights.iter() {
        if let Some((module, last)) = name.rsplit_once('.') {
            let is_matrix = last == "weight" && t.rank() == 2;
            let e = base_modules.entry(module.to_string()).or_insert(false);
            *e |= is_matrix;
        }
    }
    if tied {
        base_modules.insert(HEAD_MODULE.to_string(), true);
    }
    let is_linear = |m: &str| {
        base_modules.get(m).copied().unwrap_or(false)
            && !m.ends_with("embed_tokens")
            && m != HEAD_MODULE
    };

    // Every name in the config must exist in the base.
    check_config_names(cpath, config, &base_modules)?;

    // 1. Replacements.
    let mut steps = Vec::new();
    let mut still_tied = tied;
    let mut head_into_embed = false;
    let mut added: BTreeSet<String> = BTreeSet::new();
    let shape_of = |name: &str, added: &BTreeSet<String>| -> Option<Vec<usize>> {
        weights.get(name).map(|t| t.dims().to_vec()).or_else(|| {
            if added.contains(name) {
                embed_shape.clone()
            } else {
                None
            }
        })
    };
    for rep in &adapter.replacements {
        let mut target = rep.target.clone();
        let expected = if let Some(s) = shape_of(&target, &added) {
            if still_tied && target == EMBED_WEIGHT && !rep.base_layer {
                // modules_to_save copy of the embeddings: the head keeps the original tensor.
                steps.push(Step::KeepHeadFromEmbed);
                added.insert(HEAD_WEIGHT.to_string());
                still_tied = false;
            }
            s
        } else if still_tied && target == HEAD_WEIGHT {
            let s = embed_shape.clone().ok_or_else(|| {
                Error::internal("tied=true but the weight map has no model.embed_tokens.weight")
            })?;
            if rep.base_layer {
                // The wrapped head *is* the shared tensor.
                target = EMBED_WEIGHT.to_string();
                head_into_embed = true;
            } else {
                added.insert(HEAD_WEIGHT.to_string());
                still_tied = false;
            }
            s
        } else {
            return Err(Error::field(
                wpath,
                None,
                &rep.key,
                format!(
                    "replaces base tensor `{}`, which the base model does not have; the adapter was made for another base model",
                    rep.target
                ),
            ));
        };
        if rep.tensor.dims() != expected.as_slice() {
            return Err(Error::field(
                wpath,
                None,
                &rep.key,
                format!(
                    "shape {:?} does not fit the base model: base tensor `{target}` has shape {expected:?}; the adapter was made for another base model (hidden size, vocabulary or projection sizes differ)",
                    rep.tensor.dims()
                ),
            ));
        }
        steps.push(Step::Replace {
            target,
            tensor: rep.tensor.clone(),
        });
    }

    // 2. LoRA modules: config agreement, then shapes.
    let mut plans: Vec<(&String, &LoraModule, String)> = Vec::new();
    for (module, lora) in &adapter.modules {
        if !config.selects(module, is_linear(module)) {
            return Err(Error::field(
                cpath,
                None,
                "target_modules",
                format!(
                    "{WEIGHTS_FILE} has LoRA tensors for `{module}` (`{}`), but the config's target_modules/exclude_modules/layers_to_transform/modules_to_save do not select that module; the files do not belong together",
                    lora.a_key
                ),
            ));
        }
        let weight_name = format!("{module}.weight");
        let (into, base_shape) = if let Some(s) = shape_of(&weight_name, &added) {
            (weight_name.clone(), s)
        } else if module == HEAD_MODULE && still_tied {
            head_into_embed = true;
            (
                EMBED_WEIGHT.to_string(),
                embed_shape.clone().ok_or_else(|| {
                    Error::internal("tied=true but the weight map has no model.embed_tokens.weight")
                })?,
            )
        } else {
            return Err(Error::field(
                wpath,
                None,
                &lora.a_key,
                format!("adapts module `{module}`, but the base model has no `{weight_name}`; the adapter was made for another base model"),
            ));
        };
        check_lora_shapes(wpath, module, lora, &into, &base_shape)?;
        if let Some((bkey, _)) = &lora.b_bias {
            let bias_name = format!("{module}.bias");
            let replaced = adapter.replacements.iter().any(|r| r.target == bias_name);
            if !weights.contains_key(&bias_name) && !replaced {
                return Err(Error::field(
                    wpath,
                    None,
                    bkey,
                    format!("lora_bias needs the base bias `{bias_name}`, which the base model does not have (peft: \"Impossible to merge LoRA with `lora_bias=True` because the base layer has no bias\")"),
                ));
            }
        }
        plans.push((module, lora, into));
    }
    // Every module the config selects must have its tensors: a missing one is a truncated file.
    for (module, &matrix) in &base_modules {
        if !matrix || !config.selects(module, is_linear(module)) {
            continue;
        }
        if !adapter.modules.contains_key(module) {
            return Err(Error::field(
                cpath,
                None,
                "target_modules",
                format!("selects `{module}`, but {WEIGHTS_FILE} has no LoRA tensors for it; the adapter file is incomplete or belongs to another base"),
            ));
        }
    }

    // Everything fits: apply.
    let mut replaced = BTreeSet::new();
    for step in steps {
        match step {
            Step::KeepHeadFromEmbed => {
                let embed = weights
                    .get(EMBED_WEIGHT)
                    .cloned()
                    .ok_or_else(|| Error::internal("embedding tensor vanished during the merge"))?;
                weights.insert(HEAD_WEIGHT.to_string(), embed);
            }
            Step::Replace { target, tensor } => {
                let dtype = weights.get(&target).map_or(DType::F32, |t| t.dtype());
                weights.insert(target.clone(), tensor.to_dtype(dtype)?);
                replaced.insert(target);
            }
        }
    }
    let mut merged = Vec::new();
    for (module, lora, into) in plans {
        let base = weights.remove(&into).ok_or_else(|| {
            Error::internal(format!("base tensor {into} vanished during the merge"))
        })?;
        let dtype = base.dtype();
        let new = merge_one(&base.to_dtype(DType::F32)?, lora)?;
        drop(base);
        weights.insert(into.clone(), new.to_dtype(dtype)?);
        if let Some((_, b_bias)) = &lora.b_bias {
            let bias_name = format!("{module}.bias");
            let bias = weights
                .remove(&bias_name)
                .ok_or_else(|| Error::internal(format!("base bias {bias_name} vanished")))?;
            let dtype = bias.dtype();
            let new = (bias.to_dtype(DType::F32)? + b_bias.affine(lora.scaling, 0.0)?)?;
            weights.insert(bias_name, new.to_dtype(dtype)?);
        }
        merged.push(MergedModule {
            name: module.clone(),
            kind: lora.kind,
            rank: lora.rank,
            alpha: lora.alpha,
            scaling: lora.scaling,
            dora: lora.magnitude.is_some(),
            into,
        });
    }
    Ok(MergeSummary {
        modules_merged: merged.len(),
        replaced: replaced.into_iter().collect(),
        modules: merged,
        untied: tied && !still_tied,
        head_merged_into_embeddings: head_into_embed,
    })
}

/// Every entry of target_modules (list form) must name a module of the base, a regex target
/// must match one, and every modules_to_save entry must exist: a name that matches nothing
/// means the adapter was made for another architecture.
fn check_config_names(path: &Path, config: &Config, base: &BTreeMap<String, bool>) -> Result<()> {
    let hint = "the adapter was made for another base model (or the config was edited by hand)";
    match &config.targets {
        Targets::List(list) if !config.targets_defaulted => {
            for t in list {
                if !base.keys().any(|m| suffix_match(m, t)) {
                    return Err(Error::field(
                        path,
                        None,
                        "target_modules",
                        format!(
                            "names `{t}`, but no module of the base model is called that; {hint}"
                        ),
                    ));
                }
            }
        }
        Targets::Regex(src, re) if !base.keys().any(|m| re.is_match(m)) => {
            return Err(Error::field(
                path,
                None,
                "target_modules",
                format!("the regex `{src}` matches no module of the base model; {hint}"),
            ));
        }
        _ => {}
    }
    for (m, re) in &config.modules_to_save {
        if !base.keys().any(|b| re.is_match(b)) {
            return Err(Error::field(
                path,
                None,
                "modules_to_save",
                format!("names `{m}`, but no module of the base model is called that; {hint}"),
            ));
        }
    }
    Ok(())
}

fn check_lora_shapes(
    wpath: &Path,
    module: &str,
    lora: &LoraModule,
    base_name: &str,
    base_shape: &[usize],
) -> Result<()> {
    let hint = "the adapter was made for another base model (hidden size, vocabulary or projection sizes differ)";
    if base_shape.len() != 2 {
        return Err(Error::field(
            wpath,
            None,
            &lora.a_key,
            format!("adapts `{module}`, but base tensor `{base_name}` has shape {base_shape:?}, not a matrix"),
        ));
    }
    let r = lora.rank;
    // Linear W [out, in]: A [r, in], B [out, r]. Embedding E [vocab, hidden]: A_e [r, vocab], B_e [hidden, r].
    let (exp_a, exp_b) = match lora.kind {
        ModuleKind::Linear => ([r, base_shape[1]], [base_shape[0], r]),
        ModuleKind::Embedding => ([r, base_shape[0]], [base_shape[1], r]),
    };
    for (key, t, exp) in [(&lora.a_key, &lora.a, exp_a), (&lora.b_key, &lora.b, exp_b)] {
        if t.dims() != exp {
            return Err(Error::field(
                wpath,
                None,
                key,
                format!(
                    "shape {:?} does not fit the base model: expected {exp:?} for base tensor `{base_name}` of shape {base_shape:?}; {hint}",
                    t.dims()
                ),
            ));
        }
    }
    Ok(())
}

/// W' for one module, all in f32. `base` is W [out, in] or E [vocab, hidden].
fn merge_one(base: &Tensor, lora: &LoraModule) -> Result<Tensor> {
    // peft get_delta_weight: (B @ A) * scaling; embeddings transpose B_e @ A_e to [vocab, hidden].
    let ba = lora.b.matmul(&lora.a)?;
    let delta = match lora.kind {
        ModuleKind::Linear => ba,
        ModuleKind::Embedding => ba.t()?.contiguous()?,
    }
    .affine(lora.scaling, 0.0)?;
    let v = (base + delta)?;
    let Some((_, m)) = &lora.magnitude else {
        return Ok(v);
    };
    // DoRA (Liu et al. 2024; peft DoraLinearVariant / DoraEmbeddingVariant merge): rescale each
    // output row (Linear) or hidden column (Embedding) of V = W + ΔW to the magnitude m.
    let out = match lora.kind {
        ModuleKind::Linear => {
            let norm = v.sqr()?.sum_keepdim(1)?.sqrt()?; // [out, 1]
            let factor = m.reshape((m.dim(0)?, 1))?.div(&norm)?;
            v.broadcast_mul(&factor)?
        }
        ModuleKind::Embedding => {
            let norm = v.sqr()?.sum_keepdim(0)?.sqrt()?; // [1, hidden]
            let factor = m.reshape((1, m.dim(0)?))?.div(&norm)?;
            v.broadcast_mul(&factor)?
        }
    };
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    const Q: &str = "model.layers.0.self_attn.q_proj";
    const V: &str = "model.layers.0.self_attn.v_proj";

    fn t(data: &[f32], shape: &[usize]) -> Tensor {
        Tensor::from_slice(data, shape, &Device::Cpu).unwrap()
    }

    fn filled(shape: &[usize], start: f32) -> Tensor {
        let n: usize = shape.iter().product();
        let data: Vec<f32> = (0..n).map(|i| start + 0.01 * i as f32).collect();
        t(&data, shape)
    }

    /// A one-layer base: hidden 4, q_proj [4, 4], v_proj [2, 4], embeddings [6, 4], tied.
    fn base() -> HashMap<String, Tensor> {
        let mut w = HashMap::new();
        w.insert(format!("{Q}.weight"), filled(&[4, 4], 0.1));
        w.insert(format!("{V}.weight"), filled(&[2, 4], -0.2));
        w.insert(EMBED_WEIGHT.to_string(), filled(&[6, 4], 0.3));
        w.insert(
            "model.layers.0.input_layernorm.weight".to_string(),
            filled(&[4], 1.0),
        );
        w
    }

    fn base_config() -> Value {
        json!({"peft_type": "LORA", "r": 2, "lora_alpha": 4, "target_modules": ["q_proj", "v_proj"]})
    }

    /// q/v LoRA tensors of rank 2 for `base()`.
    fn qv_tensors() -> Vec<(String, Tensor)> {
        vec![
            (
                format!("{KEY_PREFIX}{Q}.lora_A.weight"),
                filled(&[2, 4], 0.5),
            ),
            (
                format!("{KEY_PREFIX}{Q}.lora_B.weight"),
                filled(&[4, 2], -0.1),
            ),
            (
                format!("{KEY_PREFIX}{V}.lora_A.weight"),
                filled(&[2, 4], 0.2),
            ),
            (
                format!("{KEY_PREFIX}{V}.lora_B.weight"),
                filled(&[2, 2], 0.3),
            ),
        ]
    }

    fn write(dir: &Path, config: &Value, tensors: &[(String, Tensor)]) {
        std::fs::write(
            dir.join(CONFIG_FILE),
            serde_json::to_vec_pretty(config).unwrap(),
        )
        .unwrap();
        let map: HashMap<String, Tensor> = tensors.iter().cloned().collect();
        candle_core::safetensors::save(&map, dir.join(WEIGHTS_FILE)).unwrap();
    }

    fn adapter(
        config: &Value,
        tensors: &[(String, Tensor)],
    ) -> (tempfile::TempDir, Result<Adapter>) {
        let dir = tempfile::tempdir().unwrap();
        write(dir.path(), config, tensors);
        let a = Adapter::load(dir.path());
        (dir, a)
    }

    fn err_of(config: &Value, tensors: &[(String, Tensor)]) -> String {
        let (_d, a) = adapter(config, tensors);
        let e = a.expect_err("load should fail");
        assert_eq!(e.exit_code(), 2, "{e}");
        e.to_string()
    }

    fn merge_err(
        config: &Value,
        tensors: &[(String, Tensor)],
        weights: &mut HashMap<String, Tensor>,
    ) -> String {
        let (_d, a) = adapter(config, tensors);
        let before: Vec<(String, Vec<f32>)> = weights
            .iter()
            .map(|(k, v)| (k.clone(), v.flatten_all().unwrap().to_vec1().unwrap()))
            .collect();
        let e = merge(weights, &a.unwrap(), true).expect_err("merge should fail");
        assert_eq!(e.exit_code(), 2, "{e}");
        for (k, v) in before {
            let now: Vec<f32> = weights[&k].flatten_all().unwrap().to_vec1().unwrap();
            assert_eq!(now, v, "{k} changed although the merge failed");
        }
        e.to_string()
    }

    fn cfg(extra: Value) -> Config {
        let mut c = base_config();
        for (k, v) in extra.as_object().unwrap() {
            c[k] = v.clone();
        }
        parse_config(Path::new(CONFIG_FILE), &c).unwrap()
    }

    #[test]
    fn linear_merge_is_w_plus_scaled_ba() {
        // LoRA paper (Hu et al. 2021, eq. 3) and peft get_delta_weight: W' = W + (alpha/r)·B·A.
        let mut w = HashMap::new();
        w.insert(format!("{Q}.weight"), t(&[1., 0., 0., 1.], &[2, 2]));
        let tensors = vec![
            (
                format!("{KEY_PREFIX}{Q}.lora_A.weight"),
                t(&[1., 2.], &[1, 2]),
            ),
            (
                format!("{KEY_PREFIX}{Q}.lora_B.weight"),
                t(&[1., 3.], &[2, 1]),
            ),
        ];
        let config = json!({"peft_type": "LORA", "r": 1, "lora_alpha": 2, "target_modules": [Q]});
        let (_d, a) = adapter(&config, &tensors);
        let s = merge(&mut w, &a.unwrap(), false).unwrap();
        assert_eq!(s.modules_merged, 1);
        assert_eq!(s.modules[0].scaling, 2.0);
        let got: Vec<f32> = w[&format!("{Q}.weight")]
            .flatten_all()
            .unwrap()
            .to_vec1()
            .unwrap();
        assert_eq!(got, vec![3., 4., 6., 13.]);
    }

    #[test]
    fn dora_rows_take_the_trained_magnitude() {
        // DoRA (Liu et al. 2024, eq. 5): W' = m · V / ‖V‖_c with V = W + ΔW; peft takes the norm
        // over each output row of a Linear weight, so the merged rows have norm m.
        let mut w = base();
        let m = [0.5f32, 1.0, 1.5, 2.0];
        let mut tensors = qv_tensors()[..2].to_vec();
        tensors.push((
            format!("{KEY_PREFIX}{Q}.lora_magnitude_vector"),
            t(&m, &[4]),
        ));
        let config = json!({"peft_type": "LORA", "r": 2, "lora_alpha": 4, "target_modules": ["q_proj"], "use_dora": true});
        let (_d, a) = adapter(&config, &tensors);
        let s = merge(&mut w, &a.unwrap(), true).unwrap();
        assert!(s.modules[0].dora);
        let norms: Vec<f32> = w[&format!("{Q}.weight")]
            .sqr()
            .unwrap()
            .sum(1)
            .unwrap()
            .sqrt()
            .unwrap()
            .to_vec1()
            .unwrap();
        for (n, m) in norms.iter().zip(m) {
            assert!((n - m).abs() < 1e-6, "{norms:?}");
        }
    }

    #[test]
    fn scaling_plain_and_rslora() {
        // plain LoRA alpha/r; rsLoRA (Kalajdzievski 2023) alpha/sqrt(r).
        assert_eq!(cfg(json!({})).scaling(16, 8.0), 0.5);
        assert_eq!(cfg(json!({"use_rslora": true})).scaling(16, 8.0), 2.0);
    }

    #[test]
    fn pattern_lookup_takes_first_key_in_file_order_on_whole_suffixes() {
        // peft utils/other.py get_pattern_key: first key k with re.match(rf"(.*\.)?({k})$", name).
        let c = cfg(json!({
            "rank_pattern": {"down_proj": 2, "layers\\.1\\.mlp\\.down_proj": 6, "proj": 9},
            "alpha_pattern": {"layers\\.1\\.mlp\\.down_proj": 3, "down_proj": 5}
        }));
        assert_eq!(c.rank_for("model.layers.1.mlp.down_proj"), 2);
        assert_eq!(c.rank_for("model.layers.0.mlp.down_proj"), 2);
        // "proj" is not a whole dotted suffix of "…q_proj": the default applies.
        assert_eq!(c.rank_for(Q), 2);
        assert_eq!(cfg(json!({"r": 7})).rank_for(Q), 7);
        assert_eq!(c.alpha_for("model.layers.1.mlp.down_proj"), 3.0);
        assert_eq!(c.alpha_for("model.layers.0.mlp.down_proj"), 5.0);
        assert_eq!(c.alpha_for(Q), 4.0);
    }

    #[test]
    fn target_selection_mirrors_check_target_module_exists() {
        // peft tuners_utils.py check_target_module_exists.
        let list = cfg(json!({"target_modules": ["q_proj"]}));
        assert!(list.selects(Q, true));
        assert!(!list.selects("model.layers.0.self_attn.xq_proj", true));
        let regex = cfg(json!({"target_modules": ".*layers\\.0\\..*_proj"}));
        assert!(regex.selects(Q, true));
        assert!(!regex.selects("model.layers.1.self_attn.q_proj", true));
        assert!(
            !cfg(json!({"target_modules": "q_proj"})).selects(Q, true),
            "fullmatch, not search"
        );
        let layers = cfg(json!({"target_modules": ["q_proj", V], "layers_to_transform": [1]}));
        assert!(layers.selects("model.layers.1.self_attn.q_proj", true));
        assert!(!layers.selects(Q, true));
        assert!(
            layers.selects(V, true),
            "an exact name skips the layer filter"
        );
        let pattern = cfg(
            json!({"target_modules": ["q_proj"], "layers_to_transform": 0, "layers_pattern": "layers"}),
        );
        assert!(pattern.selects(Q, true));
        assert!(!pattern.selects("model.layers.2.self_attn.q_proj", true));
        let excl =
            cfg(json!({"target_modules": ["q_proj", "v_proj"], "exclude_modules": ["v_proj"]}));
        assert!(excl.selects(Q, true) && !excl.selects(V, true));
        let excl_re = cfg(json!({"target_modules": ["q_proj"], "exclude_modules": ".*\\.0\\..*"}));
        assert!(!excl_re.selects(Q, true));
        let all = cfg(json!({"target_modules": "all-linear", "modules_to_save": ["v_proj"]}));
        assert!(all.selects(Q, true));
        assert!(!all.selects(V, true), "modules_to_save are never adapted");
        assert!(!all.selects(HEAD_MODULE, true));
        assert!(!all.selects("model.embed_tokens", false));
        let default = cfg(json!({"target_modules": null}));
        assert!(default.selects(Q, true) && default.selects(V, true));
        assert!(!default.selects("model.layers.0.self_attn.k_proj", true));
    }

    #[test]
    fn unsupported_configs_are_refused_naming_the_field() {
        let with = |k: &str, v: Value| {
            let mut c = base_config();
            c[k] = v;
            c
        };
        let cases = [
            (with("peft_type", json!("IA3")), "peft_type"),
            (
                with("alora_invocation_tokens", json!([5, 6])),
                "alora_invocation_tokens",
            ),
            (
                with("trainable_token_indices", json!([1])),
                "trainable_token_indices",
            ),
            (
                with("target_parameters", json!(["mlp.experts"])),
                "target_parameters",
            ),
            (
                with("layer_replication", json!([[0, 1]])),
                "layer_replication",
            ),
            (with("fan_in_fan_out", json!(true)), "fan_in_fan_out"),
            (
                with("init_lora_weights", json!("pissa_niter_4")),
                "init_lora_weights",
            ),
            (
                with("init_lora_weights", json!("olora")),
                "init_lora_weights",
            ),
            (with("r", json!(0)), "field `r`"),
            (with("target_modules", json!("(unclosed")), "target_modules"),
        ];
        for (config, field) in cases {
            let msg = err_of(&config, &qv_tensors());
            assert!(msg.contains(CONFIG_FILE) && msg.contains(field), "{msg}");
        }
        // Variants peft merges like plain LoRA are accepted.
        for init in [
            json!("gaussian"),
            json!("eva"),
            json!(false),
            json!("orthogonal"),
        ] {
            let (_d, a) = adapter(&with("init_lora_weights", init), &qv_tensors());
            a.unwrap();
        }
    }

    #[test]
    fn pickle_and_missing_files_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join(CONFIG_FILE), base_config().to_string()).unwrap();
        std::fs::write(dir.path().join(PICKLE_FILE), b"\x80\x02").unwrap();
        let e = Adapter::load(dir.path()).unwrap_err().to_string();
        assert!(e.contains(PICKLE_FILE) && e.contains(WEIGHTS_FILE), "{e}");
        std::fs::remove_file(dir.path().join(PICKLE_FILE)).unwrap();
        let e = Adapter::load(dir.path()).unwrap_err().to_string();
        assert!(e.contains(WEIGHTS_FILE), "{e}");
        std::fs::write(dir.path().join(CONFIG_FILE), "{\n\"r\": }").unwrap();
        std::fs::write(dir.path().join(WEIGHTS_FILE), b"").unwrap();
        let e = Adapter::load(dir.path()).unwrap_err().to_string();
        assert!(e.contains(&format!("{CONFIG_FILE}:2")), "{e}");
    }

    #[test]
    fn tensor_inconsistencies_are_refused_naming_the_tensor() {
        // Rank in the config differs from the tensors (peft would fail with a size mismatch).
        let mut c = base_config();
        c["rank_pattern"] = json!({"v_proj": 3});
        let msg = err_of(&c, &qv_tensors());
        assert!(msg.contains("rank_pattern") && msg.contains(V), "{msg}");
        // DoRA config without magnitudes, and magnitudes without DoRA.
        let mut c = base_config();
        c["use_dora"] = json!(true);
        assert!(err_of(&c, &qv_tensors()).contains("lora_magnitude_vector"));
        let mut tensors = qv_tensors();
        let mkey = format!("{KEY_PREFIX}{Q}.lora_magnitude_vector");
        tensors.push((mkey.clone(), filled(&[4], 1.0)));
        assert!(err_of(&base_config(), &tensors).contains(&mkey));
        // A key without peft's prefix, a key still carrying the adapter name, an integer dtype.
        let mut tensors = qv_tensors();
        tensors.push(("q_proj.lora_A.weight".into(), filled(&[2, 4], 0.0)));
        assert!(err_of(&base_config(), &tensors).contains("base_model.model."));
        let mut tensors = qv_tensors();
        let named = format!("{KEY_PREFIX}{Q}.lora_A.default.weight");
        tensors.push((named.clone(), filled(&[2, 4], 0.0)));
        assert!(err_of(&base_config(), &tensors).contains(&named));
        let mut tensors = qv_tensors();
        let ikey = format!("{KEY_PREFIX}model.norm.weight");
        tensors.push((ikey.clone(), Tensor::new(&[1i64, 2], &Device::Cpu).unwrap()));
        assert!(err_of(&base_config(), &tensors).contains(&ikey));
        // lora_A without lora_B.
        let msg = err_of(&base_config(), &qv_tensors()[..3]);
        assert!(msg.contains(V) && msg.contains("lora_B"), "{msg}");
    }

    #[test]
    fn mismatched_bases_fail_before_anything_changes() {
        // Wrong in-features for q_proj: names the adapter file, tensor, shapes and base tensor.
        let mut tensors = qv_tensors();
        tensors[0].1 = filled(&[2, 6], 0.5);
        let msg = merge_err(&base_config(), &tensors, &mut base());
        for want in [
            WEIGHTS_FILE,
            "q_proj.lora_A.weight",
            "[2, 6]",
            "[2, 4]",
            "[4, 4]",
        ] {
            assert!(msg.contains(want), "`{want}` not in {msg}");
        }
        // A module the base does not have.
        let mut c = base_config();
        c["target_modules"] = json!(["q_proj", "v_proj", "k_proj"]);
        let mut tensors = qv_tensors();
        tensors.push((
            format!("{KEY_PREFIX}model.layers.0.self_attn.k_proj.lora_A.weight"),
            filled(&[2, 4], 0.0),
        ));
        tensors.push((
            format!("{KEY_PREFIX}model.layers.0.self_attn.k_proj.lora_B.weight"),
            filled(&[2, 2], 0.0),
        ));
        let mut w = base();
        let msg = merge_err(&c, &tensors, &mut w);
        assert!(msg.contains("k_proj"), "{msg}");
        // LoRA tensors for a module the config does not select.
        let mut c = base_config();
        c["target_modules"] = json!(["q_proj"]);
        let msg = merge_err(&c, &qv_tensors(), &mut base());
        assert!(msg.contains("target_modules") && msg.contains(V), "{msg}");
        // The config selects v_proj but the file has no tensors for it.
        let msg = merge_err(&base_config(), &qv_tensors()[..2], &mut base());
        assert!(msg.contains("incomplete") && msg.contains(V), "{msg}");
        // lora_bias needs a base bias.
        let mut c = base_config();
        c["lora_bias"] = json!(true);
        let mut tensors = qv_tensors();
        tensors.push((format!("{KEY_PREFIX}{Q}.lora_B.bias"), filled(&[4], 0.1)));
        tensors.push((format!("{KEY_PREFIX}{V}.lora_B.bias"), filled(&[2], 0.1)));
        let msg = merge_err(&c, &tensors, &mut base());
        assert!(
            msg.contains("q_proj.lora_B.bias") && msg.contains("q_proj.bias"),
            "{msg}"
        );
        // A replacement of the wrong shape (a head for another vocabulary).
        let mut c = base_config();
        c["modules_to_save"] = json!(["lm_head"]);
        let mut tensors = qv_tensors();
        tensors.push((format!("{KEY_PREFIX}lm_head.weight"), filled(&[7, 4], 0.0)));
        let msg = merge_err(&c, &tensors, &mut base());
        assert!(
            msg.contains("lm_head.weight") && msg.contains("[7, 4]") && msg.contains("[6, 4]"),
            "{msg}"
        );
        // modules_to_save naming a module the base lacks.
        let mut c = base_config();
        c["modules_to_save"] = json!(["score"]);
        let msg = merge_err(&c, &qv_tensors(), &mut base());
        assert!(
            msg.contains("modules_to_save") && msg.contains("score"),
            "{msg}"
        );
    }

    #[test]
    fn modules_to_save_embeddings_on_a_tied_model_keep_the_old_head() {
        // peft's ModulesToSaveWrapper copies embed_tokens; lm_head keeps the original Parameter.
        let mut c = base_config();
        c["modules_to_save"] = json!(["embed_tokens"]);
        let mut tensors = qv_tensors();
        let new_embed = filled(&[6, 4], 9.0);
        tensors.push((format!("{KEY_PREFIX}{EMBED_WEIGHT}"), new_embed.clone()));
        let (_d, a) = adapter(&c, &tensors);
        let mut w = base();
        let old: Vec<f32> = w[EMBED_WEIGHT].flatten_all().unwrap().to_vec1().unwrap();
        let s = merge(&mut w, &a.unwrap(), true).unwrap();
        assert!(s.untied);
        let head: Vec<f32> = w[HEAD_WEIGHT].flatten_all().unwrap().to_vec1().unwrap();
        let embed: Vec<f32> = w[EMBED_WEIGHT].flatten_all().unwrap().to_vec1().unwrap();
        assert_eq!(head, old);
        assert_eq!(
            embed,
            new_embed.flatten_all().unwrap().to_vec1::<f32>().unwrap()
        );
    }

    #[test]
    fn fingerprint_covers_both_files() {
        let (_d1, a) = adapter(&base_config(), &qv_tensors());
        let (_d2, b) = adapter(&base_config(), &qv_tensors());
        let mut c = base_config();
        c["lora_alpha"] = json!(5);
        let (_d3, d) = adapter(&c, &qv_tensors());
        let mut tensors = qv_tensors();
        tensors[0].1 = filled(&[2, 4], 0.25);
        let (_d4, e) = adapter(&base_config(), &tensors);
        let (a, b, d, e) = (a.unwrap(), b.unwrap(), d.unwrap(), e.unwrap());
        assert_eq!(a.fingerprint(), b.fingerprint());
        assert_eq!(a.fingerprint().len(), 64);
        assert_ne!(a.fingerprint(), d.fingerprint());
        assert_ne!(a.fingerprint(), e.fingerprint());
    }
}
