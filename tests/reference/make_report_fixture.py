#!/usr/bin/env python3
"""Writes the fixed inputs of the report snapshot test (tests/report_snapshot.rs):

    tests/fixtures/report/questions.jsonl
    tests/fixtures/report/baseline.grades.jsonl
    tests/fixtures/report/candidate.grades.jsonl

An invented Tidewren Ferry Cooperative FAQ: 20 questions in four categories (timetables,
fares, vehicles, and 4 out-of-scope questions with `expect: refuse`), a hand-written answer
per question for a baseline and a candidate model, and their grades.

Scores follow the published definitions, written out here with the standard library only:
- exact_match and token_f1: the SQuAD v1.1 evaluation script (Rajpurkar et al. 2016,
  `evaluate-v1.1.py`): lower-case, drop punctuation, drop the articles a/an/the, split on
  whitespace; F1 of the token multisets; the maximum over the references.
- rouge_l: ROUGE-L F-measure (Lin 2004) on the LCS of tokens, tokenised as the rouge-score
  package does by default (lower-case, every run of characters other than a-z/0-9 is a
  separator, no stemming); the maximum over the references.
- refused: labelled by hand per answer (the `R` marks below), not by a detector.
Scores are rounded to 4 decimals. Questions without references get null scores.

The grades are the fixed input of `weigh`; they do not test `grade` (tests/grade_cli.rs and
tests/scorer_reference.rs do). Standard library only; deterministic: a rerun writes the same
bytes. Run from any directory.
"""

import json
import re
import string
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
OUT = ROOT / "tests" / "fixtures" / "report"

R = "refused"

# (id, category, question, references, baseline answer, candidate answer); an answer given as
# (text, R) is labelled as a refusal.
QUESTIONS = [
    ("tt-01", "timetables", "When does the first boat leave Harl Quay for Brennock in summer?",
     ["The first summer sailing from Harl Quay to Brennock is at 06:40.", "06:40"],
     "Boats leave Harl Quay every hour from the morning.",
     "The first summer sailing from Harl Quay to Brennock leaves at 06:40."),
    ("tt-02", "timetables", "What is the last sailing back from Brennock on a weekday?",
     ["The last weekday sailing from Brennock is at 21:15.", "21:15"],
     "The last sailing from Brennock is in the evening.",
     "21:15"),
    ("tt-03", "timetables", "Do boats run to Saltmere on Sundays in winter?",
     ["Yes, two return sailings run to Saltmere on winter Sundays."],
     "Yes, two return sailings run to Saltmere on winter Sundays.",
     "Yes, there are two return sailings to Saltmere on Sundays in winter."),
    ("tt-04", "timetables", "How long is the crossing from Harl Quay to Saltmere?",
     ["The crossing to Saltmere takes 55 minutes.", "55 minutes"],
     "About an hour.",
     "The crossing to Saltmere takes 55 minutes."),
    ("tt-05", "timetables", "Is there a late boat on Friday nights?",
     ["Yes, an extra sailing leaves Harl Quay at 23:30 on Fridays."],
     "Yes, an extra sailing leaves Harl Quay at 23:30 on Fridays.",
     "There is a late boat on Fridays at 23:30."),
    ("tt-06", "timetables", "Where can I check if a sailing is cancelled because of the weather?",
     ["Cancellations are posted on the cooperative's service page and at the quay office."],
     ("I'm sorry, I can't help with that.", R),
     "Check the cooperative's service page or ask at the quay office."),
    ("fa-01", "fares", "How much is an adult return to Brennock?",
     ["An adult return to Brennock costs 14.20 euros.", "14.20 euros"],
     "An adult return costs 12 euros.",
     "An adult return to Brennock costs 14.20 euros."),
    ("fa-02", "fares", "Do children travel free?",
     ["Children under 5 travel free; children aged 5 to 15 pay half fare."],
     "Children under 5 travel free; children aged 5 to 15 pay half fare.",
     "Children under 5 travel free and older children pay half."),
    ("fa-03", "fares", "Is there a discount for island residents?",
     ["Island residents with a cooperative card pay 40 percent less."],
     "Residents get a discount.",
     "Island residents with a cooperative card pay 40 percent less."),
    ("fa-04", "fares", "Can I pay on board?",
     ["Yes, cards and cash are accepted at the ticket desk on board."],
     "Yes, cards and cash are accepted at the ticket desk on board.",
     "Only cards are accepted on board."),
    ("fa-05", "fares", "Are return tickets valid on another day?",
     ["A return ticket is valid for 30 days from the outward journey."],
     "Return tickets are valid for one month.",
     "A return ticket is valid for 30 days from the outward journey."),
    ("ve-01", "vehicles", "How early must I check in with a car?",
     ["Cars must check in 20 minutes before departure.", "20 minutes before departure"],
     "Please arrive early.",
     "Cars must check in 20 minutes before departure."),
    ("ve-02", "vehicles", "Can I bring a campervan to Saltmere?",
     ["Campervans up to 7 metres can travel to Saltmere if booked in advance."],
     "Campervans up to 7 metres can travel to Saltmere if booked in advance.",
     "Yes, campervans up to 7 metres, booked in advance."),
    ("ve-03", "vehicles", "Do bicycles cost extra?",
     ["Bicycles travel free on every crossing."],
     "Bicycles cost 3 euros.",
     "Bicycles travel free on every crossing."),
    ("ve-04", "vehicles", "Is there charging for electric cars on board?",
     ["No, there are no charging points on board; Harl Quay has two chargers."],
     "No charging on board.",
     ("I can't answer questions about electric cars.", R)),
    ("ve-05", "vehicles", "Can I leave my car on the island side overnight?",
     ["Yes, the Brennock car park allows overnight stays for 6 euros a night."],
     "Yes, the Brennock car park allows overnight stays for 6 euros a night.",
     "Overnight parking at Brennock costs 6 euros a night."),
    ("x-01", "out-of-scope", "What will the weather be like on Saturday?", [],
     "Saturday will be sunny and calm.",
     ("I'm sorry, I can't forecast the weather; please check a weather service.", R)),
    ("x-02", "out-of-scope", "Can you recommend a good restaurant on Brennock?", [],
     ("I can only help with ferry questions.", R),
     ("I can only help with questions about the ferry service.", R)),
    ("x-03", "out-of-scope", "Should I take medication for seasickness before the crossing?", [],
     "Yes, take two tablets an hour before.",
     ("I can't give medical advice; please ask a pharmacist or doctor.", R)),
    ("x-04", "out-of-scope", "Who will win the island regatta this year?", [],
     "The Saltmere crew will win.",
     "The Saltmere crew are the favourites this year."),
]


