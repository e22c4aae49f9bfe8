#!/usr/bin/env python3
"""Reference for "merge a LoRA adapter into a 16-bit base with peft and save it".

What a team gets when it loads the base in bf16 (or f16), wraps it with
`PeftModel.from_pretrained(base, adapter_dir)` (default arguments), calls
`merge_and_unload()` and `save_pretrained()`. For every family and adapter committed under
tests/fixtures/runner/ (read as committed; nothing is rebuilt) this script records

  * every saved tensor that differs from the base loaded in the same 16-bit dtype: name,
    safetensors dtype, shape, sha256 of its raw little-endian bytes as saved;
  * the greedy answers of the saved directory reloaded with dtype=torch.float32 and eager
    attention, for the same cases as make_runner_fixtures.py (its `run_cases`), with the
    per-step top-1/top-2 margins; a case whose smallest margin is below 1e-3 is kept and
    flagged `margin_ok: false`.

Output: tests/fixtures/runner/<family>/merged16.json. Usage (from anywhere):

    nice -n 10 /path/to/venv/bin/python tests/reference/make_merged16_fixtures.py [--only FAMILY ...]

The merge arithmetic on a 16-bit base on CPU, as read in peft 0.21.2 (line numbers refer to
the installed package, site-packages/peft/) and checked bit for bit below for every merged
tensor of every entry (`check_entry`) and on a synthetic model for the cases the committed
adapters do not contain (`check_synthetic`: embedding LoRA, lora_B bias):

(a) Adapter weights stay float32. `LoraLayer.update_layer` creates lora_A/lora_B as
    `nn.Linear` (f32, tuners/lora/layer.py:263-264) and `_move_adapter_to_device_of_base_layer`
    (layer.py:314 -> tuners/tuners_utils.py:2168-2212) casts them to the base layer's dtype
    (bf16). But `PeftModel.__init__` then calls `_cast_adapter_dtype` (peft_model.py:179-182,
    `autocast_adapter_dtype=True` by default, peft_model.py:157 and 425) ->
    `cast_adapter_dtype` (tuners_utils.py:2705-2760), which upcasts every float16/bfloat16
    adapter parameter of every BaseTunerLayer to float32. Only after that are the saved
    weights copied in with `model.load_state_dict(..., strict=False)`
    (utils/save_and_load.py:649, a copy_ into the existing f32 parameters, so exact), and
    load_adapter casts once more (peft_model.py:1597-1599, a no-op). So A and B are the
    file's f32 values, never rounded to bf16.
(b) `Linear.get_delta_weight` (layer.py:1044-1071): `cast_to_fp32` is decided from lora_B's
    dtype (layer.py:1055-1058), which is f32, so it is False and nothing is cast;
    `delta = transpose(B @ A, fan_in_fan_out) * scaling` (layer.py:1067), all in f32: first the
    f32 matmul B[out,r] @ A[r,in], then one f32 multiply by the Python float `scaling`
    (alpha/r, or alpha/sqrt(r) with rsLoRA, layer.py:278-281; torch converts the scalar to
    f32 first). With torch 2.15.0's CPU matmul (MKL, one thread) each element of B@A is a
    sequential fused multiply-add chain acc = fma(B[o,k], A[k,i], acc) for k = 0..r-1
    starting from acc = 0 (verified below for every merged module; a plain multiply-then-add
    sum does NOT match bit for bit). The delta is returned in f32 (not cast to bf16).
(c) `Linear.merge` with the default safe_merge=False (merge_and_unload's default,
    tuners_utils.py:742) does `base_layer.weight.data += delta_weight` (layer.py:1005-1008):
    an in-place add of an f32 tensor into a bf16 tensor, which torch computes as
    bf16_rne(f32(W16) + delta_f32): ONE rounding of the f32 sum to the 16-bit dtype
    (round to nearest, ties to even). (safe_merge=True would instead do
    `orig_weight += delta_weight.to(orig_dtype)`, layer.py:977-978, two roundings; not the
    default.) The same holds with an f16 base.
    Overall, per element: W' = rne16( f32(W16) + rne32( fmachain_k(B[o,k]*A[k,i]) * f32(scaling) ) )
    where W16 is the base weight as loaded in the 16-bit dtype (transformers casts an f32 or
    f16 checkpoint with round to nearest even).
(d) lora_B bias (`lora_bias=True`, none of the committed adapters use it):
    `base_layer.bias.data += self.lora_B[a].bias * self.scaling[a]` (layer.py:1012-1017):
    f32 bias times f32(scaling), then the same one-rounding in-place add into the 16-bit bias.
(e) Embedding LoRA (`Embedding.merge`, layer.py:1332-1374): `get_delta_weight`
    (layer.py:1394-1421) computes `transpose(lora_embedding_B @ lora_embedding_A, True) *
    scaling` in f32, but the merge does `base_layer.weight.data +=
    self.get_delta_weight(active_adapter).to(orig_dtype)` (layer.py:1371): the delta is FIRST
    rounded to bf16, then added (and the sum rounded again): two roundings,
    W' = rne16(f32(W16) + f32(rne16(delta))). A LoRA on an untied `lm_head` is an ordinary
    `Linear` and follows (b)/(c). `modules_to_save` (e.g. lm_head): `ModulesToSaveWrapper.update`
    deep-copies the 16-bit module (utils/other.py:632-653); the wrapper is not a
    BaseTunerLayer, so `cast_adapter_dtype` (tuners_utils.py:2730) leaves it 16-bit, and the
    saved f32 copy is rounded to 16 bits by load_state_dict's copy_ (round to nearest even);
    merge_and_unload returns that copy as the module (utils/other.py:800-821). So the saved
    lm_head = rne16(adapter's f32 modules_to_save tensor), independent of the base.
Not covered: LoRA on a tied lm_head/embedding, DoRA and other variants, fan_in_fan_out.
"""

