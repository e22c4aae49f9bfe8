//! One generic decoder-only transformer with per-family options, computing in f32.
//!
//! Why not wrap candle-transformers: its models assume one unpadded sequence, while batched
//! decoding needs left padding, per-sequence position ids and a padding mask (model-formats.md
//! §3.3), and later slot refill and shared-prefix reuse. Every formula follows
//! model-formats.md §2 (transformers 5.24.0 `modeling_{llama,mistral,qwen2,qwen3,phi3,gemma,
//! gemma2}.py`): rotate_half RoPE with partial rotary, GQA by `repeat_interleave`, softmax in
//! f32, additive masks with the finite f32 minimum, Gemma (1+w) norms and embedding scaling,
//! Gemma2 soft-caps and sandwich norms, Qwen3 q/k norms before RoPE, Phi-3 fused projections.
//!
//! Shapes: activations are kept as [B·L, hidden] between blocks; attention works on
//! [B, heads, L, head_dim]. Linear weights are [out, in] (y = x·Wᵀ + b).

use crate::error::{Error, Result};
use crate::model::config::{Activation, ModelSpec, NormStyle, RopeScaling, RopeSpec};
use crate::model::weights::{EMBED, LM_HEAD};
use candle_core::{DType, Device, Tensor, D};
use std::collections::HashMap;

/// The inputs of one forward call over a batch.
///
/// `tokens` and `positions` are row-major [batch, len]. `key_mask` is row-major
/// [batch, cache_len + len]: 1 where the key slot holds a real token, 0 for padding. Query i of
/// a row sits at cache index `cache_len + i` (model-formats.md §2.7: masks use cache indices,
/// RoPE uses position ids).
#[derive(Debug, Clone)]
pub struct StepInput {
    pub batch: usize,
    pub len: usize,
    pub tokens: Vec<u32>,
    pub positions: Vec<u32>,
    pub key_mask: Vec<u8>,
}

/// Key/value cache of every layer, [B, n_kv_heads, T, head_dim] each.
///
/// This simple form grows by concatenation. It is the single place the decoder stores past
/// keys and values, so a preallocated cache with refillable slots can replace it without
/// touching the attention code (only `append` and `len` are used).
#[derive(Debug, Default)]
pub struct KvCache {
    layers: Vec<Option<(Tensor, Tensor)>>,
    len: usize,
}

impl KvCache {
    pub fn new(num_layers: usize) -> Self {
        KvCache {
            layers: vec![None; num_layers],
            len: 0,
        }
    }

    /// Cached positions (T) per row.
    pub fn len(&self) -> usize {
        self.len
    }

    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Appends this call's k and v for one layer and returns the whole cached k and v.
    fn append(&mut self, layer: usize, k: Tensor, v: Tensor) -> Result<(Tensor, Tensor)> {
        let (k, v) = match self.layers[layer].take() {
            None => (k, v),
            Some((pk, pv)) => (Tensor::cat(&[&pk, &k], 2)?, Tensor::cat(&[&pv, &v], 2)?),
        };
        self.layers[layer] = Some((k.clone(), v.clone()));
        Ok((k, v))
    }

    /// Called once per forward call, after every layer appended `added` positions.
    fn advance(&mut self, added: usize) {
        self.len += added;
    }
}

struct Linear {
    /// [out, in]
    w: Tensor,
    b: Option<Tensor>,
}

impl Linear {
    /// x: [N, in] → [N, out]
    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let y = x.matmul(&self.w.t()?)?;
        Ok(match &self.b {
            Some(b) => y.broadcast_add(b)?,
            None => y,
        })
    }
}

/// RMSNorm over the last dimension. For the Gemma style `w` already holds 1 + w (in f32,
/// as `1.0 + self.weight.float()` does), so both styles become x·rsqrt(mean(x²)+eps)·w in f32.
struct RmsNorm {
    w: Tensor,
    eps: f64,
}

impl RmsNorm {
    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let var = x.sqr()?.mean_keepdim(D::Minus1)?;
        let inv = (var + self.eps)?.sqrt()?.recip()?;
        Ok(x.broadcast_mul(&inv)?.broadcast_mul(&self.w)?)
    }
}

enum Qkv {
    Separate {
        q: Linear,
        k: Linear,
        v: Linear,
    },
    /// Phi-3 `qkv_proj`: rows [q | k | v].
    Fused(Linear),
}

