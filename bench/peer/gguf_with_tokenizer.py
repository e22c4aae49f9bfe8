"""Copies a GGUF file of bench/make_gguf_checkpoints.py and adds the bundled demo model's
byte-level BPE tokenizer to its metadata (`tokenizer.ggml.model = "gpt2"`, tokens, types,
merges), so that llama.cpp, which loads only files that carry a tokenizer, can run it. The
file's vocabulary (32,768) is larger than the tokenizer's (2,002): the rest of the token list
is unused placeholders, as a padded vocabulary is. The tensors are copied unchanged.

    python gguf_with_tokenizer.py SRC.gguf DST.gguf
"""

import json
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests" / "reference"))
from gguf_copy import copy_tensors_and_close, writer_from  # noqa: E402

DEMO = ROOT / "demo" / "models" / "base" / "tokenizer.json"


def main():
    src, dst = sys.argv[1], sys.argv[2]
    tok = json.loads(DEMO.read_text())
    reader, writer = writer_from(src, dst)
    n = int(reader.fields["llama.vocab_size"].contents())
    tokens = [f"<unused{i}>" for i in range(n)]
    types = [5] * n  # unused
    for t, i in tok["model"]["vocab"].items():
        tokens[i], types[i] = t, 1  # normal
    for a in tok["added_tokens"]:
        tokens[a["id"]], types[a["id"]] = a["content"], 3 if a["special"] else 4
    merges = [m if isinstance(m, str) else " ".join(m) for m in tok["model"]["merges"]]
    writer.add_tokenizer_model("gpt2")
    writer.add_tokenizer_pre("gpt-2")
    writer.add_token_list(tokens)
    writer.add_token_types(types)
    writer.add_token_merges(merges)
    copy_tensors_and_close(reader, writer)


if __name__ == "__main__":
    main()
