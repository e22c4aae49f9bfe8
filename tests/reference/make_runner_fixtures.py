#!/usr/bin/env python3
"""Reference fixtures for the inference runner (`liftgate answer`).

For each decoder family this script builds a tiny, seeded, random-init model with
transformers, a byte-level BPE tokenizer trained with `tokenizers` on invented ferry-FAQ
text, a chat template in the family's style, and a few LoRA adapters made with peft.
It then records what the reference stack (PyTorch + transformers + peft, CPU, f32, eager
attention) does with them: rendered prompts, prompt ids, greedy output ids, decoded
answers, finish reasons, first-step logits and the top-1/top-2 margin at every step, for
the base model and for every adapter merged with `merge_and_unload()`, and peft's
unmerged forward pass for comparison.

Usage (from the repository root):

    /path/to/venv/bin/python tests/reference/make_runner_fixtures.py [--only FAMILY ...]

Output: tests/fixtures/runner/<family>/{model,adapters/<name>,expected.json} and
tests/fixtures/runner/manifest.json. Versions: see requirements.txt beside this file.
"""

import argparse
import json
import math
import shutil
import sys
import time
from pathlib import Path

import numpy as np
import torch
import tokenizers
import transformers
import peft
import safetensors
from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors, trainers
from tokenizers import AddedToken
from transformers import (
    AutoConfig,
    AutoModelForCausalLM,
    AutoTokenizer,
    GemmaConfig,
    Gemma2Config,
    GenerationConfig,
    LlamaConfig,
    MistralConfig,
    Phi3Config,
    PreTrainedTokenizerFast,
    Qwen2Config,
    Qwen3Config,
)
from peft import LoraConfig, PeftModel, get_peft_model

torch.set_num_threads(1)
transformers.logging.set_verbosity_error()
transformers.utils.logging.disable_progress_bar()
EOS_BOOST = 1.4
LORA_B_STD = 0.3

ROOT = Path(__file__).resolve().parents[2]
OUT = ROOT / "tests" / "fixtures" / "runner"

MIN_MARGIN = 1e-3
UNMERGED_TOL = 1e-5
VOCAB_TARGET = 320
MAX_SEEDS = 40
RULE = (
    "Greedy decoding (do_sample=False) with transformers {tf} / torch {pt} / peft {pf} on CPU, "
    "model loaded with dtype=torch.float32 and attn_implementation='eager' (weights stored in "
    "the dtype named in config.json are up-cast). The seed was chosen so that at every recorded "
    "generation step of every case (base, merged adapters, and unmerged peft forward) the gap "
    "between the largest and second-largest logit is at least {mm}; min_margin is the smallest "
    "gap seen. Prompt ids come from apply_chat_template(tokenize=True, add_generation_prompt=True, "
    "return_dict=False), i.e. the rendered text tokenised without adding special tokens. "
    "answer = decode(output_ids, skip_special_tokens=True).strip(). finish is 'eos' when the last "
    "output id is one of the eos ids, else 'length'. first_step_logits are the full-vocabulary "
    "logits of the last prompt position, rounded to 7 significant digits; margins[i] and "
    "max_logits[i] are the top-1/top-2 gap and the maximum at step i. A case with 'error' means "
    "the chat template refused the conversation (raise_exception)."
)

CORPUS = [
    "The morning ferry leaves the north pier at 07:10 and reaches Gull Island at 07:55.",
    "Bicycles travel free on every crossing, but please tell the deck crew before boarding.",
    "Dogs are welcome on the open deck if they stay on a short lead.",
    "Tickets can be bought at the harbour kiosk or on board with a card.",
    "Return tickets are valid for thirty days from the date of purchase.",
    "In strong wind the skipper may cancel the last sailing of the day.",
    "Cancelled sailings are announced on the notice board at the pier.",
    "Cars must be at the loading ramp twenty minutes before departure.",
    "Children under five travel free; children under sixteen pay half fare.",
    "The cafe on the lower deck sells tea, soup and fresh bread rolls.",
    "Lost property is kept at the harbour office for two weeks.",
    "Wheelchair users can board by the ramp at the stern of the boat.",
    "Season passes for islanders are issued by the cooperative office.",
    "The winter timetable starts on the first Monday of November.",
    "On public holidays the ferry runs the Sunday timetable.",
    "Please keep your ticket until you leave the boat at the other pier.",
    "Large luggage goes in the rack next to the passenger cabin.",
    "The crossing to Heron Point takes about forty minutes in calm weather.",
    "Fishing from the deck is not allowed while the ferry is moving.",
    "If you feel seasick, sit in the middle of the boat and look at the horizon.",
    "Group bookings for ten or more people need two days of notice.",
    "The cooperative answers questions by phone every weekday morning.",
    "How early should I arrive? Arrive fifteen minutes before the sailing.",
    "Can I bring my bike? Yes, bikes ride for free on all ferries.",
    "What happens when a sailing is cancelled? Your ticket is refunded or moved.",
    "Is there parking at the pier? A small car park sits behind the kiosk.",
    "Do you sell food on board? The lower deck cafe is open on most crossings.",
    "Where do I find the timetable? It hangs at the pier and in the kiosk window.",
]