enum GateUp {
    Separate {
        gate: Linear,
        up: Linear,
    },
    /// Phi-3 `gate_up_proj`: rows [gate | up].
    Fused(Linear),
}

struct Layer {
    input_norm: RmsNorm,
    post_attn_norm: RmsNorm,
    /// Gemma2 only: (pre_feedforward_layernorm, post_feedforward_layernorm).
    ff_norms: Option<(RmsNorm, RmsNorm)>,
    qkv: Qkv,
    o: Linear,
    qk_norm: Option<(RmsNorm, RmsNorm)>,
    gate_up: GateUp,
    down: Linear,
    window: Option<usize>,
}

/// The model, ready to run.
pub struct Decoder {
    spec: ModelSpec,
    /// [vocab, hidden]
    embed: Tensor,
    /// [vocab, hidden]; the embedding matrix itself when tied.
    lm_head: Tensor,
    final_norm: RmsNorm,
    layers: Vec<Layer>,
}

/// The additive mask value for hidden keys: `finfo(float32).min`, finite so fully masked rows
/// (pad queries) stay free of NaN (model-formats.md §2.7).
const MASKED: f32 = f32::MIN;

impl Decoder {
    /// Takes the tensors out of a checkpoint-named f32 map (after any LoRA merge).
    pub fn new(spec: &ModelSpec, mut w: HashMap<String, Tensor>) -> Result<Self> {
        let mut take = |name: &str| -> Result<Tensor> {
            w.remove(name)
                .ok_or_else(|| Error::internal(format!("tensor {name} was not loaded")))
        };
        let embed = take(EMBED)?;
        let norm = |t: Tensor| -> Result<RmsNorm> {
            let w = match spec.norm_style {
                NormStyle::Llama => t,
                NormStyle::Gemma => (t + 1.0)?,
            };
            Ok(RmsNorm {
                w,
                eps: spec.rms_norm_eps,
            })
        };
        let mut layers = Vec::with_capacity(spec.num_layers);
        for l in 0..spec.num_layers {
            let p = format!("model.layers.{l}.");
            let mut t = |n: &str| take(&format!("{p}{n}"));
            let lin = |t: &mut dyn FnMut(&str) -> Result<Tensor>,
                       n: &str,
                       bias: bool|
             -> Result<Linear> {
                Ok(Linear {
                    w: t(&format!("{n}.weight"))?,
                    b: if bias {
                        Some(t(&format!("{n}.bias"))?)
                    } else {
                        None
                    },
                })
            };
            let qkv = if spec.fused_qkv {
                Qkv::Fused(lin(&mut t, "self_attn.qkv_proj", false)?)
            } else {
                Qkv::Separate {
                    q: lin(&mut t, "self_attn.q_proj", spec.qkv_bias)?,
                    k: lin(&mut t, "self_attn.k_proj", spec.qkv_bias)?,
                    v: lin(&mut t, "self_attn.v_proj", spec.qkv_bias)?,
                }
            };
            let o = lin(&mut t, "self_attn.o_proj", spec.o_bias)?;
            let gate_up = if spec.fused_gate_up {
                GateUp::Fused(lin(&mut t, "mlp.gate_up_proj", false)?)
            } else {
                GateUp::Separate {
                    gate: lin(&mut t, "mlp.gate_proj", spec.mlp_bias)?,
                    up: lin(&mut t, "mlp.up_proj", spec.mlp_bias)?,
                }
            };
            let down = lin(&mut t, "mlp.down_proj", spec.mlp_bias)?;
            let qk_norm = if spec.qk_norm {
                // Always Llama style (Qwen3RMSNorm), per head over head_dim.
                Some((
                    RmsNorm {
                        w: t("self_attn.q_norm.weight")?,
                        eps: spec.rms_norm_eps,
                    },
                    RmsNorm {
                        w: t("self_attn.k_norm.weight")?,
                        eps: spec.rms_norm_eps,
                    },
                ))
            } else {
                None
            };
            let ff_norms = if spec.sandwich_norms {
                Some((
                    norm(t("pre_feedforward_layernorm.weight")?)?,
                    norm(t("post_feedforward_layernorm.weight")?)?,
                ))
            } else {
                None
            };
            layers.push(Layer {
                input_norm: norm(t("input_layernorm.weight")?)?,
                post_attn_norm: norm(t("post_attention_layernorm.weight")?)?,
                ff_norms,
                qkv,
                o,
                qk_norm,
                gate_up,
                down,
                window: spec.layer_windows.get(l).copied().flatten(),
            });
        }
        let final_norm = norm(take("model.norm.weight")?)?;
        let lm_head = match w.remove(LM_HEAD) {
            Some(h) => h,
            None => embed.clone(),
        };
        Ok(Decoder {
            spec: spec.clone(),
            embed,
            lm_head,
            final_norm,
            layers,
        })
    }

