//! Reading a GGUF file (versions 2 and 3) as transformers does when it loads one with
//! `from_pretrained(dir, gguf_file=...)` (transformers 5.24.0 `modeling_gguf_pytorch_utils.py`,
//! `integrations/ggml.py`): the config from the metadata, the tensors under their checkpoint
//! names, llama-architecture q/k rows put back in transformers' order. Rules:
//! docs/model-formats.md §7.
//!
//! The header, metadata and tensor directory are parsed by candle-core's `gguf_file` (a
//! well-kept reader with bounds checks on every length); the tensor bytes are memory-mapped and
//! copied once into the layout the decoder reads. The linear layers stay in their stored block
//! format (`crate::kernels::ggml`), dequantised inside the products; the embedding table, the
//! output head and the norm vectors are dequantised to f32 at load (exactly as the reference
//! does), since the head's screen and the table lookups read f32 rows.

use crate::error::{Error, Result};
use crate::kernels::ggml::{dequantise_row, first_non_finite_block, GgmlType};
use crate::model::config::{GenerationDefaults, ModelSpec};
use crate::model::names::{self, EMBED, FINAL_NORM, LM_HEAD};
use crate::model::weights::{check_finite, first_non_finite};
use candle_core::quantized::gguf_file::{Content, Value, VersionedMagic};
use candle_core::quantized::GgmlDType;
use candle_core::{Device, Tensor};
use serde_json::{Map, Value as Json};
use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// The GGUF architectures read, with the transformers `model_type` each loads as. A llama
/// architecture file is loaded as Llama whatever its `general.name` (Mistral models are written
/// in the llama layout; see docs/model-formats.md §7.2).
const ARCHITECTURES: [(&str, &str); 6] = [
    ("llama", "llama"),
    ("qwen2", "qwen2"),
    ("qwen3", "qwen3"),
    ("gemma", "gemma"),
    ("gemma2", "gemma2"),
    ("phi3", "phi3"),
];

/// Keys llama.cpp's converter writes that transformers' GGUF loader does not read: it takes the
/// class default instead (transformers 5.24.0 `GGUF_CONFIG_MAPPING` has no entry for them;
/// Gemma2Config: attn_logit_softcapping 50.0, final_logit_softcapping 30.0). A file that states
/// another value describes a model the reference would not compute, so it is refused.
const UNREAD_KEYS: [(&str, &str, f64); 2] = [
    ("gemma2", "attn_logit_softcapping", 50.0),
    ("gemma2", "final_logit_softcapping", 30.0),
];

/// One stored tensor of a linear layer: its type, rows and row-major bytes (rows already in
/// transformers' order).
pub struct StoredRows {
    pub t: GgmlType,
    pub rows: usize,
    pub bytes: Vec<u8>,
}

/// The bytes of a file: mapped, or held (for callers that have them in memory).
enum Bytes {
    Mapped(memmap2::Mmap),
    Held(Vec<u8>),
}

impl std::ops::Deref for Bytes {
    type Target = [u8];
    fn deref(&self) -> &[u8] {
        match self {
            Bytes::Mapped(m) => m,
            Bytes::Held(v) => v,
        }
    }
}

/// An open GGUF file: parsed directory and metadata over a read-only mapping.
pub struct GgufFile {
    pub path: PathBuf,
    mmap: Bytes,
    content: Content,
    /// `general.architecture`.
    pub arch: String,
}

/// One tensor of the directory, checked: type supported, bytes inside the file.
struct Entry<'a> {
    t: GgmlType,
    /// [rows, cols] (torch order; a vector is [n]).
    dims: Vec<usize>,
    bytes: &'a [u8],
}

impl GgufFile {
    /// Opens and parses `path`; every problem is an input error naming the file.
    pub fn open(path: &Path) -> Result<GgufFile> {
        let f = std::fs::File::open(path)
            .map_err(|e| Error::file(path, format!("cannot open: {e}")))?;
        // SAFETY: a read-only private mapping of an input file that is not changed during the
        // run; every tensor is copied out before the mapping is dropped.
        let mmap = unsafe { memmap2::Mmap::map(&f) }
            .map_err(|e| Error::file(path, format!("cannot memory-map: {e}")))?;
        GgufFile::from_bytes_inner(path, Bytes::Mapped(mmap))
    }

    /// As [`GgufFile::open`] on bytes already in memory; `path` is for messages.
    pub fn from_bytes(path: &Path, bytes: Vec<u8>) -> Result<GgufFile> {
        GgufFile::from_bytes_inner(path, Bytes::Held(bytes))
    }

    fn from_bytes_inner(path: &Path, mmap: Bytes) -> Result<GgufFile> {
        let content = parse(path, &mmap)?;
        if content.magic == VersionedMagic::GgufV1 {
            return Err(Error::file(
                path,
                "is GGUF version 1; liftgate reads versions 2 and 3 (convert it again with a current llama.cpp)",
            ));
        }
        let arch = match content.metadata.get("general.architecture") {
            Some(Value::String(s)) => s.clone(),
            Some(_) => {
                return Err(Error::field(
                    path,
                    None,
                    "general.architecture",
                    "expected a string",
                ))
            }
            None => return Err(Error::field(path, None, "general.architecture", "missing")),
        };
        Ok(GgufFile {
            path: path.to_path_buf(),
            mmap,
            content,
            arch,
        })
    }

