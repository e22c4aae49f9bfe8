"""Writes the seeded random-init 0.5B-class model of the GGUF speed benchmark (bench/gguf.sh) in
six forms: a checkpoint directory in f32 and one in bf16 (the same values: each is a bf16
value), and GGUF v3 exports of it in q8_0, q4_k, a q4_k_m-like mix and a q3_k_m-like mix.

    python bench/make_gguf_checkpoints.py OUT_DIR     # ~3.6 GB in all, about a minute

Needs numpy and the `gguf` package (PyPI; bench/gguf.sh makes a venv with both). Shape: 0.5B-class in the
Llama layout (no q/k/v biases): hidden 1024, 24 layers, 16 heads, 4 key/value heads,
intermediate 4096, vocabulary 32768, tied embedding; 399M parameters. Every matrix has a
multiple of 256 inputs, as q4_k needs (the 896 of bench/throughput.sh's Qwen2 shape is not:
llama.cpp would store those matrices in another type).
The tokenizer, chat template and generation config are the bundled demo model's, as in
bench/make_random_checkpoint.py.

The GGUF files use the llama architecture as llama.cpp's converter writes it (tensor names,
q/k rows permuted; the conventions tests/reference/make_gguf_fixtures.py checks against
transformers). q8_0: every matrix quantised with `gguf.quants.quantize`. q4_k: gguf 0.19 has no
quantiser for the k-quants, so the linear layers are seeded random q4_k blocks (random codes,
f16 scales giving weights of about the checkpoint's size), as the k-quant fixture does; the
speed of a product does not depend on the values. q4_k_m: as q4_k, but attn_v and ffn_down
are seeded random q6_k blocks in the layers where llama.cpp's Q4_K_M keeps them in q6_k (12 of
24), so a product meets q6_k panels as in a real Q4_K_M export. q3_k_m: like, not equal to, a
Q3_K_M export: attn_q, attn_k, ffn_gate and ffn_up are seeded random q3_k blocks, attn_output
q4_k, attn_v q5_k in the first two layers and q4_k after, ffn_down q5_k in the first
sixteenth of the layers (layer 0 here) and q4_k after (llama-quant.cpp's choices for
LLAMA_FTYPE_MOSTLY_Q3_K_M on a llama model, from memory; a real export also stores the output
head, here tied, in q6_k and may differ in other details). The token embedding is q8_0 in
every file (liftgate dequantises the embedding and the tied head to f32 at load).
"""

import argparse
import json
import shutil
import struct
from pathlib import Path

import gguf
import numpy as np
from gguf import GGMLQuantizationType as Q

S = dict(hidden=1024, layers=24, heads=16, kv_heads=4, inter=4096, vocab=32768)


def tensors():
    h, d = S["hidden"], S["hidden"] // S["heads"]
    kv = S["kv_heads"] * d
    yield "model.embed_tokens.weight", "token_embd.weight", (S["vocab"], h)
    for i in range(S["layers"]):
        p, g = f"model.layers.{i}.", f"blk.{i}."
        yield p + "input_layernorm.weight", g + "attn_norm.weight", (h,)
        yield p + "post_attention_layernorm.weight", g + "ffn_norm.weight", (h,)
        yield p + "self_attn.q_proj.weight", g + "attn_q.weight", (h, h)
        yield p + "self_attn.k_proj.weight", g + "attn_k.weight", (kv, h)
        yield p + "self_attn.v_proj.weight", g + "attn_v.weight", (kv, h)
        yield p + "self_attn.o_proj.weight", g + "attn_output.weight", (h, h)
        yield p + "mlp.gate_proj.weight", g + "ffn_gate.weight", (S["inter"], h)
        yield p + "mlp.up_proj.weight", g + "ffn_up.weight", (S["inter"], h)
        yield p + "mlp.down_proj.weight", g + "ffn_down.weight", (h, S["inter"])
    yield "model.norm.weight", "output_norm.weight", (h,)


def values(rng, name, shape):
    """Normal * 0.02 truncated to bf16 (norms: ones), as f32."""
    if name.endswith("norm.weight"):
        return np.ones(shape, np.float32)
    v = rng.standard_normal(int(np.prod(shape)), np.float32) * 0.02
    return ((v.view(np.uint32) >> 16) << 16).view(np.float32).reshape(shape)