    pub fn spec(&self) -> &ModelSpec {
        &self.spec
    }

    pub fn new_cache(&self) -> KvCache {
        KvCache::new(self.spec.num_layers)
    }

    /// Runs one forward call and returns the f32 logits of each row's last position, [B, vocab].
    pub fn forward(&self, input: &StepInput, cache: &mut KvCache) -> Result<Tensor> {
        let (b, l) = (input.batch, input.len);
        let past = cache.len();
        let total = past + l;
        if input.tokens.len() != b * l
            || input.positions.len() != b * l
            || input.key_mask.len() != b * total
        {
            return Err(Error::internal(format!(
                "step input sizes do not match batch {b} × len {l} with {past} cached"
            )));
        }
        let dev = Device::Cpu;
        let ids = Tensor::from_slice(&input.tokens, b * l, &dev)?;
        let mut h = self.embed.index_select(&ids, 0)?;
        if let Some(s) = self.spec.embed_scale {
            h = (h * s)?;
        }
        let (cos, sin) = self.rope_tables(input)?;
        let masks = self.masks(input, past)?;
        for (i, layer) in self.layers.iter().enumerate() {
            let mask = match layer.window {
                None => &masks.0,
                Some(_) => masks.1.as_ref().unwrap_or(&masks.0),
            };
            let step = Step {
                b,
                l,
                cos: &cos,
                sin: &sin,
                mask,
            };
            h = self.layer_forward(i, layer, &h, &step, cache)?;
        }
        cache.advance(l);
        let hidden = self.spec.hidden_size;
        let last = h
            .reshape((b, l, hidden))?
            .narrow(1, l - 1, 1)?
            .reshape((b, hidden))?;
        let x = self.final_norm.forward(&last)?;
        let mut logits = x.matmul(&self.lm_head.t()?)?;
        if let Some(c) = self.spec.final_softcap {
            logits = ((logits / c)?.tanh()? * c)?;
        }
        Ok(logits.to_dtype(DType::F32)?)
    }

    fn layer_forward(
        &self,
        idx: usize,
        layer: &Layer,
        h: &Tensor,
        step: &Step,
        cache: &mut KvCache,
    ) -> Result<Tensor> {
        let x = layer.input_norm.forward(h)?;
        let a = self.attention(idx, layer, &x, step, cache)?;
        let h = match &layer.ff_norms {
            // Gemma2: post_attention_layernorm normalises the attention output.
            Some(_) => (h + layer.post_attn_norm.forward(&a)?)?,
            None => (h + a)?,
        };
        let x = match &layer.ff_norms {
            Some((pre, _)) => pre.forward(&h)?,
            None => layer.post_attn_norm.forward(&h)?,
        };
        let m = self.mlp(layer, &x)?;
        Ok(match &layer.ff_norms {
            Some((_, post)) => (h + post.forward(&m)?)?,
            None => (h + m)?,
        })
    }

    fn mlp(&self, layer: &Layer, x: &Tensor) -> Result<Tensor> {
        let (gate, up) = match &layer.gate_up {
            GateUp::Separate { gate, up } => (gate.forward(x)?, up.forward(x)?),
            GateUp::Fused(gu) => {
                let y = gu.forward(x)?;
                let i = self.spec.intermediate_size;
                (y.narrow(1, 0, i)?, y.narrow(1, i, i)?)
            }
        };
        let act = match self.spec.activation {
            Activation::Silu => gate.silu()?,
            Activation::GeluTanh => gate.gelu()?,
            Activation::GeluErf => gate.gelu_erf()?,
        };
        layer.down.forward(&(act * up)?)
    }

