#!/usr/bin/env python
"""Reference values for liftgate's scorers, written to tests/fixtures/rouge_l.json.

ROUGE-L: the `rouge-score` package (PyPI), rouge_scorer.RougeScorer(['rougeL'],
use_stemmer=False), F-measure of score(target=reference, prediction=answer). For several
references this script takes the maximum F-measure itself.

Exact match and token F1: a port of the SQuAD v1.1 official evaluation script
(evaluate-v1.1.py) functions normalize_answer, f1_score and exact_match_score, written here
from their published definitions (lower-case, drop string.punctuation, drop the articles
a/an/the as whole words, collapse whitespace; F1 over Counter intersection, 0 when nothing is
shared), with metric_max_over_ground_truths for several references.

All pairs are invented (a fictional island ferry cooperative's FAQ).

usage: .venv-ref/bin/python tests/reference/make_rouge_fixture.py
requirements: tests/reference/requirements.txt
"""
import collections
import json
import os
import re
import string
import sys
from importlib.metadata import version

from rouge_score import rouge_scorer

OUT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "fixtures", "rouge_l.json")


# --- SQuAD v1.1 definitions -------------------------------------------------------------
def normalize_answer(s):
    def remove_articles(text):
        return re.sub(r"\b(a|an|the)\b", " ", text)

    def white_space_fix(text):
        return " ".join(text.split())

    def remove_punc(text):
        exclude = set(string.punctuation)
        return "".join(ch for ch in text if ch not in exclude)

    def lower(text):
        return text.lower()

    return white_space_fix(remove_articles(remove_punc(lower(s))))


def f1_score(prediction, ground_truth):
    prediction_tokens = normalize_answer(prediction).split()
    ground_truth_tokens = normalize_answer(ground_truth).split()
    common = collections.Counter(prediction_tokens) & collections.Counter(ground_truth_tokens)
    num_same = sum(common.values())
    if num_same == 0:
        return 0.0
    precision = 1.0 * num_same / len(prediction_tokens)
    recall = 1.0 * num_same / len(ground_truth_tokens)
    return (2 * precision * recall) / (precision + recall)


def exact_match_score(prediction, ground_truth):
    return normalize_answer(prediction) == normalize_answer(ground_truth)


def metric_max_over_ground_truths(metric_fn, prediction, ground_truths):
    return max(metric_fn(prediction, gt) for gt in ground_truths)


