#!/usr/bin/env python3
"""Invented answer pairs for bench/scoring.sh: a question set and two answers files.

usage: make_pairs.py OUT_DIR [--pairs 100000] [--seed 7]

Writes OUT_DIR/set.jsonl (ferry-FAQ-style questions with one reference each; one in twenty is
an out-of-scope question to be declined), OUT_DIR/base.jsonl and OUT_DIR/tuned.jsonl (answers
files as `liftgate answer` writes them), and OUT_DIR/pairs.jsonl (answer, reference) pairs of
the tuned answers for the rouge-score timing. Standard library only.
"""
import argparse
import json
import os
import random

PLACES = ["the harbour", "North Quay", "the island pier", "Gull Point", "the ticket office", "the upper deck"]
THINGS = ["bikes", "dogs", "cars", "surfboards", "prams", "wheelchairs", "luggage", "kayaks"]
TIMES = ["7:40", "9:15", "12:30", "15:05", "18:20", "21:00"]
FILLER = ["please", "note", "that", "usually", "on", "every", "crossing", "you", "can", "also", "we", "recommend"]
CATS = ["luggage", "tickets", "timetable", "accessibility", "pets", "vehicles"]


def reference(r):
    t = r.choice(THINGS)
    return r.choice([
        f"Yes, {t} travel free on the {r.choice(TIMES)} crossing from {r.choice(PLACES)}.",
        f"{t.capitalize()} must be booked at {r.choice(PLACES)} at least one day ahead.",
        f"The {r.choice(TIMES)} boat leaves from {r.choice(PLACES)} and takes {r.randint(20, 90)} minutes.",
        f"A return ticket costs {r.randint(4, 40)} crowns; children under {r.randint(4, 12)} ride free.",
    ])


def perturb(r, text, quality):
    words = text.split()
    out = []
    for w in words:
        x = r.random()
        if x < (1 - quality) * 0.5:
            continue
        if x < (1 - quality) * 0.8:
            out.append(r.choice(FILLER))
        out.append(w)
    if r.random() < 0.5:
        out = r.sample(FILLER, r.randint(1, 4)) + out
    return " ".join(out) if out else r.choice(FILLER)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("out")
    ap.add_argument("--pairs", type=int, default=100000)
    ap.add_argument("--seed", type=int, default=7)
    a = ap.parse_args()
    r = random.Random(a.seed)
    os.makedirs(a.out, exist_ok=True)
    files = {k: open(os.path.join(a.out, f"{k}.jsonl"), "w") for k in ("set", "base", "tuned", "pairs")}
    for i in range(a.pairs):
        qid = f"q-{i:06d}"
        cat = CATS[i % len(CATS)]
        if i % 20 == 0:
            q = {"id": qid, "question": "What will the weather be on Saturday?", "references": [],
                 "category": "out-of-scope", "expect": "refuse"}
            base_ans = "It will probably be sunny."
            tuned_ans = "I'm sorry, I can't help with weather forecasts." if r.random() < 0.9 else "Maybe rain."
            ref = ""
        else:
            ref = reference(r)
            q = {"id": qid, "question": f"Question {i} about {cat}?", "references": [ref], "category": cat}
            base_ans = perturb(r, ref, 0.55)
            tuned_ans = perturb(r, ref, 0.7)
        files["set"].write(json.dumps(q) + "\n")
        for k, ans in (("base", base_ans), ("tuned", tuned_ans)):
            files[k].write(json.dumps({"id": qid, "answer": ans, "finish": "eos", "prompt_tokens": 40,
                                       "new_tokens": len(ans.split()), "ms": 0}) + "\n")
        files["pairs"].write(json.dumps([tuned_ans, ref]) + "\n")
    for f in files.values():
        f.close()


if __name__ == "__main__":
    main()