    fn attention(
        &self,
        idx: usize,
        layer: &Layer,
        x: &Tensor,
        step: &Step,
        cache: &mut KvCache,
    ) -> Result<Tensor> {
        let Step {
            b,
            l,
            cos,
            sin,
            mask,
        } = *step;
        let s = &self.spec;
        let (nh, nkv, hd) = (s.num_heads, s.num_kv_heads, s.head_dim);
        let (q, k, v) = match &layer.qkv {
            Qkv::Separate { q, k, v } => (q.forward(x)?, k.forward(x)?, v.forward(x)?),
            Qkv::Fused(qkv) => {
                let y = qkv.forward(x)?;
                (
                    y.narrow(1, 0, nh * hd)?,
                    y.narrow(1, nh * hd, nkv * hd)?,
                    y.narrow(1, (nh + nkv) * hd, nkv * hd)?,
                )
            }
        };
        let mut q = q.reshape((b, l, nh, hd))?;
        let mut k = k.reshape((b, l, nkv, hd))?;
        if let Some((qn, kn)) = &layer.qk_norm {
            q = qn.forward(&q)?;
            k = kn.forward(&k)?;
        }
        let q = self.rope(&q.transpose(1, 2)?.contiguous()?, cos, sin)?;
        let k = self.rope(&k.transpose(1, 2)?.contiguous()?, cos, sin)?;
        let v = v.reshape((b, l, nkv, hd))?.transpose(1, 2)?.contiguous()?;
        let (k, v) = cache.append(idx, k, v)?;
        let t = k.dim(2)?;
        let (k, v) = if nh == nkv {
            (k, v)
        } else {
            // repeat_interleave: query head j uses kv head j / n_rep.
            let rep = nh / nkv;
            let k = k
                .unsqueeze(2)?
                .expand((b, nkv, rep, t, hd))?
                .reshape((b, nh, t, hd))?;
            let v = v
                .unsqueeze(2)?
                .expand((b, nkv, rep, t, hd))?
                .reshape((b, nh, t, hd))?;
            (k, v)
        };
        let mut scores = (q.matmul(&k.t()?)? * s.attn_scale)?;
        if let Some(c) = s.attn_softcap {
            // Gemma2: before the mask.
            scores = ((scores / c)?.tanh()? * c)?;
        }
        let scores = scores.broadcast_add(mask)?;
        let probs = candle_nn::ops::softmax_last_dim(&scores)?;
        let out = probs.matmul(&v)?; // [B, nh, L, hd]
        let out = out.transpose(1, 2)?.reshape((b * l, nh * hd))?;
        layer.o.forward(&out)
    }

    /// Applies rotate_half RoPE to the first `rotary_dim` channels of [B, H, L, hd].
    fn rope(&self, x: &Tensor, cos: &Tensor, sin: &Tensor) -> Result<Tensor> {
        let hd = self.spec.head_dim;
        let rd = self.spec.rope.rotary_dim;
        if rd == hd {
            return Ok(candle_nn::rotary_emb::rope(x, cos, sin)?);
        }
        let rot = x.narrow(3, 0, rd)?.contiguous()?;
        let pass = x.narrow(3, rd, hd - rd)?;
        let rot = candle_nn::rotary_emb::rope(&rot, cos, sin)?;
        Ok(Tensor::cat(&[&rot, &pass], 3)?.contiguous()?)
    }

    /// cos and sin, [B, L, rotary_dim/2], from each token's position id.
    fn rope_tables(&self, input: &StepInput) -> Result<(Tensor, Tensor)> {
        let (inv, scale) = self.inv_freq_for(input);
        let half = inv.len();
        let n = input.batch * input.len;
        let mut cos = Vec::with_capacity(n * half);
        let mut sin = Vec::with_capacity(n * half);
        for &p in &input.positions {
            let p = p as f32;
            for &f in &inv {
                let a = p * f;
                cos.push(a.cos() * scale);
                sin.push(a.sin() * scale);
            }
        }
        let dev = Device::Cpu;
        Ok((
            Tensor::from_vec(cos, (input.batch, input.len, half), &dev)?,
            Tensor::from_vec(sin, (input.batch, input.len, half), &dev)?,
        ))
    }

    /// Inverse frequencies and attention scaling for this call: seq_len is
    /// max(position_ids) + 1.
    fn inv_freq_for(&self, input: &StepInput) -> (Vec<f32>, f32) {
        let seq_len = input.positions.iter().copied().max().unwrap_or(0) as f64 + 1.0;
        rope_frequencies(&self.spec.rope, seq_len)
    }

