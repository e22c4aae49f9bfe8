//! Loading a checkpoint's safetensors (single file or sharded with an index) into f32 tensors
//! keyed by checkpoint name, with every expected tensor checked against the config.
//!
//! The map is the one place weights live before the decoder takes them: the LoRA merge
//! (`crate::model::lora::merge`) edits it in place, so merging never holds a second full copy.
//! Rules: docs/model-formats.md §1.1 (files, index) and §1.3 (names, tied embeddings).
//! Every loaded tensor is checked for NaN and ±Inf ([`check_finite`]): a corrupt or diverged
//! checkpoint is refused naming the file and the tensor instead of producing garbage answers.

use crate::error::{Error, Result};
use crate::kernels::nf4::{self, Codebook, Quantised};
use crate::model::config::ModelSpec;
use crate::model::names::{self, EMBED, LM_HEAD};
use candle_core::safetensors::Load;
use candle_core::{DType, Device, Tensor};
use safetensors::SafeTensors;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// Checkpoint tensors in f32 by name, plus where they came from.
pub struct Weights {
    pub tensors: HashMap<String, Tensor>,
    /// The safetensors files read, in order (for fingerprints).
    pub files: Vec<PathBuf>,
    /// The dtype the checkpoint stored its (first) floating tensor in, e.g. "bf16".
    pub stored_dtype: String,
    /// Whether `lm_head` reuses the embedding matrix (tie true and lm_head.weight absent).
    pub tied: bool,
    /// With a 4-bit base ([`load_4bit`]): the linear layers' weights, quantised as they were
    /// read. Their entries in `tensors` are then stand-ins of the right shape and dtype that
    /// hold no values (for the adapter's checks against the base).
    pub quantised: Option<QuantisedBase>,
}

/// The linear layers of a base quantised to 4 bits, by checkpoint name.
pub struct QuantisedBase {
    pub book: Codebook,
    pub double_quant: bool,
    pub matrices: HashMap<String, Quantised>,
}

/// The checkpoint names of the weights of the attention and MLP projections of every layer:
/// the `nn.Linear` modules transformers replaces with 4-bit layers (all but the output head).
pub fn linear_weight_names(spec: &ModelSpec) -> Vec<String> {
    let mut out = Vec::new();
    for l in 0..spec.num_layers {
        let layer = names::Layer::new(l);
        let attention: &[&str] = if spec.fused_qkv {
            &[names::QKV_PROJ]
        } else {
            &[names::Q_PROJ, names::K_PROJ, names::V_PROJ]
        };
        let mlp: &[&str] = if spec.fused_gate_up {
            &[names::GATE_UP_PROJ]
        } else {
            &[names::GATE_PROJ, names::UP_PROJ]
        };
        for m in attention
            .iter()
            .chain(&[names::O_PROJ])
            .chain(mlp)
            .chain(&[names::DOWN_PROJ])
        {
            out.push(layer.weight(m));
        }
    }
    out
}