    /// The transformers `model_type` of this file's architecture, or a refusal naming it.
    fn model_type(&self) -> Result<&'static str> {
        ARCHITECTURES
            .iter()
            .find(|(a, _)| *a == self.arch)
            .map(|(_, m)| *m)
            .ok_or_else(|| {
                Error::field(
                    &self.path,
                    None,
                    "general.architecture",
                    format!(
                        "`{}` is not supported for GGUF files; supported: {}",
                        self.arch,
                        ARCHITECTURES.map(|a| a.0).join(", ")
                    ),
                )
            })
    }

    /// A metadata value as JSON (numbers, strings, booleans; arrays as lists).
    fn json(v: &Value) -> Json {
        match v {
            Value::U8(x) => (*x).into(),
            Value::I8(x) => (*x).into(),
            Value::U16(x) => (*x).into(),
            Value::I16(x) => (*x).into(),
            Value::U32(x) => (*x).into(),
            Value::I32(x) => (*x).into(),
            Value::U64(x) => (*x).into(),
            Value::I64(x) => (*x).into(),
            Value::F32(x) => {
                serde_json::Number::from_f64(*x as f64).map_or(Json::Null, Json::Number)
            }
            Value::F64(x) => serde_json::Number::from_f64(*x).map_or(Json::Null, Json::Number),
            Value::Bool(x) => (*x).into(),
            Value::String(s) => s.clone().into(),
            Value::Array(a) => a.iter().map(Self::json).collect(),
        }
    }

    /// A metadata key, if present.
    pub fn meta(&self, key: &str) -> Option<&Value> {
        self.content.metadata.get(key)
    }

    /// A metadata key that must be a non-negative integer.
    fn meta_u32(&self, key: &str) -> Result<Option<u32>> {
        match self.meta(key) {
            None => Ok(None),
            Some(v) => v.to_u32().map(Some).or_else(|_| match v.to_u64() {
                Ok(x) if x <= u32::MAX as u64 => Ok(Some(x as u32)),
                _ => Err(Error::field(
                    &self.path,
                    None,
                    key,
                    "expected an unsigned integer",
                )),
            }),
        }
    }

    /// The config transformers builds from the metadata (`GGUF_CONFIG_MAPPING`), as a
    /// config.json object, then read by the same code as a model directory's config.
    pub fn spec(&self) -> Result<ModelSpec> {
        let model_type = self.model_type()?;
        let a = &self.arch;
        let mut keys: Vec<(String, &str)> = vec![
            (format!("{a}.context_length"), "max_position_embeddings"),
            (format!("{a}.block_count"), "num_hidden_layers"),
            (format!("{a}.feed_forward_length"), "intermediate_size"),
            (format!("{a}.embedding_length"), "hidden_size"),
            (format!("{a}.rope.freq_base"), "rope_theta"),
            (format!("{a}.attention.head_count"), "num_attention_heads"),
            (
                format!("{a}.attention.head_count_kv"),
                "num_key_value_heads",
            ),
            (
                format!("{a}.attention.layer_norm_rms_epsilon"),
                "rms_norm_eps",
            ),
            (format!("{a}.vocab_size"), "vocab_size"),
        ];
        match a.as_str() {
            // Only the llama mapping reads the rotary dimension as head_dim.
            "llama" => keys.push((format!("{a}.rope.dimension_count"), "head_dim")),
            // transformers' gemma2 mapping reads the key length as head_dim, and the window.
            // It has no gemma mapping at all (it refuses such files): liftgate reads a gemma
            // file with the gemma2 mapping less the window, which Gemma has not.
            "gemma2" => {
                keys.push((format!("{a}.attention.key_length"), "head_dim"));
                keys.push((format!("{a}.attention.sliding_window"), "sliding_window"));
            }
            "gemma" => keys.push((format!("{a}.attention.key_length"), "head_dim")),
            _ => {}
        }
        let mut obj = Map::new();
        obj.insert("model_type".into(), model_type.into());
        for (key, field) in keys {
            if let Some(v) = self.meta(&key) {
                if matches!(v, Value::Array(_) | Value::String(_)) {
                    return Err(Error::field(&self.path, None, key, "expected a number"));
                }
                obj.insert(field.into(), Self::json(v));
            }
        }
        if !obj.contains_key("vocab_size") {
            // transformers: the length of the tokenizer's token list.
            match self.meta("tokenizer.ggml.tokens") {
                Some(Value::Array(t)) => {
                    obj.insert("vocab_size".into(), t.len().into());
                }
                _ => {
                    return Err(Error::field(
                        &self.path,
                        None,
                        format!("{a}.vocab_size"),
                        "missing, and no tokenizer.ggml.tokens to count instead",
                    ))
                }
            }
        }
        for (key, field) in [
            (format!("{a}.block_count"), "num_hidden_layers"),
            (format!("{a}.embedding_length"), "hidden_size"),
            (format!("{a}.feed_forward_length"), "intermediate_size"),
            (format!("{a}.attention.head_count"), "num_attention_heads"),
        ] {
            if !obj.contains_key(field) {
                return Err(Error::field(&self.path, None, key, "missing"));
            }
        }
        // Sizes the file cannot hold are refused before anything is sized by them: every
        // dimension is one of a tensor of at least that many bytes, and every layer has tensors.
        let bytes = self.mmap.len() as u64;
        for (field, limit) in [
            ("hidden_size", bytes),
            ("intermediate_size", bytes),
            ("num_attention_heads", bytes),
            ("num_key_value_heads", bytes),
            ("head_dim", bytes),
            ("vocab_size", bytes),
            ("max_position_embeddings", u32::MAX as u64),
            ("num_hidden_layers", self.content.tensor_infos.len() as u64),
        ] {
            if let Some(v) = obj.get(field).and_then(Json::as_u64) {
                if v > limit {
                    return Err(Error::field(
                        &self.path,
                        None,
                        field,
                        format!(
                            "is {v}, more than a file of {bytes} bytes with {} tensors can hold",
                            self.content.tensor_infos.len()
                        ),
                    ));
                }
            }
        }
        self.check_unread_keys(&obj)?;
        // transformers: tied exactly when the file has no output.weight.
        let tied = !self.content.tensor_infos.contains_key("output.weight");
        obj.insert("tie_word_embeddings".into(), tied.into());
        if let Some(eos) = self.meta_u32("tokenizer.ggml.eos_token_id")? {
            obj.insert("eos_token_id".into(), eos.into());
        }
        ModelSpec::from_json(&self.path, &obj)
    }

    /// Refuses a file whose metadata states what transformers' loader ignores in favour of
    /// another value: the soft-caps of [`UNREAD_KEYS`], a Phi-3 rotary dimension other than the
    /// head size (transformers rotates the whole head: it reads no rotary fraction), and Phi-3's
    /// long-context rotary factors (`rope_factors_long/short.weight`, which it does not load).
    fn check_unread_keys(&self, obj: &Map<String, Json>) -> Result<()> {
        let a = self.arch.as_str();
        for (arch, key, default) in UNREAD_KEYS {
            let key = format!("{arch}.{key}");
            let Some(v) = self.meta(&key).filter(|_| a == arch) else {
                continue;
            };
            let x = v
                .to_f32()
                .map(f64::from)
                .or_else(|_| v.to_f64())
                .map_err(|_| Error::field(&self.path, None, key.as_str(), "expected a number"))?;
            if x != default {
                return Err(Error::field(
                    &self.path,
                    None,
                    key.as_str(),
                    format!("is {x}, but transformers' GGUF loader ignores this key and computes with {default}; liftgate reads GGUF files as transformers does and will not give answers for a model other than the file's (load the model directory instead)"),
                ));
            }
        }
        if a == "phi3" {
            let key = "phi3.rope.dimension_count";
            let head = match (
                obj.get("hidden_size").and_then(Json::as_u64),
                obj.get("num_attention_heads").and_then(Json::as_u64),
            ) {
                (Some(h), Some(n)) if n > 0 => Some(h / n),
                _ => None,
            };
            if let (Some(d), Some(head)) = (self.meta_u32(key)?, head) {
                if u64::from(d) != head {
                    return Err(Error::field(
                        &self.path,
                        None,
                        key,
                        format!("is {d}: the model rotates {d} of its {head} head dimensions, but transformers' GGUF loader reads no rotary fraction and rotates all {head}; liftgate reads GGUF files as transformers does and will not give answers for a model other than the file's (load the model directory instead)"),
                    ));
                }
            }
            for t in ["rope_factors_long.weight", "rope_factors_short.weight"] {
                if self.content.tensor_infos.contains_key(t) {
                    return Err(Error::field(
                        &self.path,
                        None,
                        t,
                        "holds long-context rotary factors, which transformers' GGUF loader does not read (it computes without them); liftgate reads GGUF files as transformers does and will not give answers for a model other than the file's (load the model directory instead)",
                    ));
                }
            }
        }
        Ok(())
    }

    /// Stop ids: the file's `tokenizer.ggml.eos_token_id` (what transformers' generation
    /// config takes from a GGUF file); none when the file has none.
    pub fn generation(&self, spec: &ModelSpec) -> GenerationDefaults {
        GenerationDefaults {
            eos: spec.config_eos.clone(),
            pad: spec.config_pad.or_else(|| spec.config_eos.first().copied()),
            from_generation_config: false,
            repetition_penalty: None,
            unsupported_keys: Vec::new(),
        }
    }

    /// The chat template stored in the file (`tokenizer.chat_template`), if any.
    pub fn chat_template(&self) -> Option<&str> {
        match self.meta("tokenizer.chat_template") {
            Some(Value::String(s)) => Some(s),
            _ => None,
        }
    }

    /// A tensor of the directory by GGUF name, checked.
    fn entry(&self, name: &str) -> Result<Option<Entry<'_>>> {
        let Some(info) = self.content.tensor_infos.get(name) else {
            return Ok(None);
        };
        let t = from_candle(info.ggml_dtype).map_err(|what| {
            Error::field(
                &self.path,
                None,
                name,
                format!("stored as {what}; supported tensor types: f32, f16, bf16, q4_0, q4_1, q5_0, q5_1, q8_0, q2_k, q3_k, q4_k, q5_k, q6_k"),
            )
        })?;
        let dims = info.shape.dims().to_vec();
        let values = dims
            .iter()
            .try_fold(1usize, |a, &d| a.checked_mul(d))
            .ok_or_else(|| {
                Error::field(
                    &self.path,
                    None,
                    name,
                    format!("dimensions {dims:?} are too large"),
                )
            })?;
        let (block, size) = t.block();
        let cols = dims.last().copied().unwrap_or(1);
        if !cols.is_multiple_of(block) {
            return Err(Error::field(
                &self.path,
                None,
                name,
                format!(
                    "rows of {cols} values are not a whole number of {} blocks of {block}",
                    t.name()
                ),
            ));
        }
        let len = (values / block).checked_mul(size).ok_or_else(|| {
            Error::field(
                &self.path,
                None,
                name,
                format!("dimensions {dims:?} are too large"),
            )
        })?;
        let start = self.content.tensor_data_offset.checked_add(info.offset);
        let end = start.and_then(|s| s.checked_add(len as u64));
        match (start, end) {
            (Some(s), Some(e)) if e <= self.mmap.len() as u64 => Ok(Some(Entry {
                t,
                dims,
                bytes: &self.mmap[s as usize..e as usize],
            })),
            _ => Err(Error::field(
                &self.path,
                None,
                name,
                format!(
                    "its data ({len} bytes at offset {} of the data section) runs past the end of the file ({} bytes); the file is truncated or corrupt",
                    info.offset,
                    self.mmap.len()
                ),
            )),
        }
    }

    /// The checked entry of the checkpoint tensor `hf` with the shape the config implies.
    fn expect(&self, hf: &str, shape: &[usize], spec: &ModelSpec) -> Result<Entry<'_>> {
        let g = gguf_name(&self.arch, hf)
            .ok_or_else(|| Error::internal(format!("no GGUF name for {hf}")))?;
        let e = self.entry(&g)?.ok_or_else(|| {
            Error::field(
                &self.path,
                None,
                g.as_str(),
                format!(
                    "tensor missing (expected shape {shape:?} for {hf} from the file's metadata)"
                ),
            )
        })?;
        if e.dims != shape {
            return Err(Error::field(
                &self.path,
                None,
                g.as_str(),
                format!(
                    "shape {:?} contradicts the metadata, which implies {shape:?} ({})",
                    e.dims,
                    spec.sizes()
                ),
            ));
        }
        Ok(e)
    }

    /// The heads a llama-architecture file permuted the rows of `hf` over (q: attention heads,
    /// k: kv heads), as transformers' `LlamaTensorProcessor` undoes it.
    fn permuted_heads(&self, hf: &str, spec: &ModelSpec) -> Option<usize> {
        if self.arch != "llama" {
            return None;
        }
        let q = names::Q_PROJ;
        let k = names::K_PROJ;
        if hf.contains(&format!(".{q}.")) {
            Some(spec.num_heads)
        } else if hf.contains(&format!(".{k}.")) {
            Some(spec.num_kv_heads)
        } else {
            None
        }
    }

    /// The rows of checkpoint tensor `hf` (bytes, transformers' row order).
    fn rows(&self, name: &str, e: &Entry, heads: Option<usize>) -> Result<Vec<u8>> {
        let rows = e.dims.first().copied().unwrap_or(0);
        // A matrix moves whole rows; a vector (a bias) single values.
        let row_bytes = match e.dims.len() {
            2 => e.bytes.len() / rows.max(1),
            _ => e.t.block().1,
        };
        let Some(n_head) = heads.filter(|_| e.dims.len() == 2 || e.t.block().0 == 1) else {
            return Ok(e.bytes.to_vec());
        };
        if n_head == 0 || !rows.is_multiple_of(2 * n_head) {
            return Err(Error::field(
                &self.path,
                None,
                name,
                format!("{rows} rows do not split into {n_head} heads of rotary pairs; the q/k rows cannot be put back in order"),
            ));
        }
        let mut out = Vec::with_capacity(e.bytes.len());
        for r in 0..rows {
            let g = unpermuted_source(r, rows, n_head);
            out.extend_from_slice(&e.bytes[g * row_bytes..(g + 1) * row_bytes]);
        }
        Ok(out)
    }

    /// The f32 values of checkpoint tensor `hf`, as transformers holds them after loading.
    pub fn values(&self, hf: &str, shape: &[usize], spec: &ModelSpec) -> Result<Vec<f32>> {
        let e = self.expect(hf, shape, spec)?;
        let bytes = self.rows(hf, &e, self.permuted_heads(hf, spec))?;
        let n: usize = shape.iter().product();
        let mut v = vec![0.0; n];
        let cols = *shape.last().unwrap_or(&1);
        let row_bytes = e.t.row_bytes(cols);
        for (r, out) in v.chunks_exact_mut(cols.max(1)).enumerate() {
            dequantise_row(
                e.t,
                &bytes[r * row_bytes..(r + 1) * row_bytes],
                0,
                cols,
                out,
            );
        }
        if self.norm_offset(hf) {
            // numpy's `weights - 1` on the f32 array: one f32 subtraction per value.
            v.iter_mut().for_each(|x| *x -= 1.0);
        }
        Ok(v)
    }

    /// Whether `hf` is a Gemma norm weight stored with 1 added: llama.cpp's converter adds 1 to
    /// every `*norm.weight` of gemma and gemma2 models (llama.cpp multiplies by the stored
    /// weight, Gemma's RMSNorm by 1 + weight), and transformers' `Gemma2TensorProcessor`
    /// subtracts it after dequantising (every GGUF name containing `norm.weight`).
    fn norm_offset(&self, hf: &str) -> bool {
        matches!(self.arch.as_str(), "gemma" | "gemma2")
            && gguf_name(&self.arch, hf).is_some_and(|g| g.contains("norm.weight"))
    }

    /// A tensor by its GGUF name, dequantised as stored (no reordering), with its dims.
    pub fn raw_values(&self, name: &str) -> Result<(Vec<usize>, Vec<f32>)> {
        let e = self
            .entry(name)?
            .ok_or_else(|| Error::field(&self.path, None, name, "tensor missing"))?;
        let n: usize = e.dims.iter().product();
        let cols = e.dims.last().copied().unwrap_or(1).max(1);
        let row_bytes = e.t.row_bytes(cols);
        let mut v = vec![0.0; n];
        // Rows in parallel: the embedding table of a large vocabulary is most of it.
        use rayon::prelude::*;
        v.par_chunks_exact_mut(cols)
            .enumerate()
            .for_each(|(r, out)| {
                dequantise_row(
                    e.t,
                    &e.bytes[r * row_bytes..(r + 1) * row_bytes],
                    0,
                    cols,
                    out,
                )
            });
        Ok((e.dims, v))
    }

    /// The bytes the decoder's weights take in memory once loaded: each linear layer's blocks
    /// as stored, every other tensor as f32, and the output head (the embedding when the two
    /// are tied) once more in 8 bits for the head's screen. Tensors missing from the file
    /// count nothing.
    fn resident_bytes(
        &self,
        expected: &[(String, Vec<usize>)],
        linear: &std::collections::HashSet<String>,
        spec: &ModelSpec,
    ) -> u64 {
        expected
            .iter()
            .map(|(hf, shape)| {
                if linear.contains(hf) {
                    return gguf_name(&self.arch, hf)
                        .and_then(|g| self.entry(&g).ok().flatten())
                        .map_or(0, |e| e.bytes.len() as u64);
                }
                // Held as f32 once dequantised, counted as a checkpoint's are.
                crate::model::weights::resident_bytes(hf, shape, 4, !spec.tie_word_embeddings)
            })
            .sum()
    }

    /// Every tensor the decoder takes: norms, biases, embedding and head as f32 tensors; the
    /// linear layers' matrices as stored rows (with a stand-in of their shape in the map, which
    /// holds no values). Each is checked for NaN and ±Inf.
    pub fn weights(
        &self,
        spec: &ModelSpec,
    ) -> Result<(HashMap<String, Tensor>, HashMap<String, StoredRows>)> {
        let linear: std::collections::HashSet<String> =
            crate::model::weights::linear_weight_names(spec)
                .into_iter()
                .collect();
        let mut expected = names::expected_tensors(spec);
        if !spec.tie_word_embeddings {
            expected.push((LM_HEAD.to_string(), vec![spec.vocab_size, spec.hidden_size]));
        }
        // Refuse before reading a byte of weights when the model cannot fit, as for
        // checkpoints (weights.rs); a tensor missing or malformed counts nothing here and is
        // reported by the loop below.
        if let Some(available) = crate::model::weights::available_memory() {
            let needed = self.resident_bytes(&expected, &linear, spec);
            crate::model::weights::check_fits_as(
                &self.path,
                needed,
                available,
                "the linear layers in their GGUF blocks; the token embedding, head and norms dequantised to f32, the head once more in 8 bits",
            )?;
        }
        let mut tensors = HashMap::new();
        let mut stored = HashMap::new();
        for (hf, shape) in &expected {
            let gname = gguf_name(&self.arch, hf).unwrap_or_default();
            if linear.contains(hf) {
                let e = self.expect(hf, shape, spec)?;
                let bytes = self.rows(hf, &e, self.permuted_heads(hf, spec))?;
                let cols = shape[1];
                let row_bytes = e.t.row_bytes(cols);
                // Each row's blocks are checked for NaN and ±Inf from their scales
                // (`first_non_finite_block`: exact, without dequantising), rows in parallel;
                // the first bad row in row order is the one reported, with the value found.
                use rayon::prelude::*;
                let bad = (0..shape[0]).into_par_iter().find_first(|&r| {
                    first_non_finite_block(e.t, &bytes[r * row_bytes..(r + 1) * row_bytes])
                        .is_some()
                });
                if let Some(r) = bad {
                    let row = &bytes[r * row_bytes..(r + 1) * row_bytes];
                    let mut buf = vec![0.0; cols];
                    dequantise_row(e.t, row, 0, cols, &mut buf);
                    if let Some((i, v)) = first_non_finite(&buf) {
                        return Err(Error::field(
                            &self.path,
                            None,
                            gname.as_str(),
                            format!("holds {v} at element [{r}, {i}] once dequantised; the weights are corrupt and cannot give meaningful answers"),
                        ));
                    }
                }
                let stand_in = Tensor::zeros((), candle_core::DType::F32, &Device::Cpu)?
                    .broadcast_as(shape.as_slice())?;
                tensors.insert(hf.clone(), stand_in);
                stored.insert(
                    hf.clone(),
                    StoredRows {
                        t: e.t,
                        rows: shape[0],
                        bytes,
                    },
                );
                continue;
            }
            let v = self.values(hf, shape, spec)?;
            let t = Tensor::from_vec(v, shape.as_slice(), &Device::Cpu)?;
            check_finite(&gname, &self.path, &t, " once dequantised")?;
            tensors.insert(hf.clone(), t);
        }
        Ok((tensors, stored))
    }

    /// Bytes of the file.
    pub fn len(&self) -> usize {
        self.mmap.len()
    }

    /// Whether the file is empty (never, once parsed).
    pub fn is_empty(&self) -> bool {
        self.mmap.is_empty()
    }

    /// "q4_k ×112, q6_k ×14, f32 ×41": the tensor types of the file, most common first.
    pub fn type_summary(&self) -> String {
        let mut counts: HashMap<String, usize> = HashMap::new();
        for info in self.content.tensor_infos.values() {
            let name = from_candle(info.ggml_dtype)
                .map(|t| t.name().to_string())
                .unwrap_or_else(|e| e);
            *counts.entry(name).or_default() += 1;
        }
        let mut list: Vec<(String, usize)> = counts.into_iter().collect();
        list.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
        list.iter()
            .map(|(n, c)| format!("{n} ×{c}"))
            .collect::<Vec<_>>()
            .join(", ")
    }
}