    /// Additive masks [B, 1, L, T] for full-attention layers and, when some layer slides, for
    /// sliding layers (all sliding layers of a model share one window).
    fn masks(&self, input: &StepInput, past: usize) -> Result<(Tensor, Option<Tensor>)> {
        let (b, l) = (input.batch, input.len);
        let total = past + l;
        let window = self.layers.iter().find_map(|x| x.window);
        let build = |w: Option<usize>| -> Result<Tensor> {
            let m = additive_mask(&input.key_mask, b, l, past, w);
            Ok(Tensor::from_vec(m, (b, 1, l, total), &Device::Cpu)?)
        };
        let full = build(None)?;
        let sliding = match window {
            Some(w) => Some(build(Some(w))?),
            None => None,
        };
        Ok((full, sliding))
    }
}

/// Default-rule inverse frequencies `1.0 / (θ ** (arange(0, d, 2).float() / d))` in f32.
fn default_inv_freq(r: &RopeSpec) -> Vec<f32> {
    let d = r.rotary_dim;
    let theta = r.theta as f32;
    (0..d / 2)
        .map(|i| 1.0f32 / theta.powf((2 * i) as f32 / d as f32))
        .collect()
}

/// Inverse frequencies and attention scaling (the cos/sin multiplier) for a forward call whose
/// longest position is `seq_len − 1` (model-formats.md §2.3; transformers 5.24
/// `modeling_rope_utils.py` `ROPE_INIT_FUNCTIONS`).
pub fn rope_frequencies(r: &RopeSpec, seq_len: f64) -> (Vec<f32>, f32) {
    let d = r.rotary_dim as f64;
    let base = &default_inv_freq(r);
    let max_pos = r.max_position_embeddings as f64;
    match &r.scaling {
        RopeScaling::Default => (base.clone(), 1.0),
        RopeScaling::Linear { factor } => (base.iter().map(|&b| b / *factor as f32).collect(), 1.0),
        RopeScaling::Dynamic { factor } => {
            if seq_len <= max_pos {
                return (base.clone(), 1.0);
            }
            let theta =
                r.theta * ((factor * seq_len / max_pos) - (factor - 1.0)).powf(d / (d - 2.0));
            let theta = theta as f32;
            (
                (0..r.rotary_dim / 2)
                    .map(|i| 1.0f32 / theta.powf((2 * i) as f32 / d as f32))
                    .collect(),
                1.0,
            )
        }
        RopeScaling::Llama3 {
            factor,
            low_freq_factor,
            high_freq_factor,
            original_max,
        } => {
            // f32 throughout, as `_compute_llama3_parameters` runs on f32 tensors.
            let (f, lo, hi, o) = (
                *factor as f32,
                *low_freq_factor as f32,
                *high_freq_factor as f32,
                *original_max as f32,
            );
            let (low_wl, high_wl) = (o / lo, o / hi);
            let inv = base
                .iter()
                .map(|&b| {
                    let wl = 2.0 * std::f32::consts::PI / b;
                    if wl < high_wl {
                        b
                    } else if wl > low_wl {
                        b / f
                    } else {
                        let s = (o / wl - lo) / (hi - lo);
                        (1.0 - s) * b / f + s * b
                    }
                })
                .collect();
            (inv, 1.0)
        }
        RopeScaling::Yarn {
            factor,
            original_max,
            beta_fast,
            beta_slow,
            truncate,
            attention_scaling,
        } => {
            // The correction range in f64 (Python floats), the frequencies in f32 tensors.
            let corr = |n: f64| {
                d * (original_max / (n * 2.0 * std::f64::consts::PI)).ln() / (2.0 * r.theta.ln())
            };
            let (mut low, mut high) = (corr(*beta_fast), corr(*beta_slow));
            if *truncate {
                low = low.floor();
                high = high.ceil();
            }
            let low = low.max(0.0);
            let high = high.min(d - 1.0);
            let high = if low == high { high + 0.001 } else { high };
            let theta = r.theta as f32;
            let f = *factor as f32;
            let inv = (0..r.rotary_dim / 2)
                .map(|i| {
                    let pos = theta.powf((2 * i) as f32 / d as f32);
                    let extra = 1.0 / pos;
                    let inter = 1.0 / (f * pos);
                    let ramp =
                        ((i as f32 - low as f32) / (high as f32 - low as f32)).clamp(0.0, 1.0);
                    let e = 1.0 - ramp;
                    inter * (1.0 - e) + extra * e
                })
                .collect();
            (inv, *attention_scaling as f32)
        }
        RopeScaling::LongRope {
            short_factor,
            long_factor,
            original_max,
            attention_scaling,
        } => {
            let ext = if seq_len > *original_max {
                long_factor
            } else {
                short_factor
            };
            let theta = r.theta as f32;
            let inv = ext
                .iter()
                .enumerate()
                .map(|(i, &e)| 1.0f32 / (e as f32 * theta.powf((2 * i) as f32 / d as f32)))
                .collect();
            (inv, *attention_scaling as f32)
        }
    }
}

