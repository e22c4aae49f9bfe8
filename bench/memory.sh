#!/usr/bin/env bash
# Peak memory and tokens/s of `liftgate answer` on a seeded random-init, Llama-shaped bf16
# checkpoint (see README, "Performance"), at batch 1 and batch 8, 8 demo questions, 16 new
# tokens each. Optionally side by side with another liftgate binary (BEFORE=path).
#
#   bench/memory.sh                 # the 1B-shaped checkpoint (~1.5 GB on disk)
#   SHAPE=8b bench/memory.sh        # Llama-3-8B dimensions (~16 GB on disk, ~17 GB of memory)
#   ARGS="--base nf4" bench/memory.sh   # extra `answer` flags (here: the base in 4 bits)
#   QUESTIONS=2 TOKENS=4 BATCHES=1 bench/memory.sh   # a shorter run (defaults 8, 16, "1 8")
#
# First run: creates bench/.venv-numpy (numpy from PyPI) and the checkpoint under bench/models
# (git-ignored; remove it when done).
set -euo pipefail
source "$(dirname "$0")/random-checkpoint.sh"
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
head -n "${QUESTIONS:-8}" "$root/eval-sets/ferry-faq.jsonl" >"$work/q.jsonl"
echo "checkpoint: $(du -h "$model/model.safetensors" | cut -f1) ($model)"
for bin in ${BEFORE:-} "$root/target/release/liftgate"; do
  for batch in ${BATCHES:-1 8}; do
    /usr/bin/time -f "%M" -o "$work/rss" "$bin" answer --model "$model" --questions "$work/q.jsonl" \
      --out "$work/a.jsonl" --max-new-tokens "${TOKENS:-16}" --ignore-eos --batch "$batch" --restart ${ARGS:-} \
      2>"$work/err" >/dev/null
    echo "$bin ${ARGS:-} batch $batch: $(grep -o '[0-9.]* tokens/s' "$work/err"), peak RSS $(( $(cat "$work/rss") / 1024 )) MiB"
  done
done