/// liftgate's type of a candle tensor type, or the name of one it does not read.
fn from_candle(d: GgmlDType) -> std::result::Result<GgmlType, String> {
    Ok(match d {
        GgmlDType::F32 => GgmlType::F32,
        GgmlDType::F16 => GgmlType::F16,
        GgmlDType::BF16 => GgmlType::Bf16,
        GgmlDType::Q4_0 => GgmlType::Q4_0,
        GgmlDType::Q4_1 => GgmlType::Q4_1,
        GgmlDType::Q5_0 => GgmlType::Q5_0,
        GgmlDType::Q5_1 => GgmlType::Q5_1,
        GgmlDType::Q8_0 => GgmlType::Q8_0,
        GgmlDType::Q2K => GgmlType::Q2K,
        GgmlDType::Q3K => GgmlType::Q3K,
        GgmlDType::Q4K => GgmlType::Q4K,
        GgmlDType::Q5K => GgmlType::Q5K,
        GgmlDType::Q6K => GgmlType::Q6K,
        GgmlDType::Q8_1 => return Err(GgmlType::from_id(9).unwrap_err()),
        GgmlDType::Q8K => return Err(GgmlType::from_id(15).unwrap_err()),
    })
}

/// The GGUF row that holds transformers' row `r` of a q or k matrix of `rows` rows permuted
/// over `n_head` heads. llama.cpp's converter writes row h·2d + 2i + j for row (h, j, i) of
/// the checkpoint (d = rows / n_head / 2); transformers' `_reverse_permute_weights` reshapes to
/// (n_head, d, 2, ·) and swaps the middle axes, which reads it back from there.
fn unpermuted_source(r: usize, rows: usize, n_head: usize) -> usize {
    let d = rows / n_head / 2;
    if d == 0 {
        return r;
    }
    let (h, rest) = (r / (2 * d), r % (2 * d));
    let (j, i) = (rest / d, rest % d);
    h * 2 * d + 2 * i + j
}