QUESTIONS = [
    "When does the first ferry leave for Gull Island?",
    "Can I take my bicycle on the boat?",
    "What happens if the evening sailing is cancelled?",
]
MAX_NEW = [12, 10, 14]
SYSTEM_TEXT = "You are the help desk of a small island ferry cooperative. Answer briefly."

# --------------------------------------------------------------------------------------
# Chat templates. All wording is invented for these fixtures, in each family's style.
# --------------------------------------------------------------------------------------

T_LLAMA = """{{- bos_token }}
{%- if messages[0]['role'] == 'system' %}
{%- set system_text = messages[0]['content'] | trim %}
{%- set rest = messages[1:] %}
{%- else %}
{%- set system_text = 'You answer questions from ferry passengers.' %}
{%- set rest = messages %}
{%- endif %}
<|start_header_id|>system<|end_header_id|>

{{ system_text }}<|eot_id|>
{%- for m in rest %}
<|start_header_id|>{{ m['role'] }}<|end_header_id|>

{{ m['content'] | trim }}<|eot_id|>
{%- endfor %}
{%- if add_generation_prompt %}
<|start_header_id|>assistant<|end_header_id|>

{% endif %}"""

T_MISTRAL = """{{- bos_token }}
{%- set ns = namespace(system='', first=true) %}
{%- for m in messages %}
{%- if m['role'] == 'system' %}
{%- set ns.system = m['content'].strip() %}
{%- elif m['role'] == 'user' %}
[INST] {% if ns.first and ns.system %}{{ ns.system }}

{% endif %}{{ m['content'].strip() }} [/INST]
{%- set ns.first = false %}
{%- elif m['role'] == 'assistant' %}
 {{ m['content'].strip() }}{{ eos_token }}
{%- else %}
{{- raise_exception('Only system, user and assistant roles are understood.') }}
{%- endif %}
{%- endfor %}"""

T_QWEN2 = """{%- for m in messages %}
{%- if loop.first and m['role'] != 'system' %}
<|im_start|>system
You help travellers with the island ferry timetable.<|im_end|>
{% endif %}
<|im_start|>{{ m['role'] }}
{{ m['content'] }}<|im_end|>
{% endfor %}
{%- if add_generation_prompt %}
<|im_start|>assistant
{% endif %}"""

T_QWEN3 = """{%- set ns = namespace(last_user=-1) %}
{%- for m in messages %}
{%- if m['role'] == 'user' %}{% set ns.last_user = loop.index0 %}{% endif %}
{%- endfor %}
{%- for m in messages %}
<|im_start|>{{ m['role'] }}
{{ m['content'].strip() }}{% if loop.index0 == ns.last_user %} (reply in one sentence){% endif %}<|im_end|>
{% if loop.last and add_generation_prompt %}
<|im_start|>assistant
<think>

</think>

{% endif %}
{%- endfor %}"""

T_PHI3 = """{%- for m in messages %}
{%- if m['role'] in ['system', 'user', 'assistant'] %}
<|{{ m['role'] }}|>
{{ m['content'] | trim }}<|end|>
{% endif %}
{%- endfor %}
{%- if add_generation_prompt %}
<|assistant|>
{% else %}
{{- eos_token }}
{%- endif %}"""

T_GEMMA = """{{ bos_token }}
{%- for m in messages %}
{%- if m['role'] == 'system' %}
{{- raise_exception('This template has no system role; put instructions in the first user turn.') }}
{%- endif %}
{%- set role = 'model' if m['role'] == 'assistant' else m['role'] %}
<start_of_turn>{{ role }}
{{ m['content'] | trim }}<end_of_turn>
{% endfor %}
{%- if add_generation_prompt %}
<start_of_turn>model
{% endif %}"""

T_GEMMA2 = """{{- bos_token }}
{%- if messages[0]['role'] == 'system' %}
{%- set preamble = (messages[0]['content'] | trim) ~ '\\n\\n' %}
{%- set turns = messages[1:] %}
{%- else %}
{%- set preamble = '' %}
{%- set turns = messages %}
{%- endif %}
{%- for m in turns %}
<start_of_turn>{{ 'model' if m['role'] == 'assistant' else 'user' }}
{{ preamble if loop.first else '' }}{{ m['content'] | trim }}<end_of_turn>
{% endfor %}
{%- if add_generation_prompt %}
<start_of_turn>model
{% endif %}"""

