"""RoPE inverse frequencies and attention scaling for every rope_type liftgate supports, as
transformers 5.24.0 computes them (`modeling_rope_utils.ROPE_INIT_FUNCTIONS` and the default
rule of `LlamaRotaryEmbedding`), written to tests/fixtures/rope/cases.json.

Each case stores the config.json dict given to transformers, the seq_len of the forward call
(max(position_ids) + 1), and the resulting inv_freq (f32) and attention_scaling.

Run: python tests/reference/make_rope_fixtures.py   (requirements.txt in this directory)
"""

import json
import pathlib

import torch
import transformers
from transformers import LlamaConfig, Phi3Config
from transformers.modeling_rope_utils import ROPE_INIT_FUNCTIONS
from transformers.models.llama.modeling_llama import LlamaRotaryEmbedding

OUT = pathlib.Path(__file__).resolve().parent.parent / "fixtures" / "rope" / "cases.json"

BASE = {
    "hidden_size": 256,
    "num_attention_heads": 4,
    "num_key_value_heads": 4,
    "num_hidden_layers": 1,
    "intermediate_size": 64,
    "vocab_size": 32,
    "max_position_embeddings": 512,
}


def llama(extra):
    return {"model_type": "llama", "architectures": ["LlamaForCausalLM"], **BASE, **extra}


def phi3(extra):
    return {"model_type": "phi3", "architectures": ["Phi3ForCausalLM"], **BASE, **extra}


CASES = [
    ("default", llama({"rope_theta": 10000.0}), [10]),
    ("default v5 rope_parameters", llama({"rope_parameters": {"rope_type": "default", "rope_theta": 500000.0}}), [10]),
    ("linear legacy type key", llama({"rope_theta": 10000.0, "rope_scaling": {"type": "linear", "factor": 4.0}}), [10]),
    ("dynamic below and above max_pos", llama({"rope_theta": 10000.0, "rope_scaling": {"rope_type": "dynamic", "factor": 2.0}}), [100, 700, 2000]),
    ("llama3", llama({"rope_parameters": {"rope_type": "llama3", "rope_theta": 500000.0, "factor": 8.0, "low_freq_factor": 1.0, "high_freq_factor": 4.0, "original_max_position_embeddings": 128}}), [10]),
    ("yarn", llama({"rope_parameters": {"rope_type": "yarn", "rope_theta": 10000.0, "factor": 4.0, "original_max_position_embeddings": 128}}), [10]),
    ("yarn no truncate, betas, attention_factor", llama({"rope_parameters": {"rope_type": "yarn", "rope_theta": 10000.0, "factor": 8.0, "original_max_position_embeddings": 64, "beta_fast": 16, "beta_slow": 2, "truncate": False, "attention_factor": 0.9}}), [10]),
    ("yarn mscale", llama({"rope_parameters": {"rope_type": "yarn", "rope_theta": 10000.0, "factor": 4.0, "original_max_position_embeddings": 128, "mscale": 0.707, "mscale_all_dim": 1.0}}), [10]),
    ("phi3 longrope short and long", phi3({"rope_theta": 10000.0, "original_max_position_embeddings": 64, "partial_rotary_factor": 0.5,
        "rope_scaling": {"type": "longrope", "short_factor": [1.0 + 0.1 * i for i in range(16)], "long_factor": [2.0 + 0.5 * i for i in range(16)]}}), [10, 64, 65, 300]),
]


def main():
    cases = []
    for name, cfg_dict, seq_lens in CASES:
        cls = Phi3Config if cfg_dict["model_type"] == "phi3" else LlamaConfig
        cfg = cls(**{k: v for k, v in cfg_dict.items() if k not in ("model_type", "architectures")})
        rope_type = cfg.rope_parameters["rope_type"]
        for seq_len in seq_lens:
            if rope_type == "default":
                rot = LlamaRotaryEmbedding(cfg)
                inv, scale = rot.inv_freq, rot.attention_scaling
            else:
                inv, scale = ROPE_INIT_FUNCTIONS[rope_type](cfg, "cpu", seq_len=seq_len)
            cases.append({
                "name": name,
                "config": cfg_dict,
                "seq_len": seq_len,
                "rope_type": rope_type,
                "inv_freq": [float(x) for x in inv.to(torch.float32).tolist()],
                "attention_scaling": float(scale),
            })
    OUT.parent.mkdir(parents=True, exist_ok=True)
    doc = {
        "generator": "tests/reference/make_rope_fixtures.py",
        "versions": {"transformers": transformers.__version__, "torch": torch.__version__},
        "cases": cases,
    }
    OUT.write_text(json.dumps(doc, indent=1) + "\n")
    print(f"wrote {len(cases)} cases to {OUT}")


if __name__ == "__main__":
    main()