/// The safetensors files of a model directory: the index's shards, or `model.safetensors`, or
/// every other `*.safetensors`. Pickle-only checkpoints are refused.
pub fn safetensors_files(dir: &Path) -> Result<Vec<PathBuf>> {
    let index = dir.join("model.safetensors.index.json");
    if index.exists() {
        let text = std::fs::read_to_string(&index)
            .map_err(|e| Error::file(&index, format!("cannot read: {e}")))?;
        let value: serde_json::Value = serde_json::from_str(&text)
            .map_err(|e| Error::file(&index, format!("not valid JSON: {e}")))?;
        let map = value
            .get("weight_map")
            .and_then(|m| m.as_object())
            .ok_or_else(|| {
                Error::field(
                    &index,
                    None,
                    "weight_map",
                    "expected an object of tensor → file",
                )
            })?;
        let mut files: Vec<String> = Vec::new();
        for (name, file) in map {
            let file = file.as_str().ok_or_else(|| {
                Error::field(
                    &index,
                    None,
                    format!("weight_map.{name}"),
                    "expected a file name",
                )
            })?;
            if file.contains('/') || file.contains('\\') || file.contains("..") {
                return Err(Error::field(
                    &index,
                    None,
                    format!("weight_map.{name}"),
                    format!("{file:?} is not a plain file name in the model directory"),
                ));
            }
            if !files.iter().any(|f| f == file) {
                files.push(file.to_string());
            }
        }
        files.sort();
        let paths: Vec<PathBuf> = files.iter().map(|f| dir.join(f)).collect();
        for p in &paths {
            if !p.exists() {
                return Err(Error::file(
                    &index,
                    format!("names the shard {} which does not exist", p.display()),
                ));
            }
        }
        if paths.is_empty() {
            return Err(Error::file(&index, "the weight_map is empty"));
        }
        return Ok(paths);
    }
    let single = dir.join("model.safetensors");
    if single.exists() {
        return Ok(vec![single]);
    }
    let entries = std::fs::read_dir(dir)
        .map_err(|e| Error::file(dir, format!("cannot list the model directory: {e}")))?;
    let mut st = Vec::new();
    let mut pickles = Vec::new();
    for entry in entries.flatten() {
        let p = entry.path();
        let name = entry.file_name().to_string_lossy().to_string();
        if name.ends_with(".safetensors") && !name.starts_with("adapter_") {
            st.push(p);
        } else if name.ends_with(".bin") || name.ends_with(".pt") || name.ends_with(".pth") {
            pickles.push(p);
        }
    }
    st.sort();
    pickles.sort();
    if !st.is_empty() {
        return Ok(st);
    }
    if let Some(p) = pickles.first() {
        return Err(Error::file(
            p,
            "is a PyTorch pickle checkpoint; liftgate reads only safetensors (pickles can run code when loaded). Convert it, e.g. `model.save_pretrained(dir, safe_serialization=True)` in transformers",
        ));
    }
    Err(Error::file(
        dir,
        "has no model.safetensors, no model.safetensors.index.json and no *.safetensors file",
    ))
}

/// One memory-mapped safetensors file.
struct Mapped {
    mmap: memmap2::Mmap,
}

impl Mapped {
    /// The parsed header over the mapping (checked once in `mmap_file`).
    fn parse(&self, file: &Path) -> Result<SafeTensors<'_>> {
        SafeTensors::deserialize(&self.mmap)
            .map_err(|e| {
                Error::file(
                    file,
                    format!("not a readable safetensors file ({e}); it may be truncated or corrupt: download it again"),
                )
            })
    }

    /// Drops the pages under `data` (a slice of this mapping) from the process once their
    /// values are copied, so loading never holds the file's pages and the f32 copy at once.
    fn release(&self, data: &[u8]) {
        let base = self.mmap.as_ptr() as usize;
        let start = (data.as_ptr() as usize).saturating_sub(base);
        if data.is_empty() || start + data.len() > self.mmap.len() {
            return;
        }
        // SAFETY: a read-only private file mapping that is never written: after DONTNEED the
        // next access reads the file again, so no value changes. The advice is best effort.
        let _ = unsafe {
            self.mmap
                .unchecked_advise_range(memmap2::UncheckedAdvice::DontNeed, start, data.len())
        };
    }
}

/// Memory-maps one file and checks its header.
fn mmap_file(file: &Path) -> Result<Mapped> {
    let f =
        std::fs::File::open(file).map_err(|e| Error::file(file, format!("cannot open: {e}")))?;
    // SAFETY: the mapping stays valid only while nobody truncates or rewrites the file; a model
    // directory is read-only input for the duration of a run, and every tensor is copied into
    // owned f32 storage in `load` before the mapping is dropped.
    let mmap = unsafe { memmap2::Mmap::map(&f) }
        .map_err(|e| Error::file(file, format!("cannot memory-map: {e}")))?;
    let m = Mapped { mmap };
    m.parse(file)?;
    Ok(m)
}