/// The additive attention mask, row-major [B, L, past + L]: 0 where query i (cache index
/// past + i) may see key k, `MASKED` elsewhere. Visible iff k ≤ q (causal), the key slot is real
/// (`key_mask`), and with a window W, k > q − W (model-formats.md §2.7).
pub fn additive_mask(
    key_mask: &[u8],
    b: usize,
    l: usize,
    past: usize,
    window: Option<usize>,
) -> Vec<f32> {
    let total = past + l;
    let mut m = vec![MASKED; b * l * total];
    for row in 0..b {
        let keys = &key_mask[row * total..(row + 1) * total];
        for i in 0..l {
            let q = past + i;
            let out = &mut m[(row * l + i) * total..(row * l + i + 1) * total];
            for (k, slot) in out.iter_mut().enumerate().take(q + 1) {
                if keys[k] != 0 && window.is_none_or(|w| k + w > q) {
                    *slot = 0.0;
                }
            }
        }
    }
    m
}

/// What every layer of one forward step shares: batch and step length, the RoPE tables and the
/// additive attention mask chosen for the layer.
#[derive(Clone, Copy)]
struct Step<'a> {
    b: usize,
    l: usize,
    cos: &'a Tensor,
    sin: &'a Tensor,
    mask: &'a Tensor,
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    /// inv_freq and attention scaling for every rope_type against transformers 5.24.0
    /// `ROPE_INIT_FUNCTIONS` (tests/fixtures/rope/cases.json, made by
    /// tests/reference/make_rope_fixtures.py). Relative tolerance 1e-6: both sides are f32.
    #[test]
    fn rope_frequencies_match_transformers() {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/rope/cases.json");
        let doc: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
        let cases = doc["cases"].as_array().unwrap();
        assert!(cases.len() >= 10);
        for c in cases {
            let label = format!("{} seq_len {}", c["name"], c["seq_len"]);
            let spec =
                ModelSpec::from_json(Path::new("config.json"), c["config"].as_object().unwrap())
                    .unwrap();
            let (inv, scale) = rope_frequencies(&spec.rope, c["seq_len"].as_f64().unwrap());
            let want: Vec<f32> = c["inv_freq"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap() as f32)
                .collect();
            assert_eq!(inv.len(), want.len(), "{label}");
            for (i, (a, b)) in inv.iter().zip(&want).enumerate() {
                assert!(
                    (a - b).abs() <= 1e-6 * b.abs().max(1e-30),
                    "{label}: inv_freq[{i}] {a} vs {b}"
                );
            }
            let ws = c["attention_scaling"].as_f64().unwrap() as f32;
            assert!(
                (scale - ws).abs() <= 1e-6,
                "{label}: scaling {scale} vs {ws}"
            );
        }
    }

    /// Mask rules of transformers 5.24.0 `masking_utils.py` (model-formats.md §2.7): causal in
    /// cache-index space, padding hides keys, a window W shows W keys including the query.
    #[test]
    fn masks_combine_causal_padding_and_window() {
        let vis = |m: Vec<f32>| -> Vec<u8> { m.iter().map(|&x| (x == 0.0) as u8).collect() };
        // One row, one pad slot on the left, four queries.
        let full = vis(additive_mask(&[0, 1, 1, 1], 1, 4, 0, None));
        assert_eq!(full, vec![0, 0, 0, 0, 0, 1, 0, 0, 0, 1, 1, 0, 0, 1, 1, 1]);
        let win = vis(additive_mask(&[0, 1, 1, 1], 1, 4, 0, Some(2)));
        assert_eq!(&win[12..], &[0, 0, 1, 1]);
        // A decode step: 3 cached slots + 1 query sees everything real.
        let step = vis(additive_mask(&[1, 0, 1, 1], 1, 1, 3, None));
        assert_eq!(step, vec![1, 0, 1, 1]);
        // Pad query rows stay finite (no −inf), so softmax over them is not NaN.
        assert!(additive_mask(&[0, 1], 1, 2, 0, None)
            .iter()
            .all(|x| x.is_finite()));
    }
}
