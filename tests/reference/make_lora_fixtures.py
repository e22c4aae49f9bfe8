#!/usr/bin/env python3
"""Builds the LoRA merge fixtures under tests/fixtures/lora/.

Reference: peft 0.21.2 `PeftModel.from_pretrained(base, adapter_dir).merge_and_unload()` on
transformers 5.24.0 models, CPU, float32 (requirements in tests/reference/requirements.txt).

For every case the script
  1. builds a tiny seeded random model with transformers (hidden 32, 2 layers, vocab 48),
  2. wraps it with peft, overwrites every adapter tensor (lora_A/B, embedding A/B, lora biases,
     DoRA magnitudes, modules_to_save copies, trained biases) with seeded random values so that
     nothing is the zero init, and saves the adapter with `save_pretrained`,
  3. reloads a fresh copy of the base, loads the saved adapter from disk with
     `PeftModel.from_pretrained` and writes the tensors of the `merge_and_unload()` state dict
     that differ from the base (or are new) as merged.safetensors; the names left bit-identical
     to the base go to manifest.json as `unchanged`.

Bases are written as the loader would see them: f32, and without `lm_head.weight` when the
embeddings are tied (what `save_pretrained` does). A merged state dict whose `lm_head.weight`
still shares storage with the embeddings is written the same way.

Run from the repository root:
    .venv-ref/bin/python tests/reference/make_lora_fixtures.py
"""

import json
import shutil
import tempfile
from pathlib import Path

import peft
import torch
import transformers
from peft import LoraConfig, PeftModel, get_peft_model
from safetensors.torch import load_file, save_file
from transformers import LlamaConfig, LlamaForCausalLM, Phi3Config, Phi3ForCausalLM

OUT = Path(__file__).resolve().parent.parent / "fixtures" / "lora"

HIDDEN = 32
LAYERS = 2
VOCAB = 48
INTER = 48


def llama_config(hidden=HIDDEN, tied=False, bias=False):
    return LlamaConfig(
        vocab_size=VOCAB,
        hidden_size=hidden,
        intermediate_size=INTER,
        num_hidden_layers=LAYERS,
        num_attention_heads=4,
        num_key_value_heads=2,
        max_position_embeddings=64,
        tie_word_embeddings=tied,
        attention_bias=bias,
        mlp_bias=bias,
        bos_token_id=1,
        eos_token_id=2,
        pad_token_id=0,
    )


def phi3_config():
    return Phi3Config(
        vocab_size=VOCAB,
        hidden_size=HIDDEN,
        intermediate_size=INTER,
        num_hidden_layers=LAYERS,
        num_attention_heads=4,
        num_key_value_heads=2,
        max_position_embeddings=64,
        original_max_position_embeddings=64,
        tie_word_embeddings=False,
        bos_token_id=1,
        eos_token_id=2,
        pad_token_id=0,
    )


BASES = {
    "llama": (LlamaForCausalLM, lambda: llama_config(), 11),
    "llama_bias": (LlamaForCausalLM, lambda: llama_config(bias=True), 12),
    "llama_tied": (LlamaForCausalLM, lambda: llama_config(tied=True), 13),
    "phi3": (Phi3ForCausalLM, phi3_config, 14),
    # Only used to make the "adapter for another base" negative case; not written out.
    "llama_h48": (LlamaForCausalLM, lambda: llama_config(hidden=48), 15),
}


def build_base(name):
    cls, make_config, seed = BASES[name]
    torch.manual_seed(seed)
    model = cls(make_config()).to(torch.float32).eval()
    # Random biases so that bias updates are visible (transformers zero-inits them).
    gen = torch.Generator().manual_seed(seed + 1000)
    with torch.no_grad():
        for pname, p in model.named_parameters():
            if pname.endswith(".bias"):
                p.copy_(torch.randn(p.shape, generator=gen) * 0.02)
    return model


def is_tied(model):
    return model.lm_head.weight.data_ptr() == model.model.embed_tokens.weight.data_ptr()