/// Loads and validates every tensor the spec expects, in the dtype the checkpoint stores
/// (f32, bf16 or f16): the decoder widens 16-bit values to f32 where it computes (exact), so a
/// 16-bit checkpoint takes its own size in memory rather than twice that.
pub fn load(dir: &Path, spec: &ModelSpec) -> Result<Weights> {
    load_inner(dir, spec, None)
}

/// As [`load`], quantising the linear layers' weights ([`linear_weight_names`]) to 4 bits with
/// `book` (and double quantisation of the scales when `double_quant`) one at a time as they are
/// read, so memory never holds more than one of them at full precision.
pub fn load_4bit(
    dir: &Path,
    spec: &ModelSpec,
    book: Codebook,
    double_quant: bool,
) -> Result<Weights> {
    load_inner(dir, spec, Some((book, double_quant)))
}

fn load_inner(dir: &Path, spec: &ModelSpec, quant: Option<(Codebook, bool)>) -> Result<Weights> {
    let linear: std::collections::HashSet<String> = match quant {
        Some(_) => linear_weight_names(spec).into_iter().collect(),
        None => Default::default(),
    };
    let files = safetensors_files(dir)?;
    let maps: Vec<Mapped> = files.iter().map(|f| mmap_file(f)).collect::<Result<_>>()?;
    let parsed: Vec<SafeTensors> = maps
        .iter()
        .zip(&files)
        .map(|(m, f)| m.parse(f))
        .collect::<Result<_>>()?;
    // Which file holds each tensor (the last one wins, as in an index).
    let mut owner: HashMap<String, usize> = HashMap::new();
    for (i, st) in parsed.iter().enumerate() {
        for name in st.names() {
            owner.insert(name.to_string(), i);
        }
    }
    let file_of = |name: &str| files[owner.get(name).copied().unwrap_or(0)].clone();
    let config = dir.join("config.json");

    let mut expected = names::expected_tensors(spec);
    let has_head = owner.contains_key(LM_HEAD);
    let has_embed = owner.contains_key(EMBED);
    // Tied-embedding rules (docs/model-formats.md §1.3).
    let tied = if spec.tie_word_embeddings {
        if !has_embed && has_head {
            // Symmetric: the head serves as the embedding too.
            expected.retain(|(n, _)| n != EMBED);
        }
        !(has_embed && has_head)
    } else {
        if !has_head {
            return Err(Error::file(
                &files[0],
                format!(
                    "has no `{LM_HEAD}` and config.json sets tie_word_embeddings false (transformers would initialise the output head at random); the checkpoint is incomplete"
                ),
            ));
        }
        false
    };
    if has_head {
        expected.push((LM_HEAD.to_string(), vec![spec.vocab_size, spec.hidden_size]));
    }

    // Refuse before reading a byte of weights when the model cannot fit.
    let needed: u64 = expected
        .iter()
        .filter_map(|(name, _)| {
            let view = owner.get(name).and_then(|&i| parsed[i].tensor(name).ok())?;
            let size = view.dtype().bitsize().div_ceil(8);
            Some(if linear.contains(name) {
                let values: u64 = view.shape().iter().map(|&d| d as u64).product();
                values / 2 + values / nf4::BLOCK as u64 * 4
            } else {
                resident_bytes(name, view.shape(), size, has_head)
            })
        })
        .sum();
    if let Some(available) = available_memory() {
        check_fits(dir, needed, available)?;
    }

    let mut tensors = HashMap::with_capacity(expected.len());
    let mut matrices = HashMap::new();
    let mut stored_dtype = String::new();
    for (name, shape) in &expected {
        let src = owner.get(name).copied();
        let view = src.and_then(|i| parsed[i].tensor(name).ok()).ok_or_else(|| {
            Error::field(
                &files[0],
                None,
                name.as_str(),
                format!(
                    "tensor missing from the checkpoint (expected shape {shape:?} from {}); is the config for this model?",
                    config.display()
                ),
            )
        })?;
        if view.shape() != shape.as_slice() {
            return Err(Error::field(
                file_of(name),
                None,
                name.as_str(),
                format!(
                    "shape {:?} does not match {:?} expected from {} ({})",
                    view.shape(),
                    shape,
                    config.display(),
                    spec.sizes()
                ),
            ));
        }
        use safetensors::Dtype as S;
        let dt = match view.dtype() {
            S::F32 => "f32",
            S::BF16 => "bf16",
            S::F16 => "f16",
            other => {
                return Err(Error::field(
                    file_of(name),
                    None,
                    name.as_str(),
                    format!("stored as {other:?}; supported tensor dtypes are F32, BF16 and F16 (quantised checkpoints are not supported)"),
                ))
            }
        };
        if stored_dtype.is_empty() {
            stored_dtype = dt.to_string();
        }
        let t = view.load(&Device::Cpu).map_err(|e| {
            Error::field(
                file_of(name),
                None,
                name.as_str(),
                format!("cannot read: {e}"),
            )
        })?;
        if let Some(i) = src {
            maps[i].release(view.data());
        }
        check_finite(name, &file_of(name), &t, "")?;
        if let (Some((book, double)), true) = (quant, linear.contains(name)) {
            // bitsandbytes quantises the exact f32 widening of the stored values.
            let values: Vec<f32> = t.to_dtype(DType::F32)?.flatten_all()?.to_vec1()?;
            let stand_in = Tensor::zeros((), t.dtype(), &Device::Cpu)?.broadcast_as(t.dims())?;
            drop(t);
            matrices.insert(name.clone(), nf4::quantise(&values, book, double));
            tensors.insert(name.clone(), stand_in);
            continue;
        }
        tensors.insert(name.clone(), t);
    }
    if !tensors.contains_key(EMBED) {
        // Tied with only lm_head stored: the same matrix serves as the embedding, kept under
        // the embedding's name so the map holds one shared tensor (as after the usual tying).
        if let Some(h) = tensors.remove(LM_HEAD) {
            tensors.insert(EMBED.to_string(), h);
        }
    }
    Ok(Weights {
        tensors,
        files,
        stored_dtype,
        tied,
        quantised: quant.map(|(book, double_quant)| QuantisedBase {
            book,
            double_quant,
            matrices,
        }),
    })
}

