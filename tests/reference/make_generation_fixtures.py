"""Greedy generation with a repetition penalty, as transformers 5.24.0 applies it under
do_sample=False (RepetitionPenaltyLogitsProcessor: s*p if s < 0 else s/p for every token id
already in the sequence), on the llama runner fixture. Writes
tests/fixtures/generation/repetition_penalty.json with, per prompt, the output ids and the
smallest top-1/top-2 gap of the processed scores (asserted >= 1e-3 so token identity is a fair
test in f32).

Run after make_runner_fixtures.py: python tests/reference/make_generation_fixtures.py
"""

import json
import pathlib

import torch
import transformers
from transformers import AutoModelForCausalLM

ROOT = pathlib.Path(__file__).resolve().parent.parent
MODEL = ROOT / "fixtures" / "runner" / "llama" / "model"
OUT = ROOT / "fixtures" / "generation" / "repetition_penalty.json"
PENALTY = 1.3
MAX_NEW = 16


def main():
    torch.set_num_threads(1)
    expected = json.loads((MODEL.parent / "expected.json").read_text())
    model = AutoModelForCausalLM.from_pretrained(MODEL, dtype=torch.float32, attn_implementation="eager").eval()
    cases = []
    for c in expected["cases"]:
        if c["variant"] != "base" or "prompt_ids" not in c:
            continue
        ids = torch.tensor([c["prompt_ids"]])
        with torch.no_grad():
            out = model.generate(ids, do_sample=False, max_new_tokens=MAX_NEW, repetition_penalty=PENALTY,
                                 output_scores=True, return_dict_in_generate=True)
        gaps = []
        for s in out.scores:
            top = torch.topk(s[0].float(), 2).values
            gaps.append(float(top[0] - top[1]))
        if min(gaps) < 1e-3:
            raise SystemExit(f"margin {min(gaps)} below 1e-3 for {c['question_index']}")
        cases.append({"prompt_ids": c["prompt_ids"], "output_ids": out.sequences[0, ids.shape[1]:].tolist(),
                      "min_margin": min(gaps)})
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps({
        "generator": "tests/reference/make_generation_fixtures.py",
        "versions": {"transformers": transformers.__version__, "torch": torch.__version__},
        "model": "tests/fixtures/runner/llama/model",
        "repetition_penalty": PENALTY,
        "max_new_tokens": MAX_NEW,
        "cases": cases,
    }, indent=1) + "\n")
    print(f"wrote {len(cases)} cases to {OUT}")


if __name__ == "__main__":
    main()
