#!/usr/bin/env python3
"""Reference fixtures for reading GGUF files: tiny GGUF models and what transformers makes of them.

Writes tests/fixtures/gguf/:

- `<name>.gguf`: tiny models in GGUF v3, written with the `gguf` package's `GGUFWriter`:
  * from the seeded fixture models under tests/fixtures/runner/ (llama, mistral, qwen2; hidden
    size 64), their linear layers quantised with `gguf.quants.quantize` to the block types of 32
    values (q8_0, q4_0, q4_1, q5_0, q5_1) or stored f32/f16/bf16. Tensor names and the q/k row
    permutation of llama-architecture files are those of llama.cpp's `convert_hf_to_gguf.py`
    (`LlamaModel.permute`, from memory: `w.reshape(n_head, 2, rows // n_head // 2, cols)
    .swapaxes(1, 2)`; checked below: transformers' un-permuted q and k must equal the original
    tensors' own quantisation, since blocks run along rows and the permutation moves whole rows);
    The mistral model is written as llama.cpp writes Mistral models (architecture `llama`);
    transformers loads it as Llama: it would pick Mistral only when `"mistral" in
    read_field(reader, "general.name")`, a list membership test (the whole name equal to
    "mistral"), and with gguf 0.19 that path fails ("Unknown gguf model_type: mistral");
  * gemma, gemma2 and phi3 files from the runner fixtures, written as llama.cpp's converter
    writes these families (see the comment above `family_model`); transformers cannot load
    gemma files, so their reference is the gguf package's dequantised tensors in
    GemmaForCausalLM; these files also record the logits after the first prompt;
  * `qwen3-q8_0.gguf`: a seeded two-layer Qwen3 model with head size 128 (the only one
    transformers can load from GGUF: it reads no head size from the metadata);
  * `kquants.gguf`: a one-layer llama-architecture model with hidden size 256 whose matrices are
    k-quant blocks (q2_k, q3_k, q4_k, q5_k, q6_k). gguf 0.19 has no quantiser for the k-quants,
    so the blocks are seeded random codes with f16 scales chosen to give weights of a usual size;
    the reference still dequantises them with its own code;
  * `tensors.gguf`: one [4, 512] tensor of every supported type (no model).
- `manifest.json`: per file, the SHA-256 of every tensor as transformers 5.24.0 holds it after
  `AutoModelForCausalLM.from_pretrained(dir, gguf_file=..., dtype=torch.float32)` (which
  dequantises with `gguf.quants.dequantize` to f32 and undoes the llama permutation), by
  transformers' tensor name, as little-endian f32 bytes; and greedy continuations
  (`generate(do_sample=False)`, eager attention) of three fixed prompts given as token ids, with
  the top-1/top-2 logit margin of every step. For `tensors.gguf`, the SHA-256 of
  `gguf.quants.dequantize` of each tensor.

Usage: /work/venv-ref/bin/python tests/reference/make_gguf_fixtures.py (seeded; a minute).
"""

import hashlib
import json
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np
import torch

torch.set_num_threads(1)

import gguf  # noqa: E402
import transformers  # noqa: E402
from gguf import GGMLQuantizationType as Q  # noqa: E402
from safetensors.torch import load_file  # noqa: E402
from transformers import AutoModelForCausalLM  # noqa: E402

transformers.logging.set_verbosity_error()

ROOT = Path(__file__).resolve().parents[2]
RUNNER = ROOT / "tests" / "fixtures" / "runner"
OUT = ROOT / "tests" / "fixtures" / "gguf"
PROMPTS = [[0, 17, 42, 99, 7, 250], [0, 5, 5, 300, 12, 81, 64, 3, 190], [0, 211, 8]]
NEW_TOKENS = 10


def sha(a: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(a, dtype="<f4").tobytes()).hexdigest()