# --------------------------------------------------------------------------------------
# Family definitions
# --------------------------------------------------------------------------------------

COMMON = dict(
    hidden_size=64,
    intermediate_size=128,
    num_hidden_layers=2,
    num_attention_heads=4,
    num_key_value_heads=2,
    head_dim=16,
    max_position_embeddings=256,
    initializer_range=0.15,
)

LLAMA_TOK = dict(
    specials=["<|begin_of_text|>", "<|end_of_text|>", "<|start_header_id|>", "<|end_header_id|>", "<|eot_id|>"],
    bos="<|begin_of_text|>",
    eos="<|end_of_text|>",
    pad=None,
    post_bos=True,
    template=T_LLAMA,
    template_in="tokenizer_config.json",
)
QWEN_TOK = dict(
    specials=["<|endoftext|>", "<|im_start|>", "<|im_end|>"],
    bos=None,
    eos="<|im_end|>",
    pad="<|endoftext|>",
    post_bos=False,
)
GEMMA_TOK = dict(
    specials=["<pad>", "<eos>", "<bos>", "<unk>", "<start_of_turn>", "<end_of_turn>"],
    bos="<bos>",
    eos="<eos>",
    pad="<pad>",
    unk="<unk>",
    post_bos=False,
)

FAMILIES = {
    "llama": dict(
        config_cls=LlamaConfig,
        config=dict(
            rope_parameters=dict(
                rope_type="llama3",
                rope_theta=10000.0,
                factor=8.0,
                low_freq_factor=1.0,
                high_freq_factor=4.0,
                original_max_position_embeddings=64,
            ),
            tie_word_embeddings=False,
            rms_norm_eps=1e-5,
        ),
        tok=LLAMA_TOK,
        config_eos="<|eot_id|>",
        gen_eos=["<|eot_id|>", "<|end_of_text|>"],
        dtype="float32",
        adapters=[
            dict(name="qv", r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
            dict(
                name="all",
                r=4,
                lora_alpha=8,
                target_modules="all-linear",
                rank_pattern={"o_proj": 2, r"layers\.1\.mlp\.down_proj": 3},
                alpha_pattern={"v_proj": 16, "gate_proj": 4},
            ),
            dict(name="head", r=2, lora_alpha=4, target_modules=["k_proj", "o_proj"], modules_to_save=["lm_head"]),
        ],
        features=["rope llama3 scaling (rope_parameters)", "untied lm_head", "GQA 4/2",
                  "post-processor adds BOS and template prints bos_token (one BOS expected)",
                  "default system block when no system message", "eos list in generation_config",
                  "modules_to_save lm_head", "all-linear with rank_pattern/alpha_pattern",
                  "template in tokenizer_config.json"],
    ),
    "llama-tied": dict(
        config_cls=LlamaConfig,
        config=dict(rope_parameters=dict(rope_type="default", rope_theta=10000.0), tie_word_embeddings=True,
                    rms_norm_eps=1e-6),
        tok=LLAMA_TOK,
        config_eos="<|eot_id|>",
        gen_eos="<|eot_id|>",
        dtype="float32",
        adapters=[dict(name="qv", r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"])],
        features=["tie_word_embeddings true (no lm_head.weight stored)", "rope default", "eos int in generation_config"],
    ),
    "mistral": dict(
        config_cls=MistralConfig,
        config=dict(sliding_window=16, rope_parameters=dict(rope_type="default", rope_theta=10000.0),
                    tie_word_embeddings=False),
        tok=dict(
            specials=["<unk>", "<s>", "</s>", "[INST]", "[/INST]"],
            bos="<s>",
            eos="</s>",
            pad=None,
            unk="<unk>",
            post_bos=False,
            template=T_MISTRAL,
            template_in="chat_template.jinja",
        ),
        config_eos="</s>",
        gen_eos="</s>",
        dtype="float16",
        adapters=[
            dict(name="qv", r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
            dict(name="rs", r=4, lora_alpha=8, use_rslora=True, target_modules=["q_proj", "k_proj", "v_proj", "o_proj"]),
        ],
        features=["sliding_window 16 on every layer (shorter than prompt+answer)", "weights stored f16",
                  "system folded into first [INST] via namespace", "generation prompt appends nothing",
                  "rsLoRA", "template in chat_template.jinja"],
    ),
    "qwen2": dict(
        config_cls=Qwen2Config,
        config=dict(sliding_window=16, use_sliding_window=False, max_window_layers=1,
                    rope_parameters=dict(rope_type="default", rope_theta=1000000.0), tie_word_embeddings=False),
        # v5 writes sliding_window null and explicit layer_types; shipped Qwen2 files carry a
        # window with use_sliding_window false and no layer_types.
        config_patch=dict(sliding_window=16, layer_types=None),
        tok=dict(QWEN_TOK, template=T_QWEN2, template_in="tokenizer_config.json"),
        config_eos="<|endoftext|>",
        gen_eos=["<|im_end|>", "<|endoftext|>"],
        dtype="bfloat16",
        adapters=[
            dict(name="qv", r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
            dict(
                name="all",
                r=3,
                lora_alpha=6,
                target_modules="all-linear",
                rank_pattern={"up_proj": 2},
                alpha_pattern={r"layers\.0\.self_attn\.q_proj": 12},
            ),
        ],
        features=["q/k/v biases (random non-zero)", "weights stored bf16", "no BOS",
                  "config.json has sliding_window 16 with use_sliding_window false and no layer_types (window must be ignored)", "eos list in generation_config",
                  "rope_theta 1e6", "all-linear with rank_pattern/alpha_pattern"],
    ),
    "qwen3": dict(
        config_cls=Qwen3Config,
        config=dict(rope_parameters=dict(rope_type="default", rope_theta=1000000.0), tie_word_embeddings=False),
        tok=dict(QWEN_TOK, nonspecial=["<think>", "</think>"], template=T_QWEN3, template_in="chat_template.jinja"),
        config_eos="<|im_end|>",
        gen_eos=None,
        dtype="float32",
        shard="100KB",
        adapters=[
            dict(name="qv", r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
            dict(name="rs", r=2, lora_alpha=4, use_rslora=True, target_modules=["q_proj", "k_proj", "v_proj", "down_proj"]),
            dict(name="rx", r=2, lora_alpha=8, target_modules=r".*layers\.1\.self_attn\.(q_proj|k_proj)|.*\.mlp\.up_proj"),
        ],
        features=["q_norm/k_norm per head before RoPE", "head_dim 16 explicit", "sharded safetensors with index",
                  "no generation_config.json (eos from config.json)", "non-special added tokens <think> </think>",
                  "regex-string target_modules", "rsLoRA", "template with namespace/loop.last/.strip()",
                  "template in chat_template.jinja"],
    ),
    "phi3": dict(
        config_cls=Phi3Config,
        config=dict(rope_parameters=dict(rope_type="default", rope_theta=10000.0, partial_rotary_factor=0.5),
                    original_max_position_embeddings=256, tie_word_embeddings=False, head_dim=None,
                    sliding_window=None),
        tok=dict(
            specials=["<unk>", "<s>", "</s>", "<|endoftext|>", "<|system|>", "<|user|>", "<|assistant|>", "<|end|>"],
            bos="<s>",
            eos="<|endoftext|>",
            pad="<|endoftext|>",
            unk="<unk>",
            post_bos=True,
            template=T_PHI3,
            template_in="tokenizer_config.json",
        ),
        config_eos="<|endoftext|>",
        gen_eos=["<|end|>", "<|endoftext|>"],
        dtype="float32",
        adapters=[
            dict(name="qv", r=4, lora_alpha=8, target_modules=["qkv_proj"]),
            dict(
                name="all",
                r=4,
                lora_alpha=8,
                target_modules="all-linear",
                rank_pattern={"gate_up_proj": 2},
                alpha_pattern={"qkv_proj": 12},
            ),
        ],
        features=["fused qkv_proj and gate_up_proj", "partial_rotary_factor 0.5", "no rope scaling",
                  "post-processor adds BOS but template does not print it (no BOS in prompt ids)",
                  "LoRA on fused qkv_proj", "eos list in generation_config", "template in tokenizer_config.json"],
    ),
    "gemma": dict(
        config_cls=GemmaConfig,
        config=dict(hidden_act="gelu_pytorch_tanh", rope_parameters=dict(rope_type="default", rope_theta=10000.0),
                    tie_word_embeddings=True),
        tok=dict(GEMMA_TOK, template=T_GEMMA, template_in="tokenizer_config.json"),
        config_eos="<eos>",
        gen_eos=["<eos>", "<end_of_turn>"],
        dtype="bfloat16",
        adapters=[
            dict(name="qv", r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
            dict(name="rs", r=4, lora_alpha=8, use_rslora=True, target_modules=["q_proj", "v_proj", "gate_proj", "up_proj", "down_proj"]),
        ],
        features=["gelu_pytorch_tanh", "(1+w) RMSNorm with random non-zero offsets", "embedding scaled by sqrt(hidden)",
                  "tied embeddings", "weights stored bf16", "template rejects system role (raise_exception)",
                  "eos list in generation_config", "rsLoRA", "template in tokenizer_config.json"],
    ),
    "gemma2": dict(
        config_cls=Gemma2Config,
        config=dict(hidden_activation="gelu_pytorch_tanh", query_pre_attn_scalar=24, attn_logit_softcapping=4.0,
                    final_logit_softcapping=10.0, sliding_window=16,
                    rope_parameters=dict(rope_type="default", rope_theta=10000.0), tie_word_embeddings=True),
        tok=dict(GEMMA_TOK, template=T_GEMMA2, template_in="chat_template.jinja"),
        eos_boost=2.5,  # the final soft-cap squeezes the logits, so stop tokens need a larger row
        config_eos="<eos>",
        gen_eos="<end_of_turn>",
        dtype="float32",
        adapters=[
            dict(name="qv", r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"]),
            dict(
                name="all",
                r=4,
                lora_alpha=8,
                target_modules="all-linear",
                rank_pattern={"down_proj": 2},
                alpha_pattern={"o_proj": 3},
            ),
        ],
        features=["attention and final logit soft-capping", "query_pre_attn_scalar 24 (not head_dim)",
                  "sliding window 16 on even layers, full on odd", "pre/post feedforward norms",
                  "tied embeddings", "system folded into first user turn via messages[0]['role']",
                  "eos int in generation_config", "all-linear with rank_pattern/alpha_pattern",
                  "template in chat_template.jinja"],
    ),
}


# Config overrides that must change the logits of the fixture's models; each is applied to the
# loaded config and the full-sequence logits are compared with the unmodified model. This shows
# the fixture is sensitive to the feature (a reimplementation that ignores it cannot pass).
FEATURE_CHECKS = {
    "llama": [dict(rope_parameters=dict(rope_type="default", rope_theta=10000.0))],
    "mistral": [dict(sliding_window=None)],
    "qwen2": [dict(use_sliding_window=True, sliding_window=16, layer_types=["sliding_attention"] * 2)],
    "phi3": [dict(rope_parameters=dict(rope_type="default", rope_theta=10000.0, partial_rotary_factor=1.0))],
    "gemma": [dict(hidden_act="silu")],
    "gemma2": [
        dict(layer_types=["full_attention"] * 2),
        dict(attn_logit_softcapping=None),
        dict(final_logit_softcapping=None),
        dict(query_pre_attn_scalar=16),
    ],
}


def feature_checks(fam, mdir, cases):
    case = next((c for c in cases if c["variant"] == "base" and "prompt_ids" in c), None)
    out = []
    if case is None:
        return out
    ids = torch.tensor([case["prompt_ids"] + case["output_ids"]])

    def run(over):
        cfg = AutoConfig.from_pretrained(mdir)
        for k, v in over.items():
            setattr(cfg, k, v)
        m = AutoModelForCausalLM.from_pretrained(mdir, config=cfg, dtype=torch.float32, attn_implementation="eager")
        with torch.no_grad():
            return m.eval()(ids).logits[0]

    ref = run({})
    for over in FEATURE_CHECKS.get(fam, []):
        diff = float((run(over) - ref).abs().max())
        if not diff > 1e-2:
            raise RuntimeError(f"{fam}: override {over} does not change the logits ({diff})")
        out.append(dict(override=over, max_abs_logit_diff=sig7(diff)))
    return out


def log(msg):
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


# --------------------------------------------------------------------------------------
# Tokenizer
# --------------------------------------------------------------------------------------


def build_tokenizer(tok_spec, out_dir):
    specials = list(tok_spec["specials"])
    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=VOCAB_TARGET,
        min_frequency=2,
        special_tokens=specials,
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    tok.train_from_iterator(CORPUS * 3, trainer)
    if tok_spec.get("post_bos"):
        bos = tok_spec["bos"]
        tok.post_processor = processors.TemplateProcessing(
            single=f"{bos} $A", pair=f"{bos} $A {bos} $B", special_tokens=[(bos, tok.token_to_id(bos))]
        )
    else:
        tok.post_processor = processors.ByteLevel(trim_offsets=False)
    if tok_spec.get("nonspecial"):
        tok.add_tokens([AddedToken(t, special=False, normalized=False) for t in tok_spec["nonspecial"]])
    named = {tok_spec.get(k) for k in ("bos", "eos", "pad", "unk")}
    extra = [t for t in specials if t not in named]
    fast = PreTrainedTokenizerFast(
        tokenizer_object=tok,
        bos_token=tok_spec.get("bos"),
        eos_token=tok_spec.get("eos"),
        pad_token=tok_spec.get("pad"),
        unk_token=tok_spec.get("unk"),
        additional_special_tokens=extra,
        model_max_length=256,
    )
    fast.chat_template = tok_spec["template"]
    fast.save_pretrained(out_dir, save_jinja_files=(tok_spec["template_in"] == "chat_template.jinja"))
    return len(fast)


# --------------------------------------------------------------------------------------
# Model
# --------------------------------------------------------------------------------------


def tok_id(tok, s):
    i = tok.convert_tokens_to_ids(s)
    assert i is not None and i != tok.unk_token_id or s == tok.unk_token, s
    return i


def build_model(fam, spec, mdir, seed, tok):
    vocab = len(tok)
    cfg_kwargs = dict(COMMON)
    cfg_kwargs.update(spec["config"])
    if cfg_kwargs.get("head_dim") is None:
        cfg_kwargs.pop("head_dim", None)
    cfg_kwargs["vocab_size"] = vocab
    cfg_kwargs["bos_token_id"] = tok.bos_token_id
    cfg_kwargs["eos_token_id"] = tok_id(tok, spec["config_eos"])
    cfg_kwargs["pad_token_id"] = tok.pad_token_id
    cfg = spec["config_cls"](**cfg_kwargs)
    torch.manual_seed(seed)
    model = AutoModelForCausalLM.from_config(cfg, dtype=torch.float32, attn_implementation="eager")
    g = torch.Generator().manual_seed(seed + 1000)
    with torch.no_grad():
        for name, p in model.named_parameters():
            if "norm" in name:
                # Llama-style norms start at 1, Gemma-style offsets at 0: perturb both so the
                # weight semantics matter.
                p.add_(torch.randn(p.shape, generator=g) * 0.3)
            elif name.endswith("bias"):
                p.copy_(torch.randn(p.shape, generator=g) * 0.3)
        # Make the stop tokens plausible greedy picks so some cases end on eos.
        head = model.get_output_embeddings().weight
        gen_eos = spec["gen_eos"] if spec["gen_eos"] is not None else spec["config_eos"]
        for t in gen_eos if isinstance(gen_eos, list) else [gen_eos]:
            head[tok_id(tok, t)] *= spec.get("eos_boost", EOS_BOOST)
    store = getattr(torch, spec["dtype"])
    model = model.to(store)
    if spec["gen_eos"] is not None:
        ge = spec["gen_eos"]
        eos = [tok_id(tok, t) for t in ge] if isinstance(ge, list) else tok_id(tok, ge)
        model.generation_config = GenerationConfig(
            bos_token_id=tok.bos_token_id, eos_token_id=eos, pad_token_id=tok.pad_token_id
        )
    kw = {}
    if spec.get("shard"):
        kw["max_shard_size"] = spec["shard"]
    model.save_pretrained(mdir, **kw)
    if spec["gen_eos"] is None:
        (mdir / "generation_config.json").unlink(missing_ok=True)
    if spec.get("config_patch"):
        # Edit config.json the way older or hand-written checkpoints look; the reference then
        # loads the edited file, so its semantics are what gets recorded.
        cpath = mdir / "config.json"
        c = json.loads(cpath.read_text())
        for k, v in spec["config_patch"].items():
            if v is None:
                c.pop(k, None)
            else:
                c[k] = v
        cpath.write_text(json.dumps(c, indent=2, sort_keys=True) + "\n")


def load_base(mdir):
    m = AutoModelForCausalLM.from_pretrained(mdir, dtype=torch.float32, attn_implementation="eager")
    m.eval()
    return m


def build_adapter(mdir, ad, adir, seed):
    base = load_base(mdir)
    kw = {k: v for k, v in ad.items() if k != "name"}
    cfg = LoraConfig(task_type="CAUSAL_LM", lora_dropout=0.0, **kw)
    torch.manual_seed(seed)
    pm = get_peft_model(base, cfg)
    g = torch.Generator().manual_seed(seed + 7)
    with torch.no_grad():
        for name, p in pm.named_parameters():
            if "lora_B" in name:
                p.copy_(torch.randn(p.shape, generator=g) * LORA_B_STD)
            elif "modules_to_save" in name:
                p.add_(torch.randn(p.shape, generator=g) * 0.1)
    pm.save_pretrained(adir)
    (adir / "README.md").unlink(missing_ok=True)
    cpath = adir / "adapter_config.json"
    c = json.loads(cpath.read_text())
    c["base_model_name_or_path"] = "../../model"
    if isinstance(c.get("target_modules"), list):
        # peft expands "all-linear" through a set; sort it so reruns give identical files.
        c["target_modules"] = sorted(c["target_modules"])
    cpath.write_text(json.dumps(c, indent=2, sort_keys=True) + "\n")


# --------------------------------------------------------------------------------------
# Running cases
# --------------------------------------------------------------------------------------


def sig7(x):
    return float(f"{x:.7g}")


def eos_ids_of(model):
    e = model.generation_config.eos_token_id
    if e is None:
        return []
    return list(e) if isinstance(e, (list, tuple)) else [e]


def messages_for(qi, system):
    msgs = []
    if system:
        msgs.append({"role": "system", "content": SYSTEM_TEXT})
    msgs.append({"role": "user", "content": QUESTIONS[qi]})
    return msgs


def run_cases(model, tok, raw_tok):
    """Returns a list of case dicts (without variant) plus the per-step logits for comparison."""
    eos = eos_ids_of(model)
    cases, step_logits = [], []
    for system in (False, True):
        for qi in range(len(QUESTIONS)):
            msgs = messages_for(qi, system)
            max_new = MAX_NEW[qi]
            case = dict(system=system, question_index=qi, max_new_tokens=max_new)
            try:
                rendered = tok.apply_chat_template(msgs, tokenize=False, add_generation_prompt=True)
                ids = tok.apply_chat_template(msgs, tokenize=True, add_generation_prompt=True, return_dict=False)
            except Exception as e:  # the template's raise_exception
                case["error"] = f"{type(e).__name__}: {e}"
                cases.append(case)
                step_logits.append(None)
                continue
            ids = list(ids)
            assert raw_tok.encode(rendered, add_special_tokens=False).ids == ids, "tokenizer parity"
            inp = torch.tensor([ids])
            with torch.no_grad():
                out = model.generate(
                    inp,
                    attention_mask=torch.ones_like(inp),
                    do_sample=False,
                    max_new_tokens=max_new,
                    output_scores=True,
                    output_logits=True,
                    return_dict_in_generate=True,
                )
            new = out.sequences[0, len(ids):].tolist()
            scores = [s[0].float() for s in out.scores]
            logits = [s[0].float() for s in out.logits]
            margins, maxes = [], []
            for s in scores:
                top = torch.topk(s, 2).values
                margins.append(float(top[0] - top[1]))
                maxes.append(float(top[0]))
            for s, l in zip(scores, logits):
                assert torch.equal(s, l), "greedy scores differ from raw logits"
            case.update(
                rendered=rendered,
                prompt_ids=ids,
                output_ids=new,
                answer=tok.decode(new, skip_special_tokens=True).strip(),
                finish="eos" if new and new[-1] in eos else "length",
                first_step_logits=[sig7(v) for v in logits[0].tolist()],
                margins=[sig7(m) for m in margins],
                max_logits=[sig7(m) for m in maxes],
            )
            cases.append(case)
            step_logits.append(torch.stack(logits))
    return cases, step_logits


def make_family(fam, spec, seed):
    fdir = OUT / fam
    if fdir.exists():
        shutil.rmtree(fdir)
    mdir = fdir / "model"
    mdir.mkdir(parents=True)
    build_tokenizer(spec["tok"], mdir)
    tok = AutoTokenizer.from_pretrained(mdir)
    raw_tok = Tokenizer.from_file(str(mdir / "tokenizer.json"))
    build_model(fam, spec, mdir, seed, tok)

    all_cases = []
    margins = []
    unmerged_report = {}

    base = load_base(mdir)
    cases, _ = run_cases(base, tok, raw_tok)
    for c in cases:
        all_cases.append(dict(variant="base", **c))
        margins += c.get("margins", [])
    del base

    for k, ad in enumerate(spec["adapters"]):
        adir = fdir / "adapters" / ad["name"]
        build_adapter(mdir, ad, adir, seed * 100 + k)
        pm = PeftModel.from_pretrained(load_base(mdir), adir)
        pm.eval()
        ucases, ulogits = run_cases(pm, tok, raw_tok)
        merged = pm.merge_and_unload()
        merged.eval()
        mcases, mlogits = run_cases(merged, tok, raw_tok)
        worst = 0.0
        for uc, ul, mc, ml in zip(ucases, ulogits, mcases, mlogits):
            if "error" in mc:
                all_cases.append(dict(variant=ad["name"], **mc))
                continue
            same = uc["output_ids"] == mc["output_ids"]
            diff = float((ul - ml).abs().max()) if same else float("inf")
            worst = max(worst, diff)
            mc["unmerged"] = dict(
                output_ids=uc["output_ids"],
                margins=uc["margins"],
                max_abs_logit_diff=sig7(diff) if math.isfinite(diff) else None,
            )
            margins += mc["margins"] + uc["margins"]
            all_cases.append(dict(variant=ad["name"], **mc))
        unmerged_report[ad["name"]] = worst

    min_margin = min(margins)
    finishes = [c["finish"] for c in all_cases if "finish" in c]
    return dict(
        fdir=fdir,
        min_margin=min_margin,
        cases=all_cases,
        unmerged=unmerged_report,
        n_eos=finishes.count("eos"),
        n_length=finishes.count("length"),
        vocab=len(tok),
    )


def dump_expected(doc):
    """Pretty top level, one compact line per case (keeps the files small and diffable)."""
    head = {k: v for k, v in doc.items() if k != "cases"}
    text = json.dumps(head, indent=1, ensure_ascii=False)
    cases = ",\n".join("  " + json.dumps(c, ensure_ascii=False, separators=(",", ":")) for c in doc["cases"])
    return text[:-2] + ',\n "cases": [\n' + cases + "\n ]\n}\n"


def write_expected(fam, spec, seed, res):
    rule = RULE.format(tf=transformers.__version__, pt=torch.__version__.split("+")[0], pf=peft.__version__, mm=MIN_MARGIN)
    doc = dict(
        family=fam,
        rule=rule,
        seed=seed,
        min_margin=sig7(res["min_margin"]),
        unmerged_tolerance=UNMERGED_TOL,
        unmerged_max_abs_logit_diff={k: sig7(v) for k, v in res["unmerged"].items()},
        stored_dtype=spec["dtype"],
        system_text=SYSTEM_TEXT,
        questions=QUESTIONS,
        variants=["base"] + [a["name"] for a in spec["adapters"]],
        features=spec["features"],
        feature_checks=feature_checks(fam, res["fdir"] / "model", res["cases"]),
        cases=res["cases"],
    )
    (res["fdir"] / "expected.json").write_text(dump_expected(doc))
    return doc


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="*", help="families to (re)build; default all")
    args = ap.parse_args()
    fams = args.only or list(FAMILIES)
    for f in fams:
        if f not in FAMILIES:
            sys.exit(f"unknown family {f!r}; known: {', '.join(FAMILIES)}")
    OUT.mkdir(parents=True, exist_ok=True)
    log(f"torch {torch.__version__}, transformers {transformers.__version__}, peft {peft.__version__}, "
        f"tokenizers {tokenizers.__version__}, safetensors {safetensors.__version__}, numpy {np.__version__}")
    for fam in fams:
        spec = FAMILIES[fam]
        fallback = None
        chosen = None
        for seed in range(1, MAX_SEEDS + 1):
            t0 = time.time()
            res = make_family(fam, spec, seed)
            worst = max(res["unmerged"].values(), default=0.0)
            ok = res["min_margin"] >= MIN_MARGIN and worst <= UNMERGED_TOL
            log(f"{fam} seed {seed}: min_margin {res['min_margin']:.3g}, unmerged diff {worst:.3g}, eos {res['n_eos']}, "
                f"length {res['n_length']}, {time.time() - t0:.1f}s")
            if ok and res["n_eos"] > 0 and res["n_length"] > 0:
                chosen = (seed, res)
                break
            if ok and fallback is None:
                fallback = seed
        if chosen is None:
            if fallback is None:
                sys.exit(f"{fam}: no seed in 1..{MAX_SEEDS} meets the margin rule")
            res = make_family(fam, spec, fallback)
            chosen = (fallback, res)
        seed, res = chosen
        write_expected(fam, spec, seed, res)
        log(f"{fam}: seed {seed}, min_margin {res['min_margin']:.4g}, vocab {res['vocab']}")
    write_manifest()


def write_manifest():
    fams = {}
    for fam, spec in FAMILIES.items():
        p = OUT / fam / "expected.json"
        if not p.exists():
            continue
        doc = json.loads(p.read_text())
        mdir = OUT / fam / "model"
        cfg = json.loads((mdir / "config.json").read_text())
        fams[fam] = dict(
            model_type=cfg["model_type"],
            architectures=cfg.get("architectures"),
            stored_dtype=spec["dtype"],
            sharded=(mdir / "model.safetensors.index.json").exists(),
            generation_config=(mdir / "generation_config.json").exists(),
            chat_template_in=spec["tok"]["template_in"],
            variants=doc["variants"],
            adapters={a["name"]: {k: v for k, v in a.items() if k != "name"} for a in spec["adapters"]},
            seed=doc["seed"],
            min_margin=doc["min_margin"],
            cases=len(doc["cases"]),
            features=spec["features"],
            feature_checks=doc["feature_checks"],
        )
    man = dict(
        generator="tests/reference/make_runner_fixtures.py",
        versions=dict(
            torch=torch.__version__.split("+")[0],
            transformers=transformers.__version__,
            peft=peft.__version__,
            tokenizers=tokenizers.__version__,
            safetensors=safetensors.__version__,
        ),
        min_margin_rule=MIN_MARGIN,
        families=fams,
    )
    (OUT / "manifest.json").write_text(json.dumps(man, indent=1) + "\n")


if __name__ == "__main__":
    main()