/// Bytes a tensor takes once the decoder holds it: the matrices, the embedding table and the
/// output head at their stored size (16-bit stays 16-bit), the head (its own or the tied
/// embedding table) once more in 8 bits for the greedy screen, the norm vectors in f32.
pub(crate) fn resident_bytes(
    name: &str,
    shape: &[usize],
    stored_size: usize,
    own_head: bool,
) -> u64 {
    let values: u64 = shape.iter().map(|&d| d as u64).product();
    if shape.len() < 2 {
        return values * 4;
    }
    let is_head = name == LM_HEAD || (name == EMBED && !own_head);
    values * stored_size as u64 + if is_head { values } else { 0 }
}

/// The kernel's estimate of memory available to a new process without swapping
/// (`MemAvailable` in /proc/meminfo), when the system reports one.
pub(crate) fn available_memory() -> Option<u64> {
    let info = std::fs::read_to_string("/proc/meminfo").ok()?;
    let line = info.lines().find(|l| l.starts_with("MemAvailable:"))?;
    let kib: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024)
}

/// An `Input` error (exit 2) when the weights need more memory than is available.
fn check_fits(dir: &Path, needed: u64, available: u64) -> Result<()> {
    check_fits_as(
        dir,
        needed,
        available,
        "matrices, embeddings and head at their stored precision, the head once more in 8 bits, norms in f32",
    )
}

/// [`check_fits`] with `held` saying how the weights are held in memory.
pub(crate) fn check_fits_as(path: &Path, needed: u64, available: u64, held: &str) -> Result<()> {
    if needed <= available {
        return Ok(());
    }
    let gib = |b: u64| b as f64 / (1u64 << 30) as f64;
    Err(Error::file(
        path,
        format!(
            "the model's weights need about {:.1} GiB of memory ({needed} bytes; {held}) and {:.1} GiB ({available} bytes) are available; free memory or use a machine with more",
            gib(needed),
            gib(available)
        ),
    ))
}