def permute(w: np.ndarray, n_head: int, n_head_kv: int | None) -> np.ndarray:
    """llama.cpp convert_hf_to_gguf.py LlamaModel.permute (from memory; checked by the f32 file)."""
    if n_head_kv is not None and n_head != n_head_kv:
        n_head = n_head_kv
    return (
        w.reshape(n_head, 2, w.shape[0] // n_head // 2, *w.shape[1:])
        .swapaxes(1, 2)
        .reshape(w.shape)
    )


def quantised(w: np.ndarray, qtype: Q) -> np.ndarray:
    if qtype == Q.F32:
        return w.astype(np.float32)
    if qtype == Q.F16:
        return w.astype(np.float16)
    return gguf.quants.quantize(w.astype(np.float32), qtype)


def tensor_type(name: str, ndim: int, linear: Q, embed: Q, head: Q | None) -> Q:
    """The type a tensor is stored in: vectors f32, the embedding and head their own, the rest linear."""
    if ndim == 1:
        return Q.F32
    if name == "model.embed_tokens.weight":
        return embed
    if name == "lm_head.weight":
        return head
    return linear


def hf_to_gguf_name(name: str) -> str:
    table = {
        "model.embed_tokens.weight": "token_embd.weight",
        "model.norm.weight": "output_norm.weight",
        "lm_head.weight": "output.weight",
    }
    if name in table:
        return table[name]
    parts = name.split(".")
    layer = parts[2]
    rest = ".".join(parts[3:])
    sub = {
        "input_layernorm.weight": "attn_norm.weight",
        "post_attention_layernorm.weight": "ffn_norm.weight",
        "self_attn.q_proj.weight": "attn_q.weight",
        "self_attn.k_proj.weight": "attn_k.weight",
        "self_attn.v_proj.weight": "attn_v.weight",
        "self_attn.q_proj.bias": "attn_q.bias",
        "self_attn.k_proj.bias": "attn_k.bias",
        "self_attn.v_proj.bias": "attn_v.bias",
        "self_attn.o_proj.weight": "attn_output.weight",
        "self_attn.q_norm.weight": "attn_q_norm.weight",
        "self_attn.k_norm.weight": "attn_k_norm.weight",
        "mlp.gate_proj.weight": "ffn_gate.weight",
        "mlp.up_proj.weight": "ffn_up.weight",
        "mlp.down_proj.weight": "ffn_down.weight",
    }[rest]
    return f"blk.{layer}.{sub}"


FILE_TEMPLATE = (
    "{% for m in messages %}[{{ m['role'] }}] {{ m['content'] }}\n{% endfor %}"
    "{% if add_generation_prompt %}[assistant] {% endif %}"
)


def write_header(w: gguf.GGUFWriter, arch: str, name: str, cfg: dict, eos: int, head_dim_key: bool):
    w.add_name(name)
    w.add_context_length(cfg["max_position_embeddings"])
    w.add_embedding_length(cfg["hidden_size"])
    w.add_block_count(cfg["num_hidden_layers"])
    w.add_feed_forward_length(cfg["intermediate_size"])
    w.add_head_count(cfg["num_attention_heads"])
    w.add_head_count_kv(cfg["num_key_value_heads"])
    w.add_layer_norm_rms_eps(cfg["rms_norm_eps"])
    w.add_rope_freq_base(cfg["rope_theta"])
    if head_dim_key:
        w.add_rope_dimension_count(cfg["head_dim"])
    w.add_vocab_size(cfg["vocab_size"])
    w.add_bos_token_id(0)
    w.add_eos_token_id(eos)
    w.add_file_type(1)


def from_runner(family: str, arch: str, gname: str, linear: Q, embed: Q, head: Q | None):
    """A GGUF file from the runner fixture `family`; `head` None drops output.weight (tied)."""
    d = RUNNER / family / "model"
    cfg = json.loads((d / "config.json").read_text())
    rp = cfg.get("rope_parameters") or {}
    cfg["rope_theta"] = float(rp.get("rope_theta", cfg.get("rope_theta", 10000.0)))
    cfg.setdefault("head_dim", cfg["hidden_size"] // cfg["num_attention_heads"])
    eos = cfg["eos_token_id"]
    eos = eos[0] if isinstance(eos, list) else eos
    tensors = {k: v.float().numpy() for k, v in load_file(str(d / "model.safetensors")).items()}
    if "lm_head.weight" not in tensors:
        tensors["lm_head.weight"] = tensors["model.embed_tokens.weight"]
    return cfg, eos, tensors, (arch, gname, linear, embed, head)


def write_model(path: Path, cfg: dict, eos: int, tensors: dict, how) -> dict:
    arch, gname, linear, embed, head = how
    w = gguf.GGUFWriter(str(path), arch)
    write_header(w, arch, gname, cfg, eos, head_dim_key=(arch == "llama"))
    if head is None and arch == "qwen2":
        # A template of the file's own that differs from the tokenizer directory's (liftgate
        # uses the directory's and warns with both renderings).
        w.add_chat_template(FILE_TEMPLATE)
    types = {}
    for name in sorted(tensors):
        t = tensors[name].astype(np.float32)
        if name == "lm_head.weight" and head is None:
            continue
        if arch == "llama" and name.endswith("q_proj.weight"):
            t = permute(t, cfg["num_attention_heads"], cfg["num_attention_heads"])
        if arch == "llama" and name.endswith("k_proj.weight"):
            t = permute(t, cfg["num_attention_heads"], cfg["num_key_value_heads"])
        q = tensor_type(name, t.ndim, linear, embed, head)
        data = quantised(t, q)
        w.add_tensor(hf_to_gguf_name(name), data, raw_dtype=q if q not in (Q.F32, Q.F16) else None)
        types[hf_to_gguf_name(name)] = q.name.lower()
    w.write_header_to_file()
    w.write_kv_data_to_file()
    w.write_tensors_to_file()
    w.close()
    return types


def kquant_blocks(qtype: Q, rows: int, cols: int, rng: np.random.Generator) -> np.ndarray:
    """Seeded random k-quant blocks with f16 scales giving weights of roughly ±0.3."""
    block, size = gguf.GGML_QUANT_SIZES[qtype]
    n = rows * cols // block
    b = rng.integers(0, 256, size=(n, size), dtype=np.uint8)
    scale = lambda base: (base * rng.uniform(0.5, 1.5, size=n)).astype(np.float16).view(np.uint8).reshape(n, 2)  # noqa: E731
    if qtype == Q.Q2_K:
        b[:, 80:82], b[:, 82:84] = scale(0.3 / 45), scale(0.15 / 15)
    elif qtype == Q.Q3_K:
        b[:, 108:110] = scale(0.3 / 128)
    elif qtype == Q.Q4_K:
        b[:, 0:2], b[:, 2:4] = scale(0.3 / 945), scale(0.15 / 63)
    elif qtype == Q.Q5_K:
        b[:, 0:2], b[:, 2:4] = scale(0.3 / 1953), scale(0.15 / 63)
    elif qtype == Q.Q6_K:
        b[:, 208:210] = scale(0.3 / 4064)
    return b.reshape(rows, cols // block * size)


def write_kquants(path: Path) -> tuple[dict, int]:
    rng = np.random.default_rng(5)
    cfg = {
        "max_position_embeddings": 128,
        "hidden_size": 256,
        "num_hidden_layers": 1,
        "intermediate_size": 256,
        "num_attention_heads": 4,
        "num_key_value_heads": 1,
        "rms_norm_eps": 1e-5,
        "rope_theta": 10000.0,
        "head_dim": 64,
        "vocab_size": 320,
    }
    eos = 4
    w = gguf.GGUFWriter(str(path), "llama")
    write_header(w, "llama", "kquants", cfg, eos, head_dim_key=True)
    h, f = cfg["hidden_size"], cfg["intermediate_size"]
    kv = cfg["num_key_value_heads"] * cfg["head_dim"]
    layout = [
        ("token_embd.weight", Q.Q8_0, 320, h),
        ("blk.0.attn_q.weight", Q.Q4_K, h, h),
        ("blk.0.attn_k.weight", Q.Q3_K, kv, h),
        ("blk.0.attn_v.weight", Q.Q6_K, kv, h),
        ("blk.0.attn_output.weight", Q.Q5_K, h, h),
        ("blk.0.ffn_gate.weight", Q.Q2_K, f, h),
        ("blk.0.ffn_up.weight", Q.Q4_K, f, h),
        ("blk.0.ffn_down.weight", Q.Q6_K, h, f),
        ("output.weight", Q.Q6_K, 320, h),
    ]
    types = {}
    for name, q, rows, cols in layout:
        if q == Q.Q8_0:
            data = gguf.quants.quantize(rng.normal(0, 0.3, size=(rows, cols)).astype(np.float32), q)
        else:
            data = kquant_blocks(q, rows, cols, rng)
        w.add_tensor(name, data, raw_dtype=q)
        types[name] = q.name.lower()
    for name in ["blk.0.attn_norm.weight", "blk.0.ffn_norm.weight", "output_norm.weight"]:
        w.add_tensor(name, rng.uniform(0.8, 1.2, size=h).astype(np.float32))
        types[name] = "f32"
    w.write_header_to_file()
    w.write_kv_data_to_file()
    w.write_tensors_to_file()
    w.close()
    return types, eos


# Gemma, Gemma2 and Phi-3 files, written as llama.cpp's converter (convert_hf_to_gguf.py) writes
# these families, with the gguf package's writer:
# - tensor names: gguf-py's `get_tensor_name_map(arch, n_layers)` (gguf 0.19 tensor_mapping.py),
#   the table the converter's `map_tensor_name` reads [src gguf; the converter's use of it from
#   memory]. Gemma2 names post_attention_layernorm `post_attention_norm`, pre_feedforward_layernorm
#   `ffn_norm` and post_feedforward_layernorm `post_ffw_norm`; Phi-3's fused `qkv_proj` and
#   `gate_up_proj` are `attn_qkv` and `ffn_up`, stored fused as the checkpoint holds them.
# - Gemma and Gemma2: 1 is added to every `*norm.weight` in the checkpoint's dtype before
#   writing (GemmaModel/Gemma2Model.modify_tensors, from memory: llama.cpp multiplies by the
#   stored weight where Gemma's RMSNorm multiplies by 1 + weight); the head is tied (no
#   output.weight). transformers' Gemma2TensorProcessor subtracts the 1 again on load.
# - metadata: GemmaModel.set_gguf_parameters (from memory): context_length, embedding_length,
#   block_count, feed_forward_length, head_count, head_count_kv, layer_norm_rms_epsilon,
#   key_length, value_length; Gemma2Model adds attn_logit_softcapping, final_logit_softcapping
#   and attention.sliding_window; Phi3MiniModel (from memory): context_length,
#   rope.scaling.original_context_length, embedding_length, feed_forward_length, block_count,
#   head_count, head_count_kv, layer_norm_rms_epsilon, rope.dimension_count (head size times
#   the rotary fraction), rope.freq_base, attention.sliding_window (0 when the config has none).
# - one-dimensional tensors stay f32 (the converter keeps vectors and norms in f32).
#
# What transformers 5.24.0 loads: gemma2 and phi3 are in its GGUF_CONFIG_MAPPING; gemma is not
# ("GGUF model with architecture gemma is not supported yet", checked below). For gemma the
# reference is therefore the gguf package's dequantised tensors with 1 subtracted from the norms
# (the same rule transformers applies to gemma2 and gemma3 files), loaded into
# GemmaForCausalLM built from the config the file was written from; the greedy tokens are that
# model's. For gemma2 and phi3 transformers loads the file itself, but reads neither the soft-caps
# nor query_pre_attn_scalar (Gemma2) nor the rotary fraction (Phi-3) from it: it takes the class
# defaults (50.0, 30.0, 256; 1.0). The fixture models are given those values, so that the file
# and transformers describe the same model (liftgate refuses a file whose keys contradict them).
FAMILY_ARCH = {"gemma": gguf.MODEL_ARCH.GEMMA, "gemma2": gguf.MODEL_ARCH.GEMMA2, "phi3": gguf.MODEL_ARCH.PHI3}


def family_model(family: str) -> tuple[dict, dict]:
    """The runner fixture `family` (torch tensors in their stored dtype) and its config, with the
    keys transformers cannot read from a GGUF file set to the values it uses instead."""
    d = RUNNER / family / "model"
    cfg = json.loads((d / "config.json").read_text())
    tensors = load_file(str(d / "model.safetensors"))
    if family == "gemma2":
        cfg.update(attn_logit_softcapping=50.0, final_logit_softcapping=30.0, query_pre_attn_scalar=256,
                   sliding_window=6)
    if family == "phi3":
        cfg["rope_parameters"] = {**cfg["rope_parameters"], "partial_rotary_factor": 1.0}
    return cfg, tensors


def write_family(path: Path, family: str, cfg: dict, tensors: dict, linear: Q, embed: Q, head: Q | None) -> dict:
    arch = FAMILY_ARCH[family]
    names = gguf.get_tensor_name_map(arch, cfg["num_hidden_layers"])
    w = gguf.GGUFWriter(str(path), family)
    w.add_name(f"tiny {family}")
    h, nh = cfg["hidden_size"], cfg["num_attention_heads"]
    head_dim = cfg.get("head_dim") or h // nh
    rp = cfg.get("rope_parameters") or {}
    w.add_context_length(cfg["max_position_embeddings"])
    w.add_embedding_length(h)
    w.add_block_count(cfg["num_hidden_layers"])
    w.add_feed_forward_length(cfg["intermediate_size"])
    w.add_head_count(nh)
    w.add_head_count_kv(cfg["num_key_value_heads"])
    w.add_layer_norm_rms_eps(cfg["rms_norm_eps"])
    if family in ("gemma", "gemma2"):
        w.add_key_length(head_dim)
        w.add_value_length(head_dim)
    if family == "gemma2":
        w.add_attn_logit_softcapping(cfg["attn_logit_softcapping"])
        w.add_final_logit_softcapping(cfg["final_logit_softcapping"])
        w.add_sliding_window(cfg["sliding_window"])
    if family == "phi3":
        w.add_rope_scaling_orig_ctx_len(cfg["original_max_position_embeddings"])
        w.add_rope_dimension_count(int(head_dim * rp.get("partial_rotary_factor", 1.0)))
        w.add_rope_freq_base(float(rp["rope_theta"]))
        w.add_sliding_window(cfg.get("sliding_window") or 0)
    w.add_vocab_size(cfg["vocab_size"])
    w.add_bos_token_id(cfg["bos_token_id"])
    w.add_eos_token_id(cfg["eos_token_id"])
    # The converter's SpecialVocab writes the tokenizer's padding id; transformers needs it for
    # Phi-3, whose class default (32000) lies outside a small vocabulary.
    w.add_pad_token_id(cfg["pad_token_id"])
    w.add_file_type(1)
    types = {}
    for name in sorted(tensors):
        t = tensors[name]
        if name == "lm_head.weight" and family != "phi3":
            continue
        if family != "phi3" and name.endswith("norm.weight"):
            t = t + 1  # in the checkpoint's dtype, as the converter does
        a = t.float().numpy()
        base, suffix = name.rsplit(".", 1)
        gname = f"{names.get_name(base)}.{suffix}"
        q = tensor_type(name, a.ndim, linear, embed, head)
        w.add_tensor(gname, quantised(a, q), raw_dtype=q if q not in (Q.F32, Q.F16) else None)
        types[gname] = q.name.lower()
    w.write_header_to_file()
    w.write_kv_data_to_file()
    w.write_tensors_to_file()
    w.close()
    return types


def first_step_logits(model) -> list:
    """The logits after the first prompt (7 significant digits): a check that does not depend on
    the tiny models' greedy continuations being varied (Gemma's tied, scaled embeddings make
    them repeat the last token)."""
    with torch.no_grad():
        out = model(torch.tensor([PROMPTS[0]])).logits[0, -1]
    return [float(f"{x:.7g}") for x in out.tolist()]


def greedy_runs(model, eos: int) -> list:
    runs = []
    for prompt in PROMPTS:
        ids = torch.tensor([prompt])
        with torch.no_grad():
            out = model.generate(ids, attention_mask=torch.ones_like(ids), do_sample=False, max_new_tokens=NEW_TOKENS,
                                 eos_token_id=eos, pad_token_id=eos, output_scores=True, return_dict_in_generate=True)
        margins = [float(torch.topk(s[0], 2).values[0] - torch.topk(s[0], 2).values[1]) for s in out.scores]
        runs.append({"prompt": prompt, "tokens": out.sequences[0][len(prompt):].tolist(), "margins": margins})
    return runs


def gemma_reference(path: Path, cfg: dict) -> dict:
    """transformers 5.24.0 cannot load a gemma GGUF file: the reference is the gguf package's
    dequantised tensors, norms minus 1, in GemmaForCausalLM with the file's config."""
    with tempfile.TemporaryDirectory() as tmp:
        shutil.copy(path, Path(tmp) / path.name)
        try:
            AutoModelForCausalLM.from_pretrained(tmp, gguf_file=path.name, dtype=torch.float32)
            raise SystemExit("transformers now loads gemma GGUF files: make it the reference")
        except ValueError as e:
            refusal = str(e)
    conf = transformers.GemmaConfig(**{k: v for k, v in cfg.items() if k not in ("architectures", "dtype", "transformers_version")})
    model = transformers.GemmaForCausalLM(conf).to(torch.float32).eval()
    model.config._attn_implementation = "eager"
    names = gguf.get_tensor_name_map(FAMILY_ARCH["gemma"], cfg["num_hidden_layers"])
    to_hf = {}
    for k in model.state_dict():
        base, suffix = k.rsplit(".", 1)
        g = names.get_name(base)
        if g is not None:
            to_hf[f"{g}.{suffix}"] = k
    state = {}
    for t in gguf.GGUFReader(str(path)).tensors:
        v = gguf.quants.dequantize(t.data, t.tensor_type)
        if "norm.weight" in t.name:
            v = v - 1  # as transformers' Gemma2TensorProcessor: the converter's +1 undone in f32
        state[to_hf[t.name]] = v
    missing = model.load_state_dict({k: torch.from_numpy(np.copy(v)) for k, v in state.items()}, strict=False)
    assert set(missing.missing_keys) <= {"lm_head.weight"} and not missing.unexpected_keys, missing
    model.tie_weights()
    return {
        "answers": [],
        "reference": "gguf.quants.dequantize, 1 subtracted from the norms, in GemmaForCausalLM (transformers "
                     f"{transformers.__version__} cannot load gemma GGUF files: {refusal})",
        "model_type": "gemma",
        "tie_word_embeddings": True,
        "tensors": {k: {"shape": list(v.shape), "sha256": sha(v)} for k, v in sorted(state.items())},
        "greedy": greedy_runs(model, cfg["eos_token_id"]),
        "first_step_logits": first_step_logits(model),
        "eos": cfg["eos_token_id"],
    }


def families(manifest: dict):
    plans = [
        ("gemma-q8_0", "gemma", Q.Q8_0, Q.Q8_0, None),
        ("gemma-q4_0", "gemma", Q.Q4_0, Q.F16, None),
        ("gemma2-q8_0", "gemma2", Q.Q8_0, Q.Q8_0, None),
        ("gemma2-q5_1", "gemma2", Q.Q5_1, Q.Q4_1, None),
        ("phi3-q8_0", "phi3", Q.Q8_0, Q.Q8_0, Q.Q8_0),
        ("phi3-q4_1", "phi3", Q.Q4_1, Q.Q5_0, Q.Q8_0),
    ]
    for name, family, lin, emb, head in plans:
        cfg, tensors = family_model(family)
        path = OUT / f"{name}.gguf"
        types = write_family(path, family, cfg, tensors, lin, emb, head)
        if family == "gemma":
            ref = gemma_reference(path, cfg)
        else:
            # Chat answers through `answer --gguf` for one file of each family transformers loads.
            chat_dir = RUNNER / family / "model" if name.endswith("q8_0") else None
            ref, state, model = reference(path, cfg["eos_token_id"], chat_dir, keep_model=True)
            ref["first_step_logits"] = first_step_logits(model)
            ref["reference"] = f"transformers {transformers.__version__} from_pretrained(gguf_file=...)"
            if family == "gemma2":
                # transformers subtracts the converter's 1 in f32 after dequantising.
                r = gguf.GGUFReader(str(path))
                v = next(gguf.quants.dequantize(t.data, t.tensor_type) for t in r.tensors if t.name == "output_norm.weight")
                assert np.array_equal(state["model.norm.weight"], v - 1)
        ref["types"] = types
        ref["tokenizer_dir"] = f"tests/fixtures/runner/{family}/model"
        manifest["files"][f"{name}.gguf"] = ref
        print(name, path.stat().st_size, "bytes", ref["model_type"], file=sys.stderr)


QUESTIONS = ["When does the first ferry leave for Gull Island?", "Can I take my bicycle on the boat?"]
ANSWER_TOKENS = 8


def answers(model, tokenizer_dir: Path, eos: int) -> list:
    """Chat answers as `liftgate answer --gguf FILE --model DIR` gives them: the directory's
    tokenizer and template (apply_chat_template, add_generation_prompt, no system message),
    greedy, decoded with skip_special_tokens=True and stripped."""
    from transformers import AutoTokenizer

    tok = AutoTokenizer.from_pretrained(str(tokenizer_dir))
    out = []
    for q in QUESTIONS:
        ids = tok.apply_chat_template([{"role": "user", "content": q}], add_generation_prompt=True, return_dict=True, return_tensors="pt")["input_ids"]
        with torch.no_grad():
            g = model.generate(ids, attention_mask=torch.ones_like(ids), do_sample=False, max_new_tokens=ANSWER_TOKENS,
                               eos_token_id=eos, pad_token_id=eos, output_scores=True, return_dict_in_generate=True)
        new = g.sequences[0][ids.shape[1]:].tolist()
        margins = [float(torch.topk(sc[0], 2).values[0] - torch.topk(sc[0], 2).values[1]) for sc in g.scores]
        out.append({"question": q, "tokens": new, "answer": tok.decode(new, skip_special_tokens=True).strip(),
                    "min_margin": min(margins)})
    return out


def reference(path: Path, eos: int, tokenizer_dir: Path | None = None, keep_model: bool = False):
    """transformers' tensors and greedy continuations for one GGUF file."""
    with tempfile.TemporaryDirectory() as tmp:
        shutil.copy(path, Path(tmp) / path.name)
        model = AutoModelForCausalLM.from_pretrained(
            tmp, gguf_file=path.name, dtype=torch.float32, attn_implementation="eager"
        )
    model.eval()
    state = {k: v.detach().numpy() for k, v in model.state_dict().items()}
    if model.config.tie_word_embeddings:
        state.pop("lm_head.weight", None)
    runs = []
    for prompt in PROMPTS:
        ids = torch.tensor([prompt])
        with torch.no_grad():
            out = model.generate(
                ids,
                attention_mask=torch.ones_like(ids),
                do_sample=False,
                max_new_tokens=NEW_TOKENS,
                eos_token_id=eos,
                pad_token_id=eos,
                output_scores=True,
                return_dict_in_generate=True,
            )
        margins = []
        for s in out.scores:
            top = torch.topk(s[0], 2).values
            margins.append(float(top[0] - top[1]))
        runs.append({"prompt": prompt, "tokens": out.sequences[0][len(prompt):].tolist(), "margins": margins})
    chat = answers(model, tokenizer_dir, eos) if tokenizer_dir is not None else []
    return ({
        "answers": chat,
        "model_type": model.config.model_type,
        "tie_word_embeddings": bool(model.config.tie_word_embeddings),
        "tensors": {k: {"shape": list(v.shape), "sha256": sha(v)} for k, v in sorted(state.items())},
        "greedy": runs,
        "eos": eos,
    }, state) + ((model,) if keep_model else ())


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    for old in OUT.glob("*.gguf"):
        old.unlink()
    manifest = {
        "source": f"transformers {transformers.__version__}, gguf {gguf.__version__ if hasattr(gguf, '__version__') else '0.19'}, torch {torch.__version__}, numpy {np.__version__}",
        "min_margin_rule": "greedy tokens are compared up to the first step whose reference top-1/top-2 logit margin is below 1e-3",
        "files": {},
    }
    plans = [
        ("llama-q8_0", "llama", "llama", "tiny llama", Q.Q8_0, Q.Q8_0, Q.F16),
        ("llama-q4_0-tied", "llama", "llama", "tiny llama", Q.Q4_0, Q.Q8_0, None),
        ("mistral-q5_0", "mistral", "llama", "tiny mistral", Q.Q5_0, Q.Q4_0, Q.Q8_0),
        ("qwen2-q5_1", "qwen2", "qwen2", "tiny qwen2", Q.Q5_1, Q.Q8_0, Q.Q5_0),
        ("qwen2-q4_1-tied", "qwen2", "qwen2", "tiny qwen2", Q.Q4_1, Q.Q4_1, None),
    ]
    for name, family, arch, gname, lin, emb, head in plans:
        cfg, eos, tensors, how = from_runner(family, arch, gname, lin, emb, head)
        path = OUT / f"{name}.gguf"
        types = write_model(path, cfg, eos, tensors, how)
        ref, state = reference(path, eos, RUNNER / family / "model")
        # The permutation pair: the blocks run along a row and the permutation moves whole
        # rows, so they commute: transformers' q/k must equal the original's own quantisation.
        for k, v in tensors.items():
            if k in state and v.ndim == 2 and ("q_proj" in k or "k_proj" in k):
                back = gguf.quants.dequantize(quantised(v.astype(np.float32), lin), lin)
                assert np.array_equal(state[k], back), k
        ref["types"] = types
        ref["tokenizer_dir"] = f"tests/fixtures/runner/{family}/model"
        manifest["files"][f"{name}.gguf"] = ref
        print(name, path.stat().st_size, "bytes", ref["model_type"], file=sys.stderr)
    # Qwen3: transformers reads no head_dim from a GGUF file, so it takes the class default
    # (128); the model is made with that head size.
    torch.manual_seed(3)
    qcfg = transformers.Qwen3Config(
        vocab_size=322, hidden_size=64, intermediate_size=128, num_hidden_layers=2,
        num_attention_heads=2, num_key_value_heads=1, head_dim=128, max_position_embeddings=256,
        rms_norm_eps=1e-6, rope_theta=1000000.0, tie_word_embeddings=False, eos_token_id=4,
    )
    qmodel = transformers.Qwen3ForCausalLM(qcfg).eval()
    with torch.no_grad():
        for n, p in qmodel.named_parameters():
            if n.endswith("norm.weight"):
                p.uniform_(0.7, 1.3)
            else:
                p.normal_(0, 0.2)
    tensors = {k: v.detach().numpy().copy() for k, v in qmodel.state_dict().items()}
    cfg = {**qcfg.to_dict(), "rope_theta": 1000000.0}
    path = OUT / "qwen3-q8_0.gguf"
    types = write_model(path, cfg, 4, tensors, ("qwen3", "tiny qwen3", Q.Q8_0, Q.Q8_0, Q.Q8_0))
    ref, _ = reference(path, 4, RUNNER / "qwen3" / "model")
    ref["types"] = types
    ref["tokenizer_dir"] = "tests/fixtures/runner/qwen3/model"
    manifest["files"]["qwen3-q8_0.gguf"] = ref
    print("qwen3", path.stat().st_size, "bytes", ref["model_type"], file=sys.stderr)

    families(manifest)

    path = OUT / "kquants.gguf"
    types, eos = write_kquants(path)
    ref, _ = reference(path, eos)
    ref["types"] = types
    ref["tokenizer_dir"] = "tests/fixtures/runner/llama/model"
    manifest["files"]["kquants.gguf"] = ref
    print("kquants", path.stat().st_size, "bytes", file=sys.stderr)

    # One tensor of every supported type, dequantised by the gguf package itself.
    rng = np.random.default_rng(9)
    path = OUT / "tensors.gguf"
    w = gguf.GGUFWriter(str(path), "llama")
    plain = {}
    for q in [Q.F32, Q.F16, Q.BF16, Q.Q4_0, Q.Q4_1, Q.Q5_0, Q.Q5_1, Q.Q8_0,
              Q.Q2_K, Q.Q3_K, Q.Q4_K, Q.Q5_K, Q.Q6_K]:
        if q in (Q.Q2_K, Q.Q3_K, Q.Q4_K, Q.Q5_K, Q.Q6_K):
            data = kquant_blocks(q, 4, 512, rng)
        else:
            data = quantised(rng.normal(0, 0.5, size=(4, 512)).astype(np.float32), q)
        w.add_tensor(q.name.lower(), data, raw_dtype=q if q not in (Q.F32, Q.F16) else None)
    w.write_header_to_file()
    w.write_kv_data_to_file()
    w.write_tensors_to_file()
    w.close()
    reader = gguf.GGUFReader(str(path))
    for t in reader.tensors:
        v = gguf.quants.dequantize(t.data, t.tensor_type)
        plain[t.name] = {"type": t.tensor_type.name.lower(), "shape": list(v.shape), "sha256": sha(v)}
    manifest["tensors.gguf"] = plain
    (OUT / "manifest.json").write_text(json.dumps(manifest, indent=1) + "\n")


if __name__ == "__main__":
    main()