/// Parses the header, metadata and directory; candle's messages are kept and the file named.
fn parse(path: &Path, bytes: &[u8]) -> Result<Content> {
    let mut cursor = std::io::Cursor::new(bytes);
    Content::read(&mut cursor).map_err(|e| {
        // The first line: candle appends a backtrace when RUST_BACKTRACE is set.
        let what = e.to_string().lines().next().unwrap_or_default().trim().to_string();
        let hint = if let Some(id) = what
            .strip_prefix("unknown dtype for tensor ")
            .and_then(|s| s.trim().parse::<u32>().ok())
        {
            let tensor = tensor_of_type(bytes, id)
                .map_or_else(String::new, |n| format!("tensor `{n}` "));
            format!(
                "{tensor}is stored as {}, which liftgate does not read (supported: f32, f16, bf16, q4_0, q4_1, q5_0, q5_1, q8_0, q2_k, q3_k, q4_k, q5_k, q6_k)",
                GgmlType::from_id(id).err().unwrap_or_default()
            )
        } else {
            format!("not a readable GGUF file ({what}); it may be truncated or corrupt")
        };
        Error::file(path, hint)
    })
}

/// The name of the first tensor of the directory stored as type `id`, found by walking the
/// header (gguf.md: magic, version, counts, metadata entries, tensor infos; v2/v3 lengths are
/// u64). Only for naming the tensor when candle's reader stops at a type it does not know.
fn tensor_of_type(b: &[u8], id: u32) -> Option<String> {
    struct R<'a>(&'a [u8], usize);
    impl R<'_> {
        fn take(&mut self, n: usize) -> Option<&[u8]> {
            let s = self.0.get(self.1..self.1.checked_add(n)?)?;
            self.1 += n;
            Some(s)
        }
        fn u32(&mut self) -> Option<u32> {
            Some(u32::from_le_bytes(self.take(4)?.try_into().ok()?))
        }
        fn u64(&mut self) -> Option<u64> {
            Some(u64::from_le_bytes(self.take(8)?.try_into().ok()?))
        }
        fn string(&mut self) -> Option<&[u8]> {
            let n = usize::try_from(self.u64()?).ok()?;
            self.take(n)
        }
        fn value(&mut self, t: u32, depth: usize) -> Option<()> {
            match t {
                0 | 1 | 7 => self.take(1).map(|_| ()),
                2 | 3 => self.take(2).map(|_| ()),
                4..=6 => self.take(4).map(|_| ()),
                10..=12 => self.take(8).map(|_| ()),
                8 => self.string().map(|_| ()),
                9 if depth < 4 => {
                    let (inner, n) = (self.u32()?, self.u64()?);
                    for _ in 0..n {
                        self.value(inner, depth + 1)?;
                    }
                    Some(())
                }
                _ => None,
            }
        }
    }
    let mut r = R(b, 0);
    if r.take(4)? != b"GGUF" || !matches!(r.u32()?, 2 | 3) {
        return None;
    }
    let (tensors, kvs) = (r.u64()?, r.u64()?);
    for _ in 0..kvs {
        r.string()?;
        let t = r.u32()?;
        r.value(t, 0)?;
    }
    for _ in 0..tensors {
        let name = String::from_utf8_lossy(r.string()?).to_string();
        let dims = r.u32()? as usize;
        r.take(dims.checked_mul(8)?)?;
        if r.u32()? == id {
            return Some(name);
        }
        r.u64()?;
    }
    None
}

