#!/usr/bin/env python3
"""Reference for the real model on its 4-bit base: SmolLM2-135M-Instruct and its LoRA adapter
(both made by make_real_model_fixture.py under target/real-models/smollm2/, never committed)
with the base quantised as QLoRA trains against it.

For each 4-bit setting (nf4 with double quantisation, as QLoRA trains; nf4 without; fp4) the
base is loaded with transformers + bitsandbytes exactly as make_nf4_fixtures.py describes
(dtype=torch.float32, BitsAndBytesConfig(load_in_4bit=True, bnb_4bit_quant_type=...,
bnb_4bit_use_double_quant=..., bnb_4bit_compute_dtype=torch.float32), every Linear4bit on its
float32 path), the adapter put on top with `PeftModel.from_pretrained` (unmerged), and the
greedy answers to the same 12 demo questions as tests/fixtures/real/smollm2.json recorded with
their per-step margins. For nf4 the base alone is answered too, and the SHA-256 of every
dequantised matrix (the f32 matrix each 4-bit layer multiplies by) is recorded.
`differs_from_bf16_base` lists the questions whose nf4 + adapter answer differs from the
adapter on the 16-bit base (smollm2.json's "unmerged").

Output: tests/fixtures/real/smollm2-nf4.json. Usage (after make_real_model_fixture.py):

    nice -n 10 /path/to/venv/bin/python tests/reference/make_real_nf4_fixture.py
"""

import json
import sys
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))
import make_nf4_fixtures as N  # noqa: E402
import make_real_model_fixture as M  # noqa: E402

import bitsandbytes  # noqa: E402
import peft  # noqa: E402
import transformers  # noqa: E402
from peft import PeftModel  # noqa: E402
from transformers import AutoTokenizer  # noqa: E402

torch.set_num_threads(1)
OUT = M.ROOT / "tests" / "fixtures" / "real" / "smollm2-nf4.json"
SETTINGS = ["nf4", "nf4-single", "fp4"]


def main():
    t_all = time.time()
    M.log(f"torch {torch.__version__}, transformers {transformers.__version__}, peft {peft.__version__}, "
          f"bitsandbytes {bitsandbytes.__version__}")
    prev = json.loads(M.OUT.read_text())
    assert M.sha256_file(M.MODEL_DIR / "model.safetensors") == prev["model_sha256"]
    assert M.sha256_file(M.ADAPTER_DIR / "adapter_model.safetensors") == prev["adapter_sha256"]
    tok = AutoTokenizer.from_pretrained(M.MODEL_DIR)
    rows = [json.loads(l) for l in (M.ROOT / "eval-sets" / "ferry-faq.jsonl").read_text().splitlines() if l.strip()]
    questions = [r for r in rows if r["id"] in prev["question_ids"]]
    assert [q["id"] for q in questions] == prev["question_ids"]
    variants, weights, timings = {}, {}, {}
    for qname in SETTINGS:
        qt, dq = N.QUANTS[qname]
        t0 = time.time()
        if qname == "nf4":
            base, weights = N.load_4bit(M.MODEL_DIR, qt, dq)
            variants[f"{qname}_base"] = M.run(base, tok, questions)
            del base
        base, _ = N.load_4bit(M.MODEL_DIR, qt, dq)
        pm = PeftModel.from_pretrained(base, M.ADAPTER_DIR).eval()
        variants[f"{qname}_unmerged"] = M.run(pm, tok, questions)
        del pm, base
        timings[qname] = round(time.time() - t0, 1)
        M.log(f"{qname}: answered in {timings[qname]}s")
    bf16_unmerged = {c["id"]: c["output_ids"] for c in prev["variants"]["unmerged"]}
    differs = [c["id"] for c in variants["nf4_unmerged"] if c["output_ids"] != bf16_unmerged[c["id"]]]
    doc = dict(
        generator="tests/reference/make_real_nf4_fixture.py",
        rule=N.RULE.format(tf=transformers.__version__, pt=torch.__version__.split("+")[0],
                           bnb=bitsandbytes.__version__, pf=peft.__version__, mm=M.MIN_MARGIN)
        + f" Questions, prompts and max_new_tokens ({M.MAX_NEW}) as tests/fixtures/real/smollm2.json.",
        versions=dict(torch=torch.__version__.split("+")[0], transformers=transformers.__version__,
                      peft=peft.__version__, bitsandbytes=bitsandbytes.__version__),
        model_sha256=prev["model_sha256"],
        adapter_sha256=prev["adapter_sha256"],
        question_ids=prev["question_ids"],
        max_new_tokens=M.MAX_NEW,
        min_margin_rule=M.MIN_MARGIN,
        differs_from_bf16_base=differs,
        timings_s=timings,
        nf4_weights=weights,
        variants=variants,
    )
    text = M.dump({k: v for k, v in doc.items() if k != "nf4_weights"} | {"variants": variants})
    head, tail = text.split(',\n "variants": {', 1)
    w = ",\n".join(f"  {json.dumps(k)}: " + json.dumps(v, separators=(",", ":")) for k, v in weights.items())
    OUT.write_text(head + ',\n "nf4_weights": {\n' + w + '\n },\n "variants": {' + tail)
    json.loads(OUT.read_text())
    M.log(f"wrote {OUT} in {time.time() - t_all:.1f}s; nf4 + adapter differs from the 16-bit base + adapter on {differs}")
    for name, cases in variants.items():
        M.log(f"{name}: flagged {[c['id'] for c in cases if not c['margin_ok']]}")


if __name__ == "__main__":
    main()