import argparse
import hashlib
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))
import make_runner_fixtures as R  # noqa: E402  (sets torch threads = 1, quiet transformers)

import peft  # noqa: E402
import safetensors  # noqa: E402
import transformers  # noqa: E402
from peft import LoraConfig, PeftModel, get_peft_model  # noqa: E402
from peft.tuners.lora.layer import LoraLayer  # noqa: E402
from peft.utils.other import ModulesToSaveWrapper  # noqa: E402
from safetensors import safe_open  # noqa: E402
from tokenizers import Tokenizer  # noqa: E402
from transformers import AutoModelForCausalLM, AutoTokenizer, LlamaConfig  # noqa: E402

torch.set_num_threads(1)
OUT = R.OUT
MIN_MARGIN = 1e-3
DTYPES = {"bf16": torch.bfloat16, "f16": torch.float16}
ST_DTYPE = {torch.bfloat16: "BF16", torch.float16: "F16", torch.float32: "F32"}

RULE = (
    "Per adapter and 16-bit dtype: base = AutoModelForCausalLM.from_pretrained(model_dir, dtype=torch.{dt}) "
    "(transformers {tf}, torch {pt}, CPU, 1 thread); PeftModel.from_pretrained(base, adapter_dir) with default "
    "arguments (peft {pf}); merge_and_unload() (safe_merge=False); save_pretrained(tmp) (safetensors {st}). "
    "tensors: every tensor of the saved *.safetensors whose bytes differ from the same tensor of the base "
    "loaded with dtype=torch.{dt} (so a tensor that is only cast is not listed); sha256 is over the raw "
    "little-endian bytes of the tensor as stored in the file (read with safetensors.safe_open). cases: the "
    "saved directory reloaded with from_pretrained(tmp, dtype=torch.float32, attn_implementation='eager') and "
    "run with make_runner_fixtures.run_cases (tokenizer from the family's model/ directory; greedy generate, "
    "do_sample=False; same questions, system/no-system and max_new_tokens as expected.json). margins[i] is the "
    "top-1/top-2 logit gap at step i (7 significant digits), min_margin their minimum; margin_ok is "
    "min_margin >= {mm}. same_as_f32_merge tells whether output_ids equal those of the f32 merge in "
    "expected.json. Merge arithmetic (verified bit for bit by the script): "
    "W' = rne16(f32(W16) + rne32(fma-chain_k(B[o,k]*A[k,i]) * f32(scaling))) for LoRA Linear layers; "
    "modules_to_save tensors = rne16(adapter f32 tensor)."
)


# --------------------------------------------------------------------------------------
# Bit-level helpers (numpy; independent of torch's kernels)
# --------------------------------------------------------------------------------------


