#!/usr/bin/env python3
"""Reference for "the adapter on the 4-bit base it was trained against" (QLoRA as trained).

What a team evaluates when it loads the base as QLoRA trains it,

    AutoModelForCausalLM.from_pretrained(model_dir, dtype=torch.float32,
        quantization_config=BitsAndBytesConfig(load_in_4bit=True, bnb_4bit_quant_type=QT,
            bnb_4bit_use_double_quant=DQ, bnb_4bit_compute_dtype=torch.float32))

and puts the adapter on top unmerged with `PeftModel.from_pretrained(base, adapter_dir)`. For
every family and adapter committed under tests/fixtures/runner/ (read as committed; nothing is
rebuilt) and each of the four 4-bit settings (nf4 / fp4, with and without double quantisation)
this script records

  * per quantised linear layer, the SHA-256 of the f32 weight matrix the 4-bit layer multiplies
    by (little-endian f32 bytes of [out, in]), dequantised exactly as the layer's forward does;
  * the greedy answers of the base alone and of base + each adapter, for the same cases as
    make_runner_fixtures.py (`run_cases`), with the per-step top-1/top-2 margins; a case whose
    smallest margin is below 1e-3 is kept and flagged `margin_ok: false`.

Output: tests/fixtures/runner/<family>/nf4.json, and tests/fixtures/nf4_sums.json: `torch.sum`
and `torch.mean` of f32 vectors of many lengths (values v[i] = f32((i * 7919 % 1000) / 3333 +
0.01), computed the same way in the Rust test), since the offset of the double quantisation is
torch's mean in its own order of additions. Usage:

    nice -n 10 /path/to/venv/bin/python tests/reference/make_nf4_fixtures.py [--only FAMILY ...]
    nice -n 10 /path/to/venv/bin/python tests/reference/make_nf4_fixtures.py --sums-only

What bitsandbytes 0.50.2 computes on CPU (line numbers refer to the installed package,
site-packages/bitsandbytes/, and to csrc/cpu_ops.cpp of its source), reproduced by
src/kernels/nf4.rs and checked here through the hashes:

(a) Which modules: transformers' bitsandbytes quantizer replaces every `nn.Linear` except the
    output head (`get_keys_to_not_convert`), so the attention and MLP projections of each
    layer become `bnb.nn.Linear4bit`; embeddings, norms and lm_head stay float32. Asserted
    below (`quantised_modules`).
(b) Quantising a weight: `Params4bit._quantize` -> `functional.quantize_4bit` (functional.py
    lines 925-969) -> op `quantize_4bit`, which has no CPU kernel, so the default one runs
    (backends/default/ops.py lines 233-260): the weight as float32, blocks of 64 in row-major
    order, `absmax = |block|.max()`, `scaled = clamp(A * (1.0 / absmax.clamp(min=1e-38)), -1,
    1)` (the reciprocal, then a multiply), `q = bucketize(scaled, midpoints)` with the
    midpoints of the sorted code (lines 226-230; for FP4 `q = order[q]`, so a small positive
    value gets the code of -0).
(c) Double quantisation (functional.py lines 938-940): `offset = absmax.mean()` (torch's
    cascade sum, then a division by the count), then `quantize_blockwise(absmax - offset,
    blocksize=256)` -> the CPU C kernel `quantize_cpu_impl` (backends/cpu/ops.py lines 38-59;
    csrc/cpu_ops.cpp): per block of 256 its max |a| and `inv = 1 / max`, code =
    `lut[(uint16)(((clamp(a * inv) + 1) * 0.5) * 65535 + 0.5)]`, the lut holding for each of
    65 536 bins the nearest code by midpoints (`build_quantize_lut`). The code table is
    `create_dynamic_map(signed=True)` (functional.py line 296).
(d) The forward: `Linear4bit.forward` (nn/modules.py lines 609-635) -> `matmul_4bit`
    (autograd/_functions.py lines 407-491) -> op `gemm_4bit`, default kernel
    (backends/default/ops.py lines 323-342): `absmax = dequantize_blockwise(qabsmax, absmax2,
    code, 256, float32) + offset` (CPU kernel `dequantizeBlockwise8bitCpu`: `code[q] * absmax2`
    in f32), `W = dequantize_4bit(..., float32)` (CPU kernel `dequantizeBlockwise4bitCpu`:
    `code4[q] * absmax` in f32), then `torch.nn.functional.linear(x, W, bias)` in f32.
(e) One exception, and how it is taken out: on a CPU with AVX512-BF16 (this machine has it)
    `Linear4bit.forward` at inference repacks the weight (`_convert_weight_packed_for_cpu`,
    nn/modules.py lines 615-620) and runs the fused `gemv_4bit` kernel, which casts the input
    and the scales to bfloat16 and computes in bf16 whatever `bnb_4bit_compute_dtype` says
    (backends/cpu/ops.py lines 257-320). That is bitsandbytes' speed path for this CPU, not the
    float32 computation the configuration asks for (and what it computes on every other CPU
    and on GPU in training). The script sets `support_avx512bf16_for_cpu = False` on every
    4-bit layer, which makes the forward take (d), and checks for each layer that its output
    equals `F.linear(x, W)` with the hashed W bit for bit.

The peft side (`LoraLayer` for `bnb.nn.Linear4bit`, peft/tuners/lora/bnb.py): result =
base_layer(x); per adapter `lora_B(lora_A(dropout(x))) * scaling` added, in f32 (the adapter
weights stay f32: `cast_adapter_dtype`, peft_model.py lines 179-182).
"""