/// The GGUF name of a checkpoint tensor in a file of architecture `arch` (llama.cpp's names,
/// gguf-py 0.19 `tensor_mapping.py` through `get_tensor_name_map(arch, ·)`, the table both
/// llama.cpp's converter and transformers' loader use). Gemma2 names its sandwich norms
/// differently: `post_attention_layernorm` is `post_attention_norm` there, and `ffn_norm` is
/// `pre_feedforward_layernorm`. Phi-3's fused matrices are `attn_qkv` and `ffn_up`.
pub fn gguf_name(arch: &str, hf: &str) -> Option<String> {
    match hf {
        EMBED => return Some("token_embd.weight".into()),
        FINAL_NORM => return Some("output_norm.weight".into()),
        LM_HEAD => return Some("output.weight".into()),
        _ => {}
    }
    let rest = hf.strip_prefix("model.layers.")?;
    let (layer, module) = rest.split_once('.')?;
    let (module, suffix) = module.rsplit_once('.')?;
    let gemma2 = arch == "gemma2";
    let g = match module {
        names::INPUT_NORM => "attn_norm",
        names::POST_ATTN_NORM if gemma2 => "post_attention_norm",
        names::POST_ATTN_NORM => "ffn_norm",
        names::PRE_FF_NORM if gemma2 => "ffn_norm",
        names::POST_FF_NORM if gemma2 => "post_ffw_norm",
        names::QKV_PROJ => "attn_qkv",
        names::GATE_UP_PROJ => "ffn_up",
        names::Q_PROJ => "attn_q",
        names::K_PROJ => "attn_k",
        names::V_PROJ => "attn_v",
        names::O_PROJ => "attn_output",
        names::Q_NORM => "attn_q_norm",
        names::K_NORM => "attn_k_norm",
        names::GATE_PROJ => "ffn_gate",
        names::UP_PROJ => "ffn_up",
        names::DOWN_PROJ => "ffn_down",
        _ => return None,
    };
    Some(format!("blk.{layer}.{g}.{suffix}"))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The converter's permutation (llama.cpp `LlamaModel.permute`: reshape (n_head, 2, d, ·),
    /// swap axes 1 and 2) followed by this un-permutation is the identity.
    #[test]
    fn unpermuting_undoes_the_converters_permutation() {
        for (rows, n_head) in [(64, 4), (32, 2), (256, 4), (8, 1)] {
            let d = rows / n_head / 2;
            // permute: gguf row (h, i, j) [flat h·2d + 2i + j] = hf row (h, j, i) [h·2d + j·d + i].
            let mut gguf_of = vec![0; rows];
            for h in 0..n_head {
                for i in 0..d {
                    for j in 0..2 {
                        gguf_of[h * 2 * d + 2 * i + j] = h * 2 * d + j * d + i;
                    }
                }
            }
            for r in 0..rows {
                assert_eq!(gguf_of[unpermuted_source(r, rows, n_head)], r);
            }
        }
    }

    /// The memory estimate counts the linear layers' blocks as the file stores them, the
    /// embedding and norms as f32 and the tied head once more in 8 bits: checked against the
    /// tensor directory as candle's GGUF reader lists it (type sizes from ggml's tables).
    #[test]
    fn memory_estimate_of_the_tiny_llama_file() {
        let path =
            Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/gguf/llama-q4_0-tied.gguf");
        let f = GgufFile::open(&path).unwrap();
        let spec = f.spec().unwrap();
        assert!(spec.tie_word_embeddings);
        let linear: std::collections::HashSet<String> =
            crate::model::weights::linear_weight_names(&spec)
                .into_iter()
                .collect();
        let expected = names::expected_tensors(&spec);
        let got = f.resident_bytes(&expected, &linear, &spec);
        let content = candle_core::quantized::gguf_file::Content::read(
            &mut std::fs::File::open(&path).unwrap(),
        )
        .unwrap();
        let mut want = 0u64;
        for (name, info) in &content.tensor_infos {
            let n = info.shape.elem_count() as u64;
            let matrix = name.starts_with("blk.")
                && [
                    "attn_q",
                    "attn_k",
                    "attn_v",
                    "attn_output",
                    "ffn_gate",
                    "ffn_up",
                    "ffn_down",
                ]
                .iter()
                .any(|m| name.ends_with(&format!(".{m}.weight")));
            want += if matrix {
                let t = info.ggml_dtype;
                n / t.block_size() as u64 * t.type_size() as u64
            } else if name == "token_embd.weight" {
                n * 4 + n
            } else {
                n * 4
            };
        }
        assert_eq!(got, want);
    }

    /// Damaged copies of a fixture file (cut at many lengths, single bytes of the header and
    /// directory changed) are read or refused as input errors naming the file, never a panic.
    #[test]
    fn damaged_files_are_refused_without_panicking() {
        for file in ["llama-q4_0-tied.gguf", "gemma2-q5_1.gguf", "phi3-q4_1.gguf"] {
            damaged_copies_are_refused(file);
        }
    }

    fn damaged_copies_are_refused(file: &str) {
        let good = std::fs::read(
            Path::new(env!("CARGO_MANIFEST_DIR"))
                .join("tests/fixtures/gguf")
                .join(file),
        )
        .unwrap();
        let path = Path::new("model.gguf");
        let run = |b: Vec<u8>| {
            let r = GgufFile::from_bytes(path, b).and_then(|f| {
                let spec = f.spec()?;
                f.weights(&spec).map(|_| ())
            });
            if let Err(e) = r {
                assert_eq!(e.exit_code(), 2, "{e}");
                assert!(e.to_string().starts_with("model.gguf"), "{e}");
            }
        };
        for cut in (0..good.len()).step_by(211) {
            run(good[..cut].to_vec());
        }
        let header = good.len().min(4096);
        let mut s: u64 = 7;
        for _ in 0..1500 {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let at = (s >> 33) as usize % header;
            let mut b = good.clone();
            b[at] = (s >> 17) as u8;
            run(b);
        }
    }

    /// A tensor whose element count fits in memory sizes but whose byte length does not (found
    /// by the fuzz target): refused as too large, not an overflow.
    #[test]
    fn a_byte_length_beyond_memory_sizes_is_refused() {
        let mut b = std::fs::read(
            Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/gguf/llama-q4_0-tied.gguf"),
        )
        .unwrap();
        let name = b"blk.0.attn_norm.weight";
        let at = b
            .windows(name.len())
            .position(|w| w == name)
            .expect("the fixture names its first norm")
            + name.len();
        assert_eq!(
            u32::from_le_bytes(b[at..at + 4].try_into().unwrap()),
            1,
            "a 1-D norm"
        );
        b[at + 4..at + 12].copy_from_slice(&(1u64 << 62).to_le_bytes());
        let r = GgufFile::from_bytes(Path::new("model.gguf"), b).and_then(|f| {
            let spec = f.spec()?;
            f.weights(&spec).map(|_| ())
        });
        let e = r.expect_err("refused");
        assert_eq!(e.exit_code(), 2, "{e}");
        assert!(e.to_string().starts_with("model.gguf"), "{e}");
    }

    /// The names gguf-py 0.19's `get_tensor_name_map(arch, n)` gives (printed with the
    /// reference environment and copied here).
    #[test]
    fn checkpoint_names_map_to_gguf_names() {
        assert_eq!(gguf_name("llama", EMBED).unwrap(), "token_embd.weight");
        assert_eq!(
            gguf_name("qwen2", "model.layers.3.self_attn.k_proj.bias").unwrap(),
            "blk.3.attn_k.bias"
        );
        assert_eq!(
            gguf_name("llama", "model.layers.0.mlp.down_proj.weight").unwrap(),
            "blk.0.ffn_down.weight"
        );
        for (arch, hf, g) in [
            ("gemma", "post_attention_layernorm", "ffn_norm"),
            ("gemma2", "post_attention_layernorm", "post_attention_norm"),
            ("gemma2", "pre_feedforward_layernorm", "ffn_norm"),
            ("gemma2", "post_feedforward_layernorm", "post_ffw_norm"),
            ("phi3", "self_attn.qkv_proj", "attn_qkv"),
            ("phi3", "mlp.gate_up_proj", "ffn_up"),
        ] {
            let name = format!("model.layers.1.{hf}.weight");
            assert_eq!(gguf_name(arch, &name).unwrap(), format!("blk.1.{g}.weight"));
        }
        assert!(gguf_name("llama", "model.layers.0.mlp.experts.weight").is_none());
    }
}