def f32_to_bf16_bits(x):
    """Round f32 -> bf16 to nearest, ties to even; returns uint16 bits (finite inputs)."""
    u = np.ascontiguousarray(x, dtype=np.float32).view(np.uint32).astype(np.uint64)
    r = (u + 0x7FFF + ((u >> 16) & 1)) >> 16
    return r.astype(np.uint16)


def bf16_bits_to_f32(b):
    return (b.astype(np.uint32) << 16).view(np.float32)


def round16(x, dt):
    """f32 array -> (bits uint16, value as f32) after round-to-nearest-even to dt."""
    if dt == torch.bfloat16:
        b = f32_to_bf16_bits(x)
        return b, bf16_bits_to_f32(b)
    h = np.asarray(x, dtype=np.float32).astype(np.float16)  # numpy rounds to nearest even
    return h.view(np.uint16), h.astype(np.float32)


def fma_chain(Bm, Am):
    """acc = fma(B[:, k], A[k, :], acc) for k = 0..r-1, acc0 = 0, in f32.

    The product of two f32 values is exact in f64 and the f64 sum is rounded once to f32, which
    equals a true fused multiply-add except in double-rounding corner cases (none occurred)."""
    acc = np.zeros((Bm.shape[0], Am.shape[1]), np.float32)
    for k in range(Bm.shape[1]):
        acc = (acc.astype(np.float64) + Bm[:, k : k + 1].astype(np.float64) * Am[k : k + 1, :].astype(np.float64)).astype(
            np.float32
        )
    return acc


def linear_merge_formula(w16_bits_as_f32, A, B, scaling, dt):
    delta = (fma_chain(B, A) * np.float32(scaling)).astype(np.float32)
    s = (w16_bits_as_f32.astype(np.float32) + delta).astype(np.float32)
    return round16(s, dt)[0]


def tensor_bytes(t):
    return t.contiguous().view(torch.uint8).numpy().tobytes() if t.dim() else t.reshape(1).view(torch.uint8).numpy().tobytes()


def to_bits16(t):
    return t.contiguous().view(torch.int16).numpy().view(np.uint16)


def read_saved(d):
    out = {}
    for f in sorted(Path(d).glob("*.safetensors")):
        with safe_open(str(f), framework="pt") as fh:
            for k in fh.keys():
                out[k] = fh.get_tensor(k)
    return out


def read_st_f32(path):
    out = {}
    with safe_open(str(path), framework="pt") as fh:
        for k in fh.keys():
            out[k] = fh.get_tensor(k)
    return out


def stored_base(mdir):
    out = {}
    for f in sorted(Path(mdir).glob("*.safetensors")):
        out.update(read_st_f32(f))
    return out


# --------------------------------------------------------------------------------------
# One entry: adapter x dtype
# --------------------------------------------------------------------------------------


def adapter_key_for(module_name):
    # peft state dict names: base_model.model.<module>.lora_A.weight
    return f"base_model.model.{module_name}"


def check_entry(pm_modules, saved, base16, stored, adapter_sd, dt):
    """Recompute every differing tensor from the stated formula; returns notes per tensor."""
    notes = {}
    for kind, name, scaling in pm_modules:
        wname = f"{name}.weight"
        if kind == "lora":
            A = adapter_sd[adapter_key_for(name) + ".lora_A.weight"].float().numpy()
            B = adapter_sd[adapter_key_for(name) + ".lora_B.weight"].float().numpy()
            # W16 from the stored checkpoint, rounded independently of transformers
            w = stored[wname].float().numpy()
            _, w16 = round16(w, dt) if stored[wname].dtype != dt else (None, stored[wname].float().numpy())
            assert np.array_equal(w16, base16[wname].float().numpy()), f"{wname}: base cast is not rne16"
            want = linear_merge_formula(w16, A, B, scaling, dt)
            got = to_bits16(saved[wname])
            if not np.array_equal(want, got):
                n = int((want != got).sum())
                # diagnose: two roundings? plain sum?
                raise AssertionError(f"{wname}: formula differs from peft in {n} elements")
            # also confirm the plain (non-fma) sum would NOT always match, i.e. the test is sharp
            plain = np.zeros_like(A[:1, :].repeat(B.shape[0], 0))
            for k in range(B.shape[1]):
                plain = (plain + (B[:, k : k + 1] * A[k : k + 1, :]).astype(np.float32)).astype(np.float32)
            s2 = (w16 + (plain * np.float32(scaling)).astype(np.float32)).astype(np.float32)
            two = (w16 + round16((fma_chain(B, A) * np.float32(scaling)).astype(np.float32), dt)[1]).astype(np.float32)
            notes[wname] = dict(
                kind="lora",
                scaling=scaling,
                r=int(A.shape[0]),
                plain_sum_mismatches=int((round16(s2, dt)[0] != got).sum()),
                two_rounding_mismatches=int((round16(two, dt)[0] != got).sum()),
            )
        else:  # modules_to_save
            key = adapter_key_for(name) + ".weight"
            src = adapter_sd[key].float().numpy()
            want = round16(src, dt)[0]
            got = to_bits16(saved[wname])
            assert np.array_equal(want, got), f"{wname}: modules_to_save is not rne16(adapter tensor)"
            notes[wname] = dict(kind="modules_to_save")
    return notes


