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
        if t.ndim == 1:
            q = Q.F32
        elif name == "model.embed_tokens.weight":
            q = embed
        elif name == "lm_head.weight":
            q = head
        else:
            q = linear
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


def reference(path: Path, eos: int, tokenizer_dir: Path | None = None) -> dict:
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
    return {
        "answers": chat,
        "model_type": model.config.model_type,
        "tie_word_embeddings": bool(model.config.tie_word_embeddings),
        "tensors": {k: {"shape": list(v.shape), "sha256": sha(v)} for k, v in sorted(state.items())},
        "greedy": runs,
        "eos": eos,
    }, state


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