import argparse
import hashlib
import json
import sys
import time
from pathlib import Path

import numpy as np
import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))
import make_runner_fixtures as R  # noqa: E402  (sets torch threads = 1, quiet transformers)

import bitsandbytes  # noqa: E402
import bitsandbytes.functional as BF  # noqa: E402
import peft  # noqa: E402
import transformers  # noqa: E402
from peft import PeftModel  # noqa: E402
from tokenizers import Tokenizer  # noqa: E402
from transformers import AutoModelForCausalLM, AutoTokenizer, BitsAndBytesConfig  # noqa: E402

torch.set_num_threads(1)
OUT = R.OUT
MIN_MARGIN = 1e-3
QUANTS = {
    "nf4": ("nf4", True),
    "nf4-single": ("nf4", False),
    "fp4": ("fp4", True),
    "fp4-single": ("fp4", False),
}

RULE = (
    "Per 4-bit setting: AutoModelForCausalLM.from_pretrained(model_dir, dtype=torch.float32, "
    "attn_implementation='eager', quantization_config=BitsAndBytesConfig(load_in_4bit=True, "
    "bnb_4bit_quant_type=QT, bnb_4bit_use_double_quant=DQ, bnb_4bit_compute_dtype=torch.float32)) "
    "(transformers {tf}, torch {pt}, bitsandbytes {bnb}, CPU, 1 thread), every bnb Linear4bit with "
    "support_avx512bf16_for_cpu=False (the float32 path, see the script's docstring); adapters with "
    "PeftModel.from_pretrained(base, adapter_dir) (peft {pf}), unmerged. weights: per quantised module, "
    "sha256 of the little-endian f32 bytes of the [out, in] matrix the layer multiplies by (gemm_4bit's "
    "dequantisation). cases: make_runner_fixtures.run_cases (greedy generate, do_sample=False; same "
    "questions, system/no-system and max_new_tokens as expected.json). margins[i] is the top-1/top-2 "
    "logit gap at step i (7 significant digits); margin_ok is min_margin >= {mm}."
)


def sha(a):
    return hashlib.sha256(np.ascontiguousarray(a, dtype="<f4").tobytes()).hexdigest()