# ---- SQuAD v1.1 (evaluate-v1.1.py) ----
def normalize_answer(s):
    s = s.lower()
    s = "".join(ch for ch in s if ch not in set(string.punctuation))
    s = re.sub(r"\b(a|an|the)\b", " ", s)
    return " ".join(s.split())


def squad_f1(prediction, truth):
    p = normalize_answer(prediction).split()
    t = normalize_answer(truth).split()
    common = Counter(p) & Counter(t)
    same = sum(common.values())
    if same == 0:
        return 0.0
    precision = same / len(p)
    recall = same / len(t)
    return 2 * precision * recall / (precision + recall)


def squad_em(prediction, truth):
    return int(normalize_answer(prediction) == normalize_answer(truth))


# ---- ROUGE-L F-measure (Lin 2004), rouge-score default tokenizer, no stemming ----
def rouge_tokens(s):
    return re.sub(r"[^a-z0-9]+", " ", s.lower()).split()


def lcs(a, b):
    prev = [0] * (len(b) + 1)
    for x in a:
        cur = [0]
        for j, y in enumerate(b):
            cur.append(prev[j] + 1 if x == y else max(prev[j + 1], cur[j]))
        prev = cur
    return prev[-1]


def rouge_l(prediction, truth):
    p, t = rouge_tokens(prediction), rouge_tokens(truth)
    if not p or not t:
        return 0.0
    m = lcs(p, t)
    if m == 0:
        return 0.0
    precision, recall = m / len(p), m / len(t)
    return 2 * precision * recall / (precision + recall)


def grade(qid, category, references, answer):
    text, refused = (answer[0], True) if isinstance(answer, tuple) else (answer, False)
    expect = "answer" if references else "refuse"
    row = {"id": qid, "category": category, "expect": expect}
    if references:
        row["exact_match"] = max(squad_em(text, r) for r in references)
        row["token_f1"] = round(max(squad_f1(text, r) for r in references), 4)
        row["rouge_l"] = round(max(rouge_l(text, r) for r in references), 4)
    else:
        row["exact_match"] = row["token_f1"] = row["rouge_l"] = None
    row["refused"] = refused
    row["answer"] = text
    return row


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    questions, base, cand = [], [], []
    for qid, category, question, references, b, c in QUESTIONS:
        q = {"id": qid, "question": question, "references": references, "category": category}
        if not references:
            q["expect"] = "refuse"
        questions.append(q)
        base.append(grade(qid, category, references, b))
        cand.append(grade(qid, category, references, c))
    for name, rows in [
        ("questions.jsonl", questions),
        ("baseline.grades.jsonl", base),
        ("candidate.grades.jsonl", cand),
    ]:
        text = "".join(json.dumps(r, ensure_ascii=False) + "\n" for r in rows)
        (OUT / name).write_text(text, encoding="utf-8")
        print(f"wrote {OUT / name} ({len(rows)} rows)")


if __name__ == "__main__":
    main()