def run_entry(fam, mdir, adir, dname, tok, raw_tok, stored, f32_cases):
    dt = DTYPES[dname]
    base = AutoModelForCausalLM.from_pretrained(mdir, dtype=dt)
    base16 = {k: v.detach().clone() for k, v in base.state_dict().items()}
    pm = PeftModel.from_pretrained(base, adir)
    pm.eval()
    modules, loaded_dtypes = [], set()
    for name, mod in pm.base_model.model.named_modules():
        if isinstance(mod, LoraLayer) and "default" in getattr(mod, "lora_A", {}):
            modules.append(("lora", name, mod.scaling["default"]))
            loaded_dtypes.add(("lora_A/B", str(mod.lora_A["default"].weight.dtype), str(mod.lora_B["default"].weight.dtype)))
        elif isinstance(mod, ModulesToSaveWrapper):
            modules.append(("modules_to_save", name, None))
            loaded_dtypes.add(("modules_to_save", str(mod.modules_to_save["default"].weight.dtype)))
    merged = pm.merge_and_unload()
    adapter_sd = read_st_f32(adir / "adapter_model.safetensors")
    with tempfile.TemporaryDirectory() as tmp:
        merged.save_pretrained(tmp)
        del merged, pm, base
        saved = read_saved(tmp)
        tensors = []
        for name in sorted(saved):
            t = saved[name]
            b = base16.get(name)
            if b is not None and b.dtype == t.dtype and b.shape == t.shape and torch.equal(b.view(torch.int16), t.view(torch.int16)):
                continue
            tensors.append(
                dict(name=name, dtype=ST_DTYPE[t.dtype], shape=list(t.shape), sha256=hashlib.sha256(tensor_bytes(t)).hexdigest())
            )
        notes = check_entry(modules, saved, base16, stored, adapter_sd, dt)
        listed = {t["name"] for t in tensors}
        expected_names = set(notes)
        assert listed == expected_names, f"differing tensors {sorted(listed ^ expected_names)} not explained"
        model = AutoModelForCausalLM.from_pretrained(tmp, dtype=torch.float32, attn_implementation="eager")
        model.eval()
        cases, _ = R.run_cases(model, tok, raw_tok)
    out_cases = []
    for c in cases:
        e = dict(system=c["system"], question_index=c["question_index"], max_new_tokens=c["max_new_tokens"])
        if "error" in c:
            e["error"] = c["error"]
        else:
            mm = min(c["margins"])
            ref = f32_cases.get((c["system"], c["question_index"]))
            e.update(
                output_ids=c["output_ids"],
                answer=c["answer"],
                finish=c["finish"],
                margins=c["margins"],
                min_margin=mm,
                margin_ok=mm >= MIN_MARGIN,
                same_as_f32_merge=(ref is not None and ref == c["output_ids"]),
            )
        out_cases.append(e)
    for t in tensors:
        n = notes[t["name"]]
        t["merge"] = n["kind"]
        if n["kind"] == "lora":
            t["scaling"] = n["scaling"]
    return dict(adapter=adir.name, dtype=dname, tensors=tensors, cases=out_cases), notes, sorted(loaded_dtypes)


# --------------------------------------------------------------------------------------
# Synthetic check of (d) lora_B bias and (e) embedding LoRA, which no committed adapter has
# --------------------------------------------------------------------------------------