def forward_weight(layer):
    """The f32 matrix gemm_4bit multiplies by (backends/default/ops.py lines 323-342)."""
    qs = layer.weight.quant_state
    absmax = qs.absmax
    if qs.nested:
        absmax = (
            torch.ops.bitsandbytes.dequantize_blockwise.default(
                qs.absmax, qs.state2.absmax, qs.state2.code, qs.state2.blocksize, torch.float32
            )
            + qs.offset
        )
    return torch.ops.bitsandbytes.dequantize_4bit.default(
        layer.weight.data, absmax, qs.blocksize, qs.quant_type, qs.shape, torch.float32
    )


def load_4bit(mdir, qt, dq):
    cfg = BitsAndBytesConfig(
        load_in_4bit=True,
        bnb_4bit_quant_type=qt,
        bnb_4bit_use_double_quant=dq,
        bnb_4bit_compute_dtype=torch.float32,
    )
    model = AutoModelForCausalLM.from_pretrained(
        mdir, dtype=torch.float32, attn_implementation="eager", quantization_config=cfg, device_map="cpu"
    )
    model.eval()
    weights, names = {}, []
    gen = torch.Generator().manual_seed(0)
    for name, m in model.named_modules():
        if isinstance(m, bitsandbytes.nn.Linear4bit):
            m.support_avx512bf16_for_cpu = False  # (e): the float32 path
            qs = m.weight.quant_state
            assert qs.blocksize == 64 and qs.quant_type == qt and bool(qs.nested) == dq
            if dq:
                assert qs.state2.blocksize == 256
            W = forward_weight(m)
            x = torch.randn(3, W.shape[1], generator=gen)
            with torch.no_grad():
                y = m(x)
            want = torch.nn.functional.linear(x, W, m.bias)
            assert torch.equal(y, want), f"{name}: the forward does not multiply by the hashed matrix"
            weights[name + ".weight"] = dict(shape=list(W.shape), sha256=sha(W.numpy()))
            names.append(name)
        elif isinstance(m, torch.nn.Linear):
            assert "lm_head" in name, f"{name} left unquantised"
    assert names and not any("lm_head" in n or "embed" in n for n in names)
    return model, weights


def run_setting(fam, mdir, fdir, qname, tok, raw_tok, adapters):
    qt, dq = QUANTS[qname]
    model, weights = load_4bit(mdir, qt, dq)
    variants = []
    cases, _ = R.run_cases(model, tok, raw_tok)
    variants.append(("base", cases))
    for ad in adapters:
        base, _ = load_4bit(mdir, qt, dq)
        for m in base.modules():
            if isinstance(m, bitsandbytes.nn.Linear4bit):
                m.support_avx512bf16_for_cpu = False
        pm = PeftModel.from_pretrained(base, fdir / "adapters" / ad["name"])
        pm.eval()
        for m in pm.modules():
            if isinstance(m, bitsandbytes.nn.Linear4bit):
                assert m.support_avx512bf16_for_cpu is False
        cases, _ = R.run_cases(pm, tok, raw_tok)
        variants.append((ad["name"], cases))
    out = []
    for vname, cases in variants:
        for c in cases:
            row = dict(variant=vname, system=c["system"], question_index=c["question_index"],
                       max_new_tokens=c["max_new_tokens"])
            if "error" in c:
                row["error"] = c["error"]
            else:
                mm = min(c["margins"]) if c["margins"] else None
                row.update(output_ids=c["output_ids"], answer=c["answer"], margins=c["margins"],
                           min_margin=mm, margin_ok=mm is None or mm >= MIN_MARGIN)
            out.append(row)
    return dict(quant=qname, quant_type=qt, double_quant=dq, weights=weights, cases=out)


def dump(doc):
    head = {k: v for k, v in doc.items() if k != "settings"}
    text = json.dumps(head, indent=1, ensure_ascii=False)
    parts = []
    for s in doc["settings"]:
        lines = ["  {" + json.dumps({k: s[k] for k in ("quant", "quant_type", "double_quant")})[1:-1] + ","]
        lines.append('   "weights": {')
        lines.append(",\n".join(f"    {json.dumps(k)}: " + json.dumps(v, separators=(",", ":"))
                                for k, v in s["weights"].items()))
        lines.append("   },")
        lines.append('   "cases": [')
        lines.append(",\n".join("    " + json.dumps(c, ensure_ascii=False, separators=(",", ":")) for c in s["cases"]))
        lines.append("   ]")
        lines.append("  }")
        parts.append("\n".join(lines))
    return text[:-2] + ',\n "settings": [\n' + ",\n".join(parts) + "\n ]\n}\n"


