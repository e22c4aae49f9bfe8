"""Writes a seeded random-init, Llama-shaped bf16 checkpoint for the memory benchmark.

Needs only numpy. The tokenizer, chat template and generation config are copied from the
bundled demo model (vocabulary of 2,002 tokens); the embedding and head rows past the
tokenizer's vocabulary are never produced by it, which changes nothing about memory or speed.

    python bench/make_random_checkpoint.py OUT_DIR --shape 1b     # ~1.5 GB, a quick look
    python bench/make_random_checkpoint.py OUT_DIR --shape 8b     # Llama-3-8B dimensions, ~16 GB
    python bench/make_random_checkpoint.py OUT_DIR --shape 1b --adapter ADAPTER_DIR --rank 16
                                       # also a random LoRA adapter (f32, every linear layer)

Generated files live outside git (bench/models is ignored) and should be removed when done.
The values are random normal * 0.02 rounded to bf16 by truncation; safetensors is written by
hand (an 8-byte header length, the JSON header, then the tensors in order), as the format's
specification describes, so no torch is needed.
"""

import argparse
import json
import shutil
import struct
from pathlib import Path

import numpy as np

# Llama-3-8B dimensions are from its published config.json (from memory: hidden 4096, 32
# layers, 32 heads, 8 key/value heads, intermediate 14336, vocabulary 128256, untied head).
SHAPES = {
    "1b": dict(hidden=2048, layers=16, heads=16, kv_heads=4, inter=5632, vocab=32000, tied=True),
    "8b": dict(hidden=4096, layers=32, heads=32, kv_heads=8, inter=14336, vocab=128256, tied=False),
}


def tensors(s):
    h, d = s["hidden"], s["hidden"] // s["heads"]
    kv = s["kv_heads"] * d
    yield "model.embed_tokens.weight", (s["vocab"], h)
    for i in range(s["layers"]):
        p = f"model.layers.{i}."
        yield p + "input_layernorm.weight", (h,)
        yield p + "post_attention_layernorm.weight", (h,)
        yield p + "self_attn.q_proj.weight", (h, h)
        yield p + "self_attn.k_proj.weight", (kv, h)
        yield p + "self_attn.v_proj.weight", (kv, h)
        yield p + "self_attn.o_proj.weight", (h, h)
        yield p + "mlp.gate_proj.weight", (s["inter"], h)
        yield p + "mlp.up_proj.weight", (s["inter"], h)
        yield p + "mlp.down_proj.weight", (h, s["inter"])
    yield "model.norm.weight", (h,)
    if not s["tied"]:
        yield "lm_head.weight", (s["vocab"], h)


def bf16_bytes(rng, shape, norm):
    n = int(np.prod(shape))
    out = bytearray()
    step = 1 << 24
    for start in range(0, n, step):
        m = min(step, n - start)
        v = np.ones(m, np.float32) if norm else (rng.standard_normal(m, np.float32) * 0.02)
        out += (v.view(np.uint32) >> 16).astype(np.uint16).tobytes()
    return out


def write_adapter(out, s, rank, rng):
    """A peft-layout LoRA adapter on every linear layer of the shape, f32, random A and B (B is
    not zero, so the adapter changes the outputs), alpha = 2 * rank."""
    out.mkdir(parents=True, exist_ok=True)
    h, d = s["hidden"], s["hidden"] // s["heads"]
    kv = s["kv_heads"] * d
    dims = {"self_attn.q_proj": (h, h), "self_attn.k_proj": (kv, h), "self_attn.v_proj": (kv, h),
            "self_attn.o_proj": (h, h), "mlp.gate_proj": (s["inter"], h),
            "mlp.up_proj": (s["inter"], h), "mlp.down_proj": (h, s["inter"])}
    layout = []
    for i in range(s["layers"]):
        for mod, (o, n) in dims.items():
            key = f"base_model.model.model.layers.{i}.{mod}"
            layout.append((key + ".lora_A.weight", (rank, n)))
            layout.append((key + ".lora_B.weight", (o, rank)))
    header, offset = {}, 0
    for name, shape in layout:
        size = int(np.prod(shape)) * 4
        header[name] = {"dtype": "F32", "shape": list(shape), "data_offsets": [offset, offset + size]}
        offset += size
    head = json.dumps(header, separators=(",", ":")).encode()
    head += b" " * (-len(head) % 8)
    with open(out / "adapter_model.safetensors", "wb") as f:
        f.write(struct.pack("<Q", len(head)))
        f.write(head)
        for name, shape in layout:
            f.write((rng.standard_normal(int(np.prod(shape)), np.float32) * 0.02).tobytes())
    config = {"peft_type": "LORA", "task_type": "CAUSAL_LM", "r": rank, "lora_alpha": 2 * rank,
              "target_modules": ["q_proj", "k_proj", "v_proj", "o_proj", "gate_proj", "up_proj", "down_proj"],
              "lora_dropout": 0.0, "bias": "none", "fan_in_fan_out": False, "use_rslora": False,
              "use_dora": False, "init_lora_weights": True, "modules_to_save": None}
    (out / "adapter_config.json").write_text(json.dumps(config, indent=2))
    print(f"{out}: rank-{rank} adapter, {offset / 2**20:.1f} MiB")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("out", type=Path)
    ap.add_argument("--shape", choices=sorted(SHAPES), default="1b")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--adapter", type=Path, help="also write a random LoRA adapter here")
    ap.add_argument("--rank", type=int, default=16)
    a = ap.parse_args()
    s = SHAPES[a.shape]
    if a.adapter:
        write_adapter(a.adapter, s, a.rank, np.random.default_rng(a.seed + 1))
        if (a.out / "model.safetensors").exists():
            return
    demo = Path(__file__).resolve().parent.parent / "demo" / "models" / "base"
    a.out.mkdir(parents=True, exist_ok=True)
    for f in ["tokenizer.json", "tokenizer_config.json", "chat_template.jinja", "generation_config.json"]:
        shutil.copy(demo / f, a.out / f)
    config = json.loads((demo / "config.json").read_text())
    config.update(
        hidden_size=s["hidden"], num_hidden_layers=s["layers"], num_attention_heads=s["heads"],
        num_key_value_heads=s["kv_heads"], head_dim=s["hidden"] // s["heads"],
        intermediate_size=s["inter"], vocab_size=s["vocab"], tie_word_embeddings=s["tied"],
        dtype="bfloat16", max_position_embeddings=2048,
    )
    (a.out / "config.json").write_text(json.dumps(config, indent=2))
    header, offset = {}, 0
    layout = list(tensors(s))
    for name, shape in layout:
        size = int(np.prod(shape)) * 2
        header[name] = {"dtype": "BF16", "shape": list(shape), "data_offsets": [offset, offset + size]}
        offset += size
    head = json.dumps(header, separators=(",", ":")).encode()
    head += b" " * (-len(head) % 8)
    rng = np.random.default_rng(a.seed)
    with open(a.out / "model.safetensors", "wb") as f:
        f.write(struct.pack("<Q", len(head)))
        f.write(head)
        for name, shape in layout:
            f.write(bf16_bytes(rng, shape, name.endswith("norm.weight")))
    print(f"{a.out}: {offset / 2**30:.2f} GiB of bf16 weights")


if __name__ == "__main__":
    main()