/// A float format whose values can be tested for NaN and ±Inf and read as f32.
pub trait Float: Copy + Send + Sync + candle_core::WithDType {
    fn finite(self) -> bool;
    fn wide(self) -> f32;
}

impl Float for f32 {
    #[inline(always)]
    fn finite(self) -> bool {
        self.is_finite()
    }
    fn wide(self) -> f32 {
        self
    }
}

impl Float for half::bf16 {
    /// Not all exponent bits set (bf16 has f32's 8-bit exponent).
    #[inline(always)]
    fn finite(self) -> bool {
        self.to_bits() & 0x7f80 != 0x7f80
    }
    fn wide(self) -> f32 {
        self.to_f32()
    }
}

impl Float for half::f16 {
    /// Not all five exponent bits set.
    #[inline(always)]
    fn finite(self) -> bool {
        self.to_bits() & 0x7c00 != 0x7c00
    }
    fn wide(self) -> f32 {
        self.to_f32()
    }
}

/// Where the first NaN or ±Inf of `values` is, with its value (as f32).
pub fn first_non_finite<T: Float>(values: &[T]) -> Option<(usize, f32)> {
    use rayon::prelude::*;
    const CHUNK: usize = 1 << 16;
    // Branch-free test over a chunk, which the compiler vectorises; only a chunk that fails is
    // searched element by element. Chunks are scanned in parallel.
    let all_finite = |c: &[T]| c.iter().fold(true, |ok, v| ok & v.finite());
    let chunk = if values.len() > CHUNK {
        values.par_chunks(CHUNK).position_first(|c| !all_finite(c))
    } else {
        (!all_finite(values)).then_some(0)
    }?;
    let start = chunk * CHUNK;
    let end = (start + CHUNK).min(values.len());
    values[start..end]
        .iter()
        .position(|v| !v.finite())
        .map(|i| (start + i, values[start + i].wide()))
}