# --- invented pairs: (answer, [references]) ----------------------------------------------
PAIRS = [
    ("Yes, bikes ride free on every crossing.", ["Yes, bikes ride free on every crossing."]),
    ("Bikes ride free.", ["Yes, bikes ride free on every crossing."]),
    ("Yes - bicycles travel free of charge on all sailings.", ["Yes, bikes ride free on every crossing."]),
    ("The 7:40 crossing runs daily.", ["The 7:40 sailing runs every day, including Sundays."]),
    ("Check-in closes 20 minutes before departure.", ["Vehicle check-in closes twenty minutes before departure."]),
    ("Please arrive at least 30 minutes early at Tamsey Quay.", ["Arrive at Tamsey Quay 30 minutes before the Saltwren leaves."]),
    ("Children under 5 travel free.", ["Children under five travel free and need no ticket.", "Under-5s go free."]),
    ("Under 5s go free!", ["Children under five travel free and need no ticket.", "Under-5s go free."]),
    ("Dogs may travel in the outside seating area, not in the cafe.", ["Dogs are welcome on the outside deck but not in the cafe."]),
    ("Your return ticket is moved to the next crossing or refunded within 14 days.",
     ["If a sailing is cancelled, your ticket moves to the next crossing or is refunded in full within 14 days."]),
    ("", ["Season passes can be shared within one household."]),
    ("Season passes can be shared within one household.", [""]),
    ("", [""]),
    ("!!! ... ???", ["Yes."]),
    ("Yes.", ["!!!"]),
    ("free free free", ["free ride free"]),
    ("the the the", ["the ferry"]),
    ("gate 4 gate 4 gate 4", ["Use gate 4, then gate 2."]),
    ("No.", ["No", "Yes"]),
    ("Yes", ["No", "Yes"]),
    ("An e-bike's battery must be removed.", ["E-bike batteries must be removed before boarding."]),
    ("The café on the Morrow Bell opens at 7:00.", ["The cafe on the Morrow Bell opens at 7:00."]),
    ("Ostervane’s harbour office accepts cards only.", ["The harbour office in Ostervane takes cards, not cash."]),
    ("Prices: £12 adult, €14 at the quay; ½ price for kids.", ["Adults pay £12; children pay half price."]),
    ("ÉTÉ timetable — from June to September.", ["The summer (été) timetable runs June to September."]),
    ("Die Fähre fährt um 7:40 ab.", ["The ferry leaves at 7:40."]),
    ("İstanbul-style tea is sold on board.", ["Tea is sold on board."]),
    ("The Kelvin-rated (\u212a) cool box fits.", ["Cool boxes fit under the seats."]),
    ("ΣΑΣ ferries: ΟΔΟΣ", ["σας ferries: οδος"]),
    ("Tickets\tcost\n12 pounds\u00a0each.", ["Tickets cost 12 pounds each."]),
    ("Gate\u001f4 is open.", ["Gate 4 is open."]),
    ("Numbers: 1,000 passengers; 2.5 m height; 10:15 sailing.", ["The 10:15 sailing carries 1000 passengers and vehicles up to 2.5 m."]),
    ("a an the", ["A, an, the."]),
    ("A theatre group travels on the Greylantern.", ["The theatre group travels on the Greylantern."]),
    ("snake_case_words and hyphen-ated words", ["snake case words and hyphenated words"]),
    ("(the) [an] {a} <the> \"a\" 'an'", ["nothing here"]),
    ("Members vote at the annual meeting after 28 days.",
     ["Members can vote once they have held a share card for 28 days.",
      "After 28 days of membership you may vote at the annual meeting.",
      "Voting needs 28 days of membership."]),
    ("Book online or at the harbour office.",
     ["You can book online.", "Bookings are taken at the harbour office or online.", ""]),
    ("Kayaks travel on the vehicle ferry for a small fee.",
     ["Kayaks and surfboards go on the vehicle ferry; a small fee applies.", "Kayaks: vehicle ferry only."]),
    ("Night sailings to Brannoch Holm run from May to September only.",
     ["Night sailings run May to September.", "From May until September there are night sailings to Brannoch Holm."]),
    ("Lost property is kept at Murrowgate for thirty days.", ["Murrowgate keeps lost property for 30 days."]),
    ("The height limit on the Tidewarden is 4 metres; taller vans must book the freight sailing.",
     ["Vehicles up to 4 metres fit on the Tidewarden.", "Taller vans should book the freight sailing."]),
    ("Pensioners get a concession fare on every route.", ["Concession fares for pensioners apply on all routes."]),
    ("Sorry for the wait: the 7:40 crossing runs daily.", ["The 7:40 crossing runs daily."]),
    ("I'm sorry, but I can't help with that.", ["Refunds are paid within five working days."]),
    ("Yes yes yes yes no no", ["no yes no yes"]),
    ("route A to B then B to A", ["A to B and B to A"]),
    ("ferry ferry ferry ferry ferry ferry ferry ferry", ["ferry"]),
    ("1st 2nd 3rd sailings", ["first second third sailings"]),
    ("Ｆｕｌｌｗｉｄｔｈ ticket １２", ["Fullwidth ticket 12"]),
    ("the\u0301 ferry", ["ferry"]),
    ("Arrive early.", ["Arrive early.", "Arrive early."]),
]


def main():
    scorer = rouge_scorer.RougeScorer(["rougeL"], use_stemmer=False)
    cases = []
    for answer, refs in PAIRS:
        per_ref = [scorer.score(r, answer)["rougeL"].fmeasure for r in refs]
        cases.append({
            "answer": answer,
            "references": refs,
            "rouge_l_per_reference": per_ref,
            "rouge_l": max(per_ref),
            "exact_match": int(metric_max_over_ground_truths(exact_match_score, answer, refs)),
            "token_f1": metric_max_over_ground_truths(f1_score, answer, refs),
            "squad_normalized_answer": normalize_answer(answer),
        })
    doc = {
        "source": {
            "rouge_l": f"rouge-score {version('rouge-score')} RougeScorer(['rougeL'], use_stemmer=False), "
                       "fmeasure of score(target=reference, prediction=answer); max over references taken here",
            "exact_match_token_f1": "port of SQuAD v1.1 evaluate-v1.1.py normalize_answer / f1_score / "
                                    "exact_match_score / metric_max_over_ground_truths, written from the "
                                    "definitions in make_rouge_fixture.py",
            "python": sys.version.split()[0],
        },
        "cases": cases,
    }
    with open(OUT, "w", encoding="utf-8") as f:
        json.dump(doc, f, ensure_ascii=False, indent=1)
        f.write("\n")
    print(f"wrote {len(cases)} cases to {os.path.normpath(OUT)}")


if __name__ == "__main__":
    main()