def permute(w, n_head):
    """llama.cpp's `LlamaModel.permute` of q/k rows (from memory; the fixture script checks it)."""
    return w.reshape(n_head, 2, w.shape[0] // n_head // 2, *w.shape[1:]).swapaxes(1, 2).reshape(w.shape)


def k_blocks(t, rows, cols, rng):
    """Seeded random blocks of the k-quant type t (q3_k, q4_k, q5_k or q6_k): random codes,
    high-bit masks and packed 6-bit scales, then the fields that need sizes of their own: the
    f16 d (and dmin), around values giving weights of about the checkpoint's size, and q6_k's
    8-bit scales in -32..31."""
    block, size = gguf.GGML_QUANT_SIZES[t]
    n = rows * cols // block
    b = rng.integers(0, 256, size=(n, size), dtype=np.uint8)

    def f16(base):
        """n f16 values between 0.5 and 1.5 times base, as their bytes."""
        return (base * rng.uniform(0.5, 1.5, size=n)).astype(np.float16).view(np.uint8).reshape(n, 2)

    if t == Q.Q4_K:
        b[:, 0:2], b[:, 2:4] = f16(0.06 / 945), f16(0.03 / 63)
    elif t == Q.Q5_K:
        b[:, 0:2], b[:, 2:4] = f16(0.06 / 1953), f16(0.03 / 63)
    elif t == Q.Q6_K:
        b[:, 192:208] = rng.integers(-32, 32, size=(n, 16), dtype=np.int8).view(np.uint8)
        b[:, 208:210] = f16(0.02 / 32 / 16)
    elif t == Q.Q3_K:
        b[:, 108:110] = f16(0.02 / 32 / 4)
    else:
        raise ValueError(f"not a k-quant type written here: {t!r}")
    return b.reshape(rows, cols // block * size)


def q3k_m_type(name: str, layer: int):
    """The type of a linear layer's matrix in the q3_k_m-like mix (see the module docstring)."""
    n = S["layers"]
    if name.endswith("attn_v.weight"):
        return Q.Q5_K if layer < 2 else Q.Q4_K
    if name.endswith("ffn_down.weight"):
        return Q.Q5_K if layer < n // 16 else Q.Q4_K
    if name.endswith("attn_output.weight"):
        return Q.Q4_K
    return Q.Q3_K


def more_bits(layer: int) -> bool:
    """The layers whose attn_v and ffn_down llama.cpp's Q4_K_M keeps in q6_k (`use_more_bits` in
    llama-quant.cpp, from memory: the first and last eighth and every third layer between)."""
    n = S["layers"]
    return layer < n // 8 or layer >= 7 * n // 8 or (layer - n // 8) % 3 == 2


def write_dir(out: Path, layout, dtype: str):
    demo = Path(__file__).resolve().parent.parent / "demo" / "models" / "base"
    out.mkdir(parents=True, exist_ok=True)
    for f in ["tokenizer.json", "tokenizer_config.json", "chat_template.jinja", "generation_config.json"]:
        shutil.copy(demo / f, out / f)
    config = json.loads((demo / "config.json").read_text())
    config.update(
        hidden_size=S["hidden"], num_hidden_layers=S["layers"], num_attention_heads=S["heads"],
        num_key_value_heads=S["kv_heads"], head_dim=S["hidden"] // S["heads"],
        intermediate_size=S["inter"], vocab_size=S["vocab"], tie_word_embeddings=True,
        dtype={"F32": "float32", "BF16": "bfloat16"}[dtype], max_position_embeddings=2048,
    )
    (out / "config.json").write_text(json.dumps(config, indent=2))
    width = {"F32": 4, "BF16": 2}[dtype]
    header, offset = {}, 0
    for name, _, shape in layout:
        size = int(np.prod(shape)) * width
        header[name] = {"dtype": dtype, "shape": list(shape), "data_offsets": [offset, offset + size]}
        offset += size
    head = json.dumps(header, separators=(",", ":")).encode()
    head += b" " * (-len(head) % 8)
    f = open(out / "model.safetensors", "wb")
    f.write(struct.pack("<Q", len(head)))
    f.write(head)
    return f


def gguf_writer(path: Path, eos: int):
    w = gguf.GGUFWriter(str(path), "llama")
    w.add_name("random-05b")
    w.add_context_length(2048)
    w.add_embedding_length(S["hidden"])
    w.add_block_count(S["layers"])
    w.add_feed_forward_length(S["inter"])
    w.add_head_count(S["heads"])
    w.add_head_count_kv(S["kv_heads"])
    w.add_layer_norm_rms_eps(1e-6)
    w.add_rope_freq_base(10000.0)
    w.add_rope_dimension_count(S["hidden"] // S["heads"])
    w.add_vocab_size(S["vocab"])
    w.add_bos_token_id(0)
    w.add_eos_token_id(eos)
    w.add_file_type(1)
    return w


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("out", type=Path)
    ap.add_argument("--seed", type=int, default=7)
    a = ap.parse_args()
    layout = list(tensors())
    demo = Path(__file__).resolve().parent.parent / "demo" / "models" / "base"
    eos = json.loads((demo / "config.json").read_text())["eos_token_id"]
    eos = eos[0] if isinstance(eos, list) else eos
    f32 = write_dir(a.out / "random-05b-f32", layout, "F32")
    b16 = write_dir(a.out / "random-05b-bf16", layout, "BF16")
    q8 = gguf_writer(a.out / "random-05b-q8_0.gguf.tmp", eos)
    q4 = gguf_writer(a.out / "random-05b-q4_k.gguf.tmp", eos)
    q4m = gguf_writer(a.out / "random-05b-q4_k_m.gguf.tmp", eos)
    q3m = gguf_writer(a.out / "random-05b-q3_k_m.gguf.tmp", eos)
    rng, codes = np.random.default_rng(a.seed), np.random.default_rng(a.seed + 1)
    h, d = S["hidden"], S["hidden"] // S["heads"]
    for hf, name, shape in layout:
        v = values(rng, hf, shape)
        f32.write(v.tobytes())
        b16.write((v.view(np.uint32) >> 16).astype(np.uint16).tobytes())
        if v.ndim == 1:
            for w in (q8, q4, q4m, q3m):
                w.add_tensor(name, v)
            continue
        if name.endswith("attn_q.weight"):
            v = permute(v, S["heads"])
        if name.endswith("attn_k.weight"):
            v = permute(v, S["kv_heads"])
        q = gguf.quants.quantize(v, Q.Q8_0)
        q8.add_tensor(name, q, raw_dtype=Q.Q8_0)
        if name == "token_embd.weight":
            q4.add_tensor(name, q, raw_dtype=Q.Q8_0)
            q4m.add_tensor(name, q, raw_dtype=Q.Q8_0)
            q3m.add_tensor(name, q, raw_dtype=Q.Q8_0)
            continue
        q4.add_tensor(name, k_blocks(Q.Q4_K, shape[0], shape[1], codes), raw_dtype=Q.Q4_K)
        layer = int(name.split(".")[1])
        if name.endswith(("attn_v.weight", "ffn_down.weight")) and more_bits(layer):
            q4m.add_tensor(name, k_blocks(Q.Q6_K, shape[0], shape[1], codes), raw_dtype=Q.Q6_K)
        else:
            q4m.add_tensor(name, k_blocks(Q.Q4_K, shape[0], shape[1], codes), raw_dtype=Q.Q4_K)
        t = q3k_m_type(name, layer)
        q3m.add_tensor(name, k_blocks(t, shape[0], shape[1], codes), raw_dtype=t)
    f32.close()
    b16.close()
    for w, t in [(q8, "q8_0"), (q4, "q4_k"), (q4m, "q4_k_m"), (q3m, "q3_k_m")]:
        w.write_header_to_file()
        w.write_kv_data_to_file()
        w.write_tensors_to_file()
        w.close()
        (a.out / f"random-05b-{t}.gguf.tmp").rename(a.out / f"random-05b-{t}.gguf")
    print(f"{a.out}: random-05b-{{f32,bf16}}/, random-05b-{{q8_0,q4_k,q4_k_m,q3_k_m}}.gguf (hidden {h}, head size {d})")


if __name__ == "__main__":
    main()