SUM_LENGTHS = list(range(1, 130)) + [255, 256, 257, 1000, 4096, 5184, 13824, 32768, 40000, 917504]


def sums():
    """torch.sum / torch.mean of the vectors the Rust test rebuilds (tests/fixtures/nf4_sums.json)."""
    rows = []
    for n in SUM_LENGTHS:
        i = np.arange(n, dtype=np.int64)
        v = ((i * 7919 % 1000).astype(np.float32) / np.float32(3333.0) + np.float32(0.01)).astype(np.float32)
        t = torch.from_numpy(v)
        rows.append(dict(n=n, sum_bits=int(np.float32(t.sum().item()).view(np.uint32)),
                         mean_bits=int(np.float32(t.mean().item()).view(np.uint32))))
    out = OUT.parent / "nf4_sums.json"
    out.write_text(json.dumps(dict(
        generator="tests/reference/make_nf4_fixtures.py",
        rule=f"torch {torch.__version__.split('+')[0]} on CPU, {torch.get_num_threads()} thread: "
             "v[i] = f32(f32(i * 7919 % 1000) / 3333 + 0.01) for i < n; sum_bits and mean_bits are the "
             "IEEE bits of torch.sum(v) and torch.mean(v).",
        cpu_capability=torch.backends.cpu.get_cpu_capability(),
        cases=rows), indent=1) + "\n")
    R.log(f"wrote {out}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="*")
    ap.add_argument("--sums-only", action="store_true")
    args = ap.parse_args()
    sums()
    if args.sums_only:
        return
    fams = args.only or list(R.FAMILIES)
    R.log(f"torch {torch.__version__}, transformers {transformers.__version__}, peft {peft.__version__}, "
          f"bitsandbytes {bitsandbytes.__version__}")
    dynamic = BF.create_dynamic_map(signed=True).float().numpy()
    tables = dict(
        dynamic_sha256=sha(dynamic),
        nf4_sha256=sha(BF.get_4bit_type("nf4", device="cpu").float().numpy()),
        fp4_sha256=sha(BF.get_4bit_type("fp4", device="cpu").float().numpy()),
    )
    for fam in fams:
        t0 = time.time()
        spec = R.FAMILIES[fam]
        fdir = OUT / fam
        mdir = fdir / "model"
        tok = AutoTokenizer.from_pretrained(mdir)
        raw_tok = Tokenizer.from_file(str(mdir / "tokenizer.json"))
        settings = []
        for qname in QUANTS:
            s = run_setting(fam, mdir, fdir, qname, tok, raw_tok, spec["adapters"])
            ok = [c for c in s["cases"] if "output_ids" in c]
            R.log(f"{fam}/{qname}: {len(s['weights'])} quantised matrices, {len(ok)} cases, "
                  f"{sum(not c['margin_ok'] for c in ok)} below the margin rule")
            settings.append(s)
        doc = dict(
            family=fam,
            rule=RULE.format(tf=transformers.__version__, pt=torch.__version__.split("+")[0],
                             bnb=bitsandbytes.__version__, pf=peft.__version__, mm=MIN_MARGIN),
            versions=dict(torch=torch.__version__.split("+")[0], transformers=transformers.__version__,
                          peft=peft.__version__, bitsandbytes=bitsandbytes.__version__),
            generator="tests/reference/make_nf4_fixtures.py",
            min_margin_rule=MIN_MARGIN,
            tables=tables,
            settings=settings,
        )
        (fdir / "nf4.json").write_text(dump(doc))
        R.log(f"{fam}: wrote nf4.json ({(fdir / 'nf4.json').stat().st_size} bytes) in {time.time() - t0:.1f}s")


if __name__ == "__main__":
    main()