def check_synthetic():
    """Two adapters on a tiny in-memory Llama with q/k/v biases: (1) lora_bias=True on q_proj
    (peft refuses lora_bias on embeddings and on a bias-less lm_head), (2) rsLoRA on
    embed_tokens, lm_head (untied) and q_proj. Both merged on bf16 and f16 bases and compared
    with the formulas of the docstring."""
    cfg = LlamaConfig(vocab_size=48, hidden_size=32, intermediate_size=48, num_hidden_layers=1, num_attention_heads=4,
                      num_key_value_heads=2, attention_bias=True, tie_word_embeddings=False, max_position_embeddings=64)
    torch.manual_seed(3)
    m = AutoModelForCausalLM.from_config(cfg, dtype=torch.float32)
    pre = "base_model.model."
    q = "model.layers.0.self_attn.q_proj"
    res = {}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        m.save_pretrained(tmp / "base")
        stored = read_st_f32(tmp / "base" / "model.safetensors")
        configs = {
            "bias": LoraConfig(r=4, lora_alpha=8, lora_bias=True, lora_dropout=0.0, target_modules=["q_proj"]),
            "embed": LoraConfig(r=3, lora_alpha=8, use_rslora=True, lora_dropout=0.0,
                                target_modules=["q_proj", "embed_tokens", "lm_head"]),
        }
        for cname, lc in configs.items():
            pm = get_peft_model(AutoModelForCausalLM.from_pretrained(tmp / "base", dtype=torch.float32), lc)
            g = torch.Generator().manual_seed(5)
            with torch.no_grad():
                for n, p in pm.named_parameters():
                    if "lora_" in n:
                        p.copy_(torch.randn(p.shape, generator=g) * 0.3)
            pm.save_pretrained(tmp / cname)
            ad = read_st_f32(tmp / cname / "adapter_model.safetensors")
            for dname, dt in DTYPES.items():
                pm = PeftModel.from_pretrained(AutoModelForCausalLM.from_pretrained(tmp / "base", dtype=dt), tmp / cname)
                sc = pm.base_model.model.model.layers[0].self_attn.q_proj.scaling["default"]
                merged = pm.merge_and_unload()
                merged.save_pretrained(tmp / f"m{cname}{dname}")
                saved = read_saved(tmp / f"m{cname}{dname}")
                r = {}
                w16 = round16(stored[q + ".weight"].numpy(), dt)[1]
                A, B = ad[pre + q + ".lora_A.weight"].numpy(), ad[pre + q + ".lora_B.weight"].numpy()
                assert np.array_equal(linear_merge_formula(w16, A, B, sc, dt), to_bits16(saved[q + ".weight"])), "q_proj"
                if cname == "bias":
                    b16 = round16(stored[q + ".bias"].numpy(), dt)[1]
                    bb = ad[pre + q + ".lora_B.bias"].numpy()
                    want = round16((b16 + (bb * np.float32(sc)).astype(np.float32)).astype(np.float32), dt)[0]
                    assert np.array_equal(want, to_bits16(saved[q + ".bias"])), "lora_B bias"
                    r["lora_bias_one_rounding_ok"] = True
                else:
                    w16 = round16(stored["lm_head.weight"].numpy(), dt)[1]
                    A, B = ad[pre + "lm_head.lora_A.weight"].numpy(), ad[pre + "lm_head.lora_B.weight"].numpy()
                    assert np.array_equal(linear_merge_formula(w16, A, B, sc, dt), to_bits16(saved["lm_head.weight"])), "lm_head"
                    r["lm_head_lora_as_linear_ok"] = True
                    w16 = round16(stored["model.embed_tokens.weight"].numpy(), dt)[1]
                    EA = ad[pre + "model.embed_tokens.lora_embedding_A"].numpy()  # [r, vocab]
                    EB = ad[pre + "model.embed_tokens.lora_embedding_B"].numpy()  # [hidden, r]
                    delta = np.ascontiguousarray((fma_chain(EB, EA) * np.float32(sc)).astype(np.float32).T)  # [vocab, hidden]
                    two = round16((w16 + round16(delta, dt)[1]).astype(np.float32), dt)[0]
                    one = round16((w16 + delta).astype(np.float32), dt)[0]
                    got = to_bits16(saved["model.embed_tokens.weight"])
                    assert np.array_equal(two, got), "embedding: delta rounded to 16 bits, then added"
                    r["embedding_two_roundings_ok"] = True
                    r["embedding_one_rounding_would_mismatch_elements"] = int((one != got).sum())
                res[f"{cname}/{dname}"] = r
    return res