/// Refuses a tensor holding NaN or ±Inf: an `Input` error naming `file` and the tensor `name`,
/// the first bad element (flat index and position) and `context` (e.g. "after merging the
/// adapter"). Reads an f32, bf16 or f16 tensor's storage in place when it is contiguous, so no
/// copy is made (a widened copy of an 8B-class model's output head would be 2 GiB).
pub fn check_finite(name: &str, file: &Path, t: &Tensor, context: &str) -> Result<()> {
    fn in_place<T: Float>(t: &Tensor) -> Option<Option<(usize, f32)>> {
        let (storage, layout) = t.storage_and_layout();
        match (&*storage, layout.contiguous_offsets()) {
            (candle_core::Storage::Cpu(cpu), Some((start, end))) => cpu
                .as_slice::<T>()
                .ok()
                .map(|s| first_non_finite(&s[start..end])),
            _ => None,
        }
    }
    let found = match t.dtype() {
        DType::BF16 => in_place::<half::bf16>(t),
        DType::F16 => in_place::<half::f16>(t),
        _ => in_place::<f32>(t),
    };
    let found = match found {
        Some(f) => f,
        // Not contiguous CPU storage of one of those: copy once.
        None => {
            let values: Vec<f32> = t
                .to_dtype(DType::F32)
                .and_then(|t| t.flatten_all())
                .and_then(|t| t.to_vec1())
                .map_err(|e| Error::field(file, None, name, format!("cannot read: {e}")))?;
            first_non_finite(&values)
        }
    };
    let Some((i, v)) = found else {
        return Ok(());
    };
    // Row-major position of flat index `i`.
    let dims = t.dims();
    let mut pos = vec![0usize; dims.len()];
    let mut rest = i;
    for (p, &d) in pos.iter_mut().zip(dims).rev() {
        if d > 0 {
            *p = rest % d;
            rest /= d;
        }
    }
    let what = if v.is_nan() {
        "NaN"
    } else if v > 0.0 {
        "+Inf"
    } else {
        "-Inf"
    };
    Err(Error::field(
        file,
        None,
        name,
        format!(
            "holds {what} at element {pos:?} of shape {dims:?}{context}; the weights are corrupt \
             (or from a diverged training run) and cannot give meaningful answers"
        ),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn llama_fixture() -> PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/runner/llama/model")
    }

    /// A checkpoint re-saved as two shards with a `model.safetensors.index.json` (the layout
    /// transformers writes, docs/model-formats.md §1.1) and in f16 loads to the same tensors,
    /// kept f16 in memory.
    #[test]
    fn sharded_and_f16_checkpoints_load_to_the_same_tensors() {
        let src = llama_fixture();
        let spec = ModelSpec::load(&src).unwrap();
        let single = load(&src, &spec).unwrap();
        let dir = tempfile::tempdir().unwrap();
        std::fs::copy(src.join("config.json"), dir.path().join("config.json")).unwrap();
        let mut names: Vec<&String> = single.tensors.keys().collect();
        names.sort();
        let (a, b) = names.split_at(names.len() / 2);
        let mut weight_map = serde_json::Map::new();
        for (shard, part) in [
            ("model-00001-of-00002.safetensors", a),
            ("model-00002-of-00002.safetensors", b),
        ] {
            let m: HashMap<String, Tensor> = part
                .iter()
                .map(|n| {
                    (
                        (*n).clone(),
                        single.tensors[*n].to_dtype(DType::F16).unwrap(),
                    )
                })
                .collect();
            candle_core::safetensors::save(&m, dir.path().join(shard)).unwrap();
            for n in part {
                weight_map.insert((*n).clone(), shard.into());
            }
        }
        let index = serde_json::json!({"metadata": {"total_size": 0}, "weight_map": weight_map});
        std::fs::write(
            dir.path().join("model.safetensors.index.json"),
            index.to_string(),
        )
        .unwrap();
        let sharded = load(dir.path(), &spec).unwrap();
        assert_eq!(sharded.files.len(), 2);
        assert_eq!(sharded.stored_dtype, "f16");
        for (name, t) in &single.tensors {
            let want: Vec<f32> = t
                .to_dtype(DType::F16)
                .unwrap()
                .to_dtype(DType::F32)
                .unwrap()
                .flatten_all()
                .unwrap()
                .to_vec1()
                .unwrap();
            assert_eq!(sharded.tensors[name].dtype(), DType::F16, "{name}");
            let got: Vec<f32> = sharded.tensors[name]
                .to_dtype(DType::F32)
                .unwrap()
                .flatten_all()
                .unwrap()
                .to_vec1()
                .unwrap();
            assert_eq!(got, want, "{name}");
        }
        // A shard the index names but that is missing is an error naming the index.
        std::fs::remove_file(dir.path().join("model-00002-of-00002.safetensors")).unwrap();
        let err = load(dir.path(), &spec).err().unwrap().to_string();
        assert!(
            err.contains("model.safetensors.index.json") && err.contains("00002"),
            "{err}"
        );
    }

    /// Linear-layer matrices and an untied embedding count at their stored size; the head, a
    /// tied embedding and the norms at f32.
    #[test]
    fn memory_is_estimated_per_tensor_and_a_model_too_large_is_refused() {
        let up = "model.layers.0.mlp.up_proj.weight";
        assert_eq!(resident_bytes(up, &[8, 4], 2, true), 64);
        assert_eq!(resident_bytes(EMBED, &[8, 4], 2, false), 96);
        assert_eq!(resident_bytes(EMBED, &[8, 4], 2, true), 64);
        assert_eq!(resident_bytes(LM_HEAD, &[8, 4], 2, true), 96);
        assert_eq!(resident_bytes("model.norm.weight", &[4], 2, true), 16);
        let dir = Path::new("/models/large");
        assert!(check_fits(dir, 100, 100).is_ok());
        let e = check_fits(dir, 3 << 30, 1 << 30).unwrap_err();
        assert_eq!(e.exit_code(), 2);
        let text = e.to_string();
        assert!(text.contains("/models/large"), "{text}");
        assert!(
            text.contains("3.0 GiB") && text.contains("1.0 GiB"),
            "{text}"
        );
        assert!(available_memory().is_some_and(|b| b > 0));
    }

    #[test]
    fn non_finite_values_are_found_and_located() {
        assert_eq!(first_non_finite(&[0.0, 1.0, -3.4e38]), None);
        assert!(matches!(first_non_finite(&[0.0, f32::NAN]), Some((1, v)) if v.is_nan()));
        let mut big = vec![0.5f32; (1 << 20) + 7];
        big[(1 << 20) + 3] = f32::NEG_INFINITY;
        big[(1 << 20) + 5] = f32::NAN;
        assert_eq!(
            first_non_finite(&big),
            Some(((1 << 20) + 3, f32::NEG_INFINITY))
        );

        // bf16 and f16 values are tested in place, by their exponent bits (IEEE 754 and the
        // bfloat16 layout: all exponent bits set is Inf or NaN); the largest finite values pass.
        use half::{bf16, f16};
        let b = [
            bf16::MAX,
            bf16::MIN,
            bf16::from_f32(1.0),
            bf16::INFINITY,
            bf16::NAN,
        ];
        assert_eq!(first_non_finite(&b[..3]), None);
        assert_eq!(first_non_finite(&b), Some((3, f32::INFINITY)));
        let h = [f16::MAX, f16::MIN_POSITIVE_SUBNORMAL, f16::NEG_INFINITY];
        assert_eq!(first_non_finite(&h), Some((2, f32::NEG_INFINITY)));
        let t = Tensor::new(&[[b[0], b[2]], [b[4], b[1]]], &Device::Cpu).unwrap();
        let msg = check_finite("w16", Path::new("m.safetensors"), &t, "")
            .unwrap_err()
            .to_string();
        assert!(msg.contains("NaN at element [1, 0]"), "{msg}");

        let file = Path::new("m/model.safetensors");
        let ok = Tensor::new(&[[1.0f32, 2.0], [3.0, 4.0]], &Device::Cpu).unwrap();
        check_finite("w", file, &ok, "").unwrap();
        let bad = Tensor::new(
            &[[1.0f32, 2.0, 3.0], [4.0, f32::INFINITY, 6.0]],
            &Device::Cpu,
        )
        .unwrap();
        let msg = check_finite("layers.0.w", file, &bad, "")
            .unwrap_err()
            .to_string();
        assert!(
            msg.contains("model.safetensors")
                && msg.contains("`layers.0.w`")
                && msg.contains("+Inf at element [1, 1] of shape [2, 3]"),
            "{msg}"
        );
        // A non-contiguous view is checked too (by copy).
        let t = bad.t().unwrap();
        let msg = check_finite("v", file, &t, " after merging")
            .unwrap_err()
            .to_string();
        assert!(
            msg.contains("[1, 1] of shape [3, 2] after merging"),
            "{msg}"
        );
        // f16 storage: NaN survives the up-cast.
        let h = Tensor::new(&[f32::NAN, 0.0], &Device::Cpu)
            .unwrap()
            .to_dtype(DType::F16)
            .unwrap();
        assert!(check_finite("h", file, &h, "")
            .unwrap_err()
            .to_string()
            .contains("NaN at element [0]"));
    }

    #[test]
    fn untied_checkpoint_without_lm_head_is_an_error() {
        let src = llama_fixture();
        let spec = ModelSpec::load(&src).unwrap();
        let mut w = load(&src, &spec).unwrap().tensors;
        w.remove(LM_HEAD);
        let dir = tempfile::tempdir().unwrap();
        candle_core::safetensors::save(&w, dir.path().join("model.safetensors")).unwrap();
        let err = load(dir.path(), &spec).err().unwrap().to_string();
        assert!(
            err.contains("lm_head.weight") && err.contains("tie_word_embeddings"),
            "{err}"
        );
    }
}
