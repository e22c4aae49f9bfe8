//! `adapter_config.json`: the fields that matter for merging, validated, and peft's rules for
//! which modules an adapter selects and at which rank and alpha (docs/model-formats.md §5.1;
//! peft 0.21.2 `peft/tuners/lora/config.py`, `peft/tuners/tuners_utils.py`,
//! `peft/utils/other.py`).

use crate::error::{Error, Result};
use crate::model::names::HEAD_MODULE;
use regex::Regex;
use serde_json::Value;
use std::path::Path;

/// The config file peft writes.
pub const CONFIG_FILE: &str = "adapter_config.json";

/// Default `target_modules` when the config has null: peft's
/// `TRANSFORMERS_MODELS_TO_LORA_TARGET_MODULES_MAPPING` entry for llama, mistral, qwen2, qwen3,
/// gemma and gemma2 (`peft/utils/constants.py`).
const DEFAULT_TARGETS: [&str; 2] = ["q_proj", "v_proj"];

/// `init_lora_weights` values whose adapters assume a base modified at init
/// (docs/model-formats.md §5.5). Converted adapters carry `init_lora_weights: true` and merge
/// normally.
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
pub(super) enum Targets {
    /// A list: an entry equals the module name or is a dotted suffix of it.
    List(Vec<String>),
    /// A string: `re.fullmatch` against the full module name.
    Regex(String, Regex),
    /// `"all-linear"` left unexpanded: every Linear except the output head.
    AllLinear,
}

/// `exclude_modules`: same list / regex semantics as the targets, without layer filtering.
#[derive(Debug, Clone)]
pub(super) enum Exclude {
    List(Vec<String>),
    Regex(Regex),
}

/// The parts of adapter_config.json that matter for merging, validated.
#[derive(Debug, Clone)]
pub struct Config {
    pub(super) r: usize,
    pub(super) alpha: f64,
    pub(super) use_rslora: bool,
    pub(super) use_dora: bool,
    pub(super) lora_bias: bool,
    /// `(key, compiled (.*\.)?(key)$, value)` in file order.
    pub(super) rank_pattern: Vec<(String, Regex, usize)>,
    pub(super) alpha_pattern: Vec<(String, Regex, f64)>,
    pub(super) targets: Targets,
    /// Whether `target_modules` was null (then the defaults apply).
    pub(super) targets_defaulted: bool,
    pub(super) exclude: Option<Exclude>,
    pub(super) layers_to_transform: Option<Vec<i64>>,
    /// `(?:^|.*?\.)pattern\.(?P<idx>\d+)\.` per layers_pattern entry; empty means "any".
    pub(super) layers_pattern: Vec<Regex>,
    /// `(^|.*\.)m($|\..*)` per modules_to_save entry, with the raw name.
    pub(super) modules_to_save: Vec<(String, Regex)>,
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
pub(super) fn suffix_match(module: &str, entry: &str) -> bool {
    module == entry || module.ends_with(&format!(".{entry}"))
}

fn first_layer_index(module: &str) -> Option<i64> {
    static RE: std::sync::OnceLock<Regex> = std::sync::OnceLock::new();
    let re = RE.get_or_init(|| Regex::new(r"^.*?\.[^.]*\.(?P<idx>\d+)\.").expect("valid regex"));
    re.captures(module)
        .and_then(|c| c.name("idx"))
        .and_then(|m| m.as_str().parse().ok())
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    const Q: &str = "model.layers.0.self_attn.q_proj";
    const V: &str = "model.layers.0.self_attn.v_proj";

    fn cfg(extra: Value) -> Config {
        let mut c = crate::model::lora::tests::base_config();
        for (k, v) in extra.as_object().unwrap() {
            c[k] = v.clone();
        }
        parse_config(Path::new(CONFIG_FILE), &c).unwrap()
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
}
