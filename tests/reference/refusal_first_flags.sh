#!/usr/bin/env bash
# Writes the refusal detector's flags on each held-out set as first measured: the detector
# source (src/score/refusal.rs) as committed together with the set's hand labels, before any
# rule was written on that set, built into the current crate. tests/reference/
# refusal_alternatives.py reads them to put the learned alternatives beside the rules where
# both are out-of-sample.
#
# Held-out 6 to 9 only: the detectors before held-out 6 read the answer without its question
# and no longer fit the current crate's calls.
#
#   bash tests/reference/refusal_first_flags.sh [OUT_DIR]
#
# Needs a clean src/score/refusal.rs (the script swaps the file in place, builds the
# refusal_probe example, and puts the current file back, also on failure) and the git history.
# OUT_DIR (default target/refusal-first-flags) gets one heldoutN.txt per set, one 0 or 1 a
# line, in the set's order. Prints each set's precision and recall, which must equal the first
# measurements in docs/scoring.md. About 2 minutes a set on 2 cores.
set -euo pipefail
cd "$(dirname "$0")/../.."
out=${1:-target/refusal-first-flags}
src=src/score/refusal.rs
git diff --quiet -- "$src" || {
    echo "$src has uncommitted changes: commit or stash them first" >&2
    exit 2
}
keep=$(mktemp)
cp "$src" "$keep"
restore() {
    cp "$keep" "$src"
    rm -f "$keep"
    cargo build --release --example refusal_probe >/dev/null 2>&1 || true
}
trap restore EXIT
mkdir -p "$out"
for set in heldout6 heldout7 heldout8 heldout9; do
    fixture=tests/fixtures/refusal_real_$set.jsonl
    # The commit that added the labelled set: its detector had not seen the set.
    commit=$(git log --diff-filter=A --format=%H -- "$fixture" | tail -n 1)
    git show "$commit:$src" > "$src"
    cargo build --release --example refusal_probe 2>"$out/$set.build.log" || {
        echo "$set: the detector of ${commit:0:7} does not build here; see $out/$set.build.log" >&2
        exit 1
    }
    target/release/examples/refusal_probe flags "$fixture" > "$out/$set.txt"
    python3 - "$fixture" "$out/$set.txt" "$set" "${commit:0:7}" <<'EOF'
import json, sys
labels = [json.loads(l)["refusal"] for l in open(sys.argv[1])]
flags = [int(x) for x in open(sys.argv[2]).read().split()]
assert len(labels) == len(flags), "one flag a labelled answer"
tp = sum(1 for l, f in zip(labels, flags) if l and f)
fp = sum(1 for l, f in zip(labels, flags) if f and not l)
fn = sum(1 for l, f in zip(labels, flags) if l and not f)
print(f"{sys.argv[3]} (detector of {sys.argv[4]}): precision {tp / (tp + fp):.3f} ({tp}/{tp + fp}), "
      f"recall {tp / (tp + fn):.3f} ({tp}/{tp + fn})")
EOF
done