def state_dict_for_disk(model):
    """The state dict as save_pretrained writes it: lm_head omitted when tied to the embeddings."""
    sd = model.state_dict()
    out = {}
    emb = sd["model.embed_tokens.weight"]
    for k, v in sd.items():
        if k == "lm_head.weight" and v.data_ptr() == emb.data_ptr():
            continue
        out[k] = v.detach().to(torch.float32).contiguous().clone()
    return out


def randomize_adapter(model, seed):
    """Seeded non-zero values for every trainable adapter tensor."""
    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for name, p in model.named_parameters():
            if not p.requires_grad:
                continue
            if "lora_magnitude_vector" in name:
                p.mul_(1.0 + 0.1 * torch.randn(p.shape, generator=gen))
            elif "lora_" in name:
                p.copy_(torch.randn(p.shape, generator=gen) * 0.2)
            else:
                # modules_to_save copies and trained biases (bias="all"/"lora_only")
                p.add_(torch.randn(p.shape, generator=gen) * 0.05)


# Each case: base, LoraConfig kwargs, and optional post-save edits.
CASES = [
    {
        "name": "llama_qv",
        "about": "q_proj/v_proj list targets, r=4, alpha=8",
        "base": "llama",
        "lora": dict(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
    },
    {
        "name": "llama_regex",
        "about": "regex-string target (re.fullmatch), r=4, alpha=16",
        "base": "llama",
        "lora": dict(
            r=4,
            lora_alpha=16,
            target_modules=r".*\.layers\.1\.self_attn\.(q|k|o)_proj|.*\.0\.mlp\.up_proj",
        ),
    },
    {
        "name": "llama_all_linear_patterns",
        "about": "all-linear with rank_pattern and alpha_pattern (first key in file order wins)",
        "base": "llama",
        "lora": dict(
            r=4,
            lora_alpha=8,
            target_modules="all-linear",
            rank_pattern={r"layers\.1\.mlp\.down_proj": 6, r"mlp\.down_proj": 2, "o_proj": 3},
            alpha_pattern={r"model\.layers\.0\.self_attn\.q_proj": 20, "q_proj": 5, "up_proj": 2},
        ),
        # peft writes the config with sorted keys; put the general pattern first in the file so
        # that file order (what peft's get_pattern_key honours on load) differs from sorted order:
        # layer 0's q_proj then takes alpha 5, not 20.
        "config_edit": {
            "alpha_pattern": {"q_proj": 5, r"model\.layers\.0\.self_attn\.q_proj": 20, "up_proj": 2}
        },
    },
    {
        "name": "llama_rslora",
        "about": "use_rslora (alpha/sqrt(r)), q/k/v/o, r=8, alpha=4, with rank_pattern",
        "base": "llama",
        "lora": dict(
            r=8,
            lora_alpha=4,
            use_rslora=True,
            target_modules=["q_proj", "k_proj", "v_proj", "o_proj"],
            rank_pattern={"k_proj": 2},
        ),
    },
    {
        "name": "llama_layers",
        "about": "layers_to_transform=[1] with layers_pattern=layers, gate/down",
        "base": "llama",
        "lora": dict(
            r=4,
            lora_alpha=8,
            target_modules=["gate_proj", "down_proj"],
            layers_to_transform=[1],
            layers_pattern="layers",
        ),
    },
    {
        "name": "llama_exclude",
        "about": "all-linear with exclude_modules (list)",
        "base": "llama",
        "lora": dict(
            r=4,
            lora_alpha=8,
            target_modules="all-linear",
            exclude_modules=["down_proj", "model.layers.1.self_attn.k_proj"],
        ),
    },
    {
        "name": "llama_exclude_regex",
        "about": "list targets with exclude_modules as a regex string",
        "base": "llama",
        "lora": dict(
            r=4,
            lora_alpha=8,
            target_modules=["q_proj", "k_proj", "up_proj"],
            exclude_modules=r".*\.layers\.0\.self_attn\..*",
        ),
    },
    {
        "name": "llama_bf16_default_targets",
        "about": "adapter tensors stored in bf16; target_modules null (default q_proj,v_proj)",
        "base": "llama",
        "lora": dict(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
        "adapter_dtype": "bf16",
        "config_edit": {"target_modules": None},
    },
    {
        "name": "llama_f16_lm_head",
        "about": "adapter tensors stored in f16; LoRA on lm_head and o_proj of an untied model",
        "base": "llama",
        "lora": dict(r=2, lora_alpha=3, target_modules=["lm_head", "o_proj"]),
        "adapter_dtype": "f16",
    },
    {
        "name": "llama_embed",
        "about": "embed_tokens target (lora_embedding_A/B) on an untied model, plus q_proj",
        "base": "llama",
        "lora": dict(r=4, lora_alpha=8, target_modules=["embed_tokens", "q_proj"]),
    },
    {
        "name": "bias_lora_bias",
        "about": "lora_bias=True (lora_B.bias) on a base with attention/MLP biases",
        "base": "llama_bias",
        "lora": dict(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj", "up_proj"], lora_bias=True),
    },
    {
        "name": "bias_all",
        "about": 'bias="all": every base bias trained and saved (wrapped and unwrapped modules)',
        "base": "llama_bias",
        "lora": dict(r=4, lora_alpha=8, target_modules=["q_proj", "k_proj"], bias="all"),
    },
    {
        "name": "bias_lora_only",
        "about": 'bias="lora_only": biases of the LoRA-wrapped modules trained and saved',
        "base": "llama_bias",
        "lora": dict(r=4, lora_alpha=8, target_modules=["v_proj", "o_proj"], bias="lora_only"),
    },
    {
        "name": "dora",
        "about": "DoRA (use_dora) on Linear q/v/down and on embed_tokens",
        "base": "llama",
        "lora": dict(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj", "down_proj", "embed_tokens"], use_dora=True),
    },
    {
        "name": "phi3_fused",
        "about": "Phi-3 fused qkv_proj and gate_up_proj plus o_proj/down_proj",
        "base": "phi3",
        "lora": dict(r=4, lora_alpha=8, target_modules=["qkv_proj", "gate_up_proj", "o_proj", "down_proj"]),
    },
    {
        "name": "tied_modules_to_save",
        "about": "tied Llama, q/v LoRA plus modules_to_save lm_head (unties the head)",
        "base": "llama_tied",
        "lora": dict(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"], modules_to_save=["lm_head"]),
    },
    {
        "name": "tied_embed_lm_head",
        "about": "tied Llama, LoRA on embed_tokens and on lm_head (both merge into the shared tensor)",
        "base": "llama_tied",
        "lora": dict(r=4, lora_alpha=8, target_modules=["embed_tokens", "lm_head"]),
    },
]

NEGATIVE = [
    {
        "name": "neg_other_hidden",
        "about": "q/v adapter made for a Llama with hidden size 48, applied to the hidden-32 base",
        "base": "llama",
        "made_on": "llama_h48",
        "lora": dict(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
        "expect": ["adapter_model.safetensors", "model.layers.0.self_attn.q_proj", "[4, 48]", "[32, 32]"],
    },
    {
        "name": "neg_missing_target",
        "about": "config targets `query_key_value`, which no module of the Llama base has",
        "base": "llama",
        "made_on": "llama",
        "lora": dict(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
        "config_edit": {"target_modules": ["q_proj", "query_key_value", "v_proj"]},
        "expect": ["adapter_config.json", "target_modules", "query_key_value"],
    },
]


def make_adapter(case, out_dir, seed):
    base = build_base(case.get("made_on", case["base"]))
    cfg = LoraConfig(task_type="CAUSAL_LM", lora_dropout=0.0, **case["lora"])
    model = get_peft_model(base, cfg)
    randomize_adapter(model, seed)
    with tempfile.TemporaryDirectory() as tmp:
        model.save_pretrained(tmp)
        out_dir.mkdir(parents=True, exist_ok=True)
        shutil.copy(Path(tmp) / "adapter_config.json", out_dir / "adapter_config.json")
        tensors = load_file(str(Path(tmp) / "adapter_model.safetensors"))
    dtype = {"bf16": torch.bfloat16, "f16": torch.float16}.get(case.get("adapter_dtype"))
    if dtype is not None:
        tensors = {k: v.to(dtype) for k, v in tensors.items()}
    save_file(tensors, str(out_dir / "adapter_model.safetensors"), metadata={"format": "pt"})
    # peft stores target_modules/exclude_modules as Python sets, whose order depends on string
    # hashing; sort them so that the fixtures are reproducible (order does not matter to peft).
    path = out_dir / "adapter_config.json"
    conf = json.loads(path.read_text())
    for key in ("target_modules", "exclude_modules"):
        if isinstance(conf.get(key), list):
            conf[key] = sorted(conf[key])
    conf.update(case.get("config_edit", {}))
    path.write_text(json.dumps(conf, indent=2) + "\n")


def reference_merge(case, adapter_dir):
    base = build_base(case["base"])
    model = PeftModel.from_pretrained(base, str(adapter_dir))
    merged = model.merge_and_unload()
    return state_dict_for_disk(merged)


def main():
    if OUT.exists():
        shutil.rmtree(OUT)
    (OUT / "bases").mkdir(parents=True)
    manifest = {
        "source": f"peft {peft.__version__} merge_and_unload, transformers {transformers.__version__}, "
        f"torch {torch.__version__.split('+')[0]}, float32 on CPU",
        "bases": {},
        "cases": [],
        "negative": [],
    }
    for name in ["llama", "llama_bias", "llama_tied", "phi3"]:
        model = build_base(name)
        save_file(state_dict_for_disk(model), str(OUT / "bases" / f"{name}.safetensors"), metadata={"format": "pt"})
        manifest["bases"][name] = {"file": f"bases/{name}.safetensors", "tied": is_tied(model)}

    for i, case in enumerate(CASES):
        d = OUT / "cases" / case["name"]
        make_adapter(case, d, seed=100 + i)
        merged = reference_merge(case, d)
        base_sd = load_file(str(OUT / "bases" / f"{case['base']}.safetensors"))
        # Keep the fixtures small: merged.safetensors holds the tensors the merge changed or
        # added; the names it left bit-identical to the base are listed in the manifest.
        unchanged = sorted(k for k, v in merged.items() if k in base_sd and torch.equal(v, base_sd[k]))
        removed = sorted(k for k in base_sd if k not in merged)
        assert not removed, f"{case['name']}: merge dropped {removed}"
        changed = {k: v for k, v in merged.items() if k not in unchanged}
        save_file(changed, str(d / "merged.safetensors"), metadata={"format": "pt"})
        adapter = load_file(str(d / "adapter_model.safetensors"))
        lora_modules = sorted(
            {
                k.removeprefix("base_model.model.").rsplit(".lora_", 1)[0]
                for k in adapter
                if ".lora_" in k
            }
        )
        manifest["cases"].append(
            {
                "name": case["name"],
                "about": case["about"],
                "base": case["base"],
                "tied": manifest["bases"][case["base"]]["tied"],
                "lora_modules": lora_modules,
                "merged_has_lm_head": "lm_head.weight" in merged,
                "unchanged": unchanged,
            }
        )
        print(f"{case['name']}: {len(lora_modules)} LoRA modules, {len(adapter)} adapter tensors")

    for i, case in enumerate(NEGATIVE):
        d = OUT / "negative" / case["name"]
        make_adapter(case, d, seed=500 + i)
        manifest["negative"].append(
            {"name": case["name"], "about": case["about"], "base": case["base"],
             "tied": manifest["bases"][case["base"]]["tied"], "expect": case["expect"]}
        )
        print(f"{case['name']}: negative case")

    (OUT / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n")


if __name__ == "__main__":
    main()
