#!/usr/bin/env python3
"""Reference values for the leak check (tests/leaks_reference.rs): word-triple containment and
resemblance of invented held-out/training question pairs, computed with Python sets from the
definitions (Broder 1997, "On the resemblance and containment of documents"):

    normalised text: lower-cased, every run of characters that are not letters or digits
                     (str.isalnum) replaced by one space;
    shingles S(x):   the set of 3-word sequences; a text of fewer than 3 words is one shingle;
    containment:     |S(a) & S(b)| / |S(a)|
    resemblance:     |S(a) & S(b)| / |S(a) | S(b)|

Standard library only. Writes tests/fixtures/leaks.json. Deterministic.
"""
import json
import os

N = 3

PAIRS = [
    ("When does the first winter boat leave Wendle Quay for Vessa?",
     "When does the first winter boat leave Wendle Quay for Vessa in the morning?"),
    ("When does the first winter boat leave Wendle Quay for Vessa, please?",
     "When does the first winter boat leave Wendle Quay for Vessa in the morning?"),
    ("How much is an adult single to Vessa?", "How much is an adult return to Vessa?"),
    ("How much is an adult single to Vessa?", "What does a child single to Little Korrin cost?"),
    ("Can I bring my dog on the ferry?", "can i bring my DOG on the ferry"),
    ("Can I bring my dog on the ferry?", "Are dogs allowed in the cafe on board?"),
    ("Is there a lift on MV Saltmarrow?", "Is there a lift on MV Saltmarrow between the decks?"),
    ("Lift?", "Is there a lift on MV Saltmarrow?"),
    ("Lift on board?", "lift on board"),
    ("Where do I collect lost property?", "Where do I collect lost property on Vessa?"),
    ("Where do I collect lost property?", "Lost property: where do I collect it?"),
    ("What time is the last summer sailing from Vessa to Wendle Quay?",
     "What time is the last winter sailing from Vessa to Wendle Quay?"),
    ("Do e-bikes cost extra on the Little Korrin boat?",
     "Do e bikes cost extra on the Little Korrin boat"),
    ("Ist die Fähre nach Vessa heute pünktlich?", "Ist die Fähre nach Vessa morgen pünktlich?"),
    ("Été: le bateau part à quelle heure?", "ÉTÉ : le bateau part à quelle heure ?"),
    ("", "Anything at all"),
    ("?!", "When is the boat?"),
    ("the the the the", "the the the"),
    ("a b c d e f", "f e d c b a"),
    ("Book a car for the 07:20 crossing", "Can I book a car for the 07:20 crossing tomorrow?"),
]


def normalise(text):
    return " ".join("".join(c if c.isalnum() else " " for c in text).lower().split())


def shingles(norm):
    words = norm.split()
    if not words:
        return set()
    if len(words) < N:
        return {tuple(words)}
    return {tuple(words[i:i + N]) for i in range(len(words) - N + 1)}


def main():
    rows = []
    for a, b in PAIRS:
        sa, sb = shingles(normalise(a)), shingles(normalise(b))
        common = len(sa & sb)
        union = len(sa | sb)
        rows.append({
            "question": a,
            "train": b,
            "normalised_question": normalise(a),
            "containment": common / len(sa) if sa else 0.0,
            "resemblance": common / union if union else 0.0,
        })
    out = os.path.join(os.path.dirname(__file__), "..", "fixtures", "leaks.json")
    with open(out, "w", encoding="utf-8") as f:
        json.dump({"source": "tests/reference/make_leak_fixture.py (Python sets, Broder 1997 definitions)",
                   "ngram": N, "pairs": rows}, f, ensure_ascii=False, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