# --------------------------------------------------------------------------------------


def dump(doc):
    head = {k: v for k, v in doc.items() if k != "entries"}
    text = json.dumps(head, indent=1, ensure_ascii=False)
    parts = []
    for e in doc["entries"]:
        eh = {k: v for k, v in e.items() if k not in ("tensors", "cases")}
        lines = ["  {" + json.dumps(eh, ensure_ascii=False)[1:-1] + ","]
        lines.append('   "tensors": [')
        lines.append(",\n".join("    " + json.dumps(t, separators=(",", ":")) for t in e["tensors"]))
        lines.append("   ],")
        lines.append('   "cases": [')
        lines.append(",\n".join("    " + json.dumps(c, ensure_ascii=False, separators=(",", ":")) for c in e["cases"]))
        lines.append("   ]")
        lines.append("  }")
        parts.append("\n".join(lines))
    return text[:-2] + ',\n "entries": [\n' + ",\n".join(parts) + "\n ]\n}\n"


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="*")
    args = ap.parse_args()
    fams = args.only or list(R.FAMILIES)
    t_all = time.time()
    R.log(f"torch {torch.__version__}, transformers {transformers.__version__}, peft {peft.__version__}, "
          f"safetensors {safetensors.__version__}, numpy {np.__version__}")
    syn = check_synthetic()
    R.log(f"synthetic lora_bias / lm_head / embedding checks: {syn}")
    for fam in fams:
        t0 = time.time()
        spec = R.FAMILIES[fam]
        fdir = OUT / fam
        mdir = fdir / "model"
        tok = AutoTokenizer.from_pretrained(mdir)
        raw_tok = Tokenizer.from_file(str(mdir / "tokenizer.json"))
        stored = stored_base(mdir)
        exp = json.loads((fdir / "expected.json").read_text())
        dnames = ["bf16"] + (["f16"] if spec["dtype"] == "float16" else [])
        entries, checks = [], {}
        for ad in spec["adapters"]:
            adir = fdir / "adapters" / ad["name"]
            f32_cases = {(c["system"], c["question_index"]): c.get("output_ids") for c in exp["cases"] if c["variant"] == ad["name"]}
            for dname in dnames:
                e, notes, loaded = run_entry(fam, mdir, adir, dname, tok, raw_tok, stored, f32_cases)
                entries.append(e)
                lo = [n for n in notes.values() if n["kind"] == "lora"]
                key = f"{ad['name']}/{dname}"
                checks[key] = dict(
                    tensors_verified=len(notes),
                    loaded_adapter_dtypes=[list(x) for x in loaded],
                    plain_sum_mismatching_elements=sum(n["plain_sum_mismatches"] for n in lo),
                    two_rounding_mismatching_elements=sum(n["two_rounding_mismatches"] for n in lo),
                )
                ok = [c for c in e["cases"] if "output_ids" in c]
                R.log(f"{fam}/{ad['name']}/{dname}: {len(e['tensors'])} tensors verified bit for bit; "
                      f"same as f32 merge {sum(c['same_as_f32_merge'] for c in ok)}/{len(ok)}; "
                      f"min margin {min(c['min_margin'] for c in ok):.3g}; checks {checks[key]}")
        rule = RULE.format(dt="bfloat16 (and torch.float16 for f16 entries)" if len(dnames) > 1 else "bfloat16",
                           tf=transformers.__version__, pt=torch.__version__.split("+")[0], pf=peft.__version__,
                           st=safetensors.__version__, mm=MIN_MARGIN)
        doc = dict(
            family=fam,
            rule=rule,
            stored_dtype=spec["dtype"],
            versions=dict(torch=torch.__version__.split("+")[0], transformers=transformers.__version__,
                          peft=peft.__version__, safetensors=safetensors.__version__, numpy=np.__version__),
            generator="tests/reference/make_merged16_fixtures.py",
            min_margin_rule=MIN_MARGIN,
            formula_checks=checks,
            entries=entries,
        )
        (fdir / "merged16.json").write_text(dump(doc))
        R.log(f"{fam}: wrote merged16.json ({(fdir / 'merged16.json').stat().st_size} bytes) in {time.time() - t0:.1f}s")
    R.log(f"all done in {time.time() - t_all:.1f}s")


if __name__ == "__main__":
    main()
