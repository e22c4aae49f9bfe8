#!/usr/bin/env bash
# Two variants on one base: the base and base + a rank-16 LoRA adapter (unmerged), answered
# one after the other (`liftgate answer` twice) against together in one run (`liftgate vet`,
# one copy of the base, the rows of both in the same decoding steps), at batch 1, 2 and 4, on
# a seeded random-init Llama-shaped bf16 checkpoint (README, "Performance"). 8 demo questions,
# 16 new tokens each. Both ways run in this one script, so they meet the same machine load.
#
#   bench/variants.sh               # the 1B-shaped checkpoint (~1.5 GB on disk)
#   SHAPE=8b bench/variants.sh      # Llama-3-8B dimensions (~16 GB on disk)
#   BATCHES="1 8" bench/variants.sh   # other batch sizes (default: 1 2 4)
#   BEFORE=path bench/variants.sh   # another liftgate binary too, each batch size run by both
#
# First run: creates bench/.venv-numpy (numpy from PyPI), the checkpoint and the adapter under
# bench/models (git-ignored; remove them when done).
set -euo pipefail
source "$(dirname "$0")/random-checkpoint.sh"
adapter="$here/models/random-$shape-adapter-r16"
[ -f "$adapter/adapter_model.safetensors" ] || "$venv/bin/python" "$here/make_random_checkpoint.py" "$model" --shape "$shape" --adapter "$adapter" --rank 16
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
head -n 8 "$root/eval-sets/ferry-faq.jsonl" >"$work/q.jsonl"
# "answered N questions: T new tokens in S s": tokens and seconds of the answering alone.
tokens_secs() { sed -n 's/^answered [0-9]* questions: \([0-9]*\) new tokens in \([0-9.]*\) s.*/\1 \2/p' "$1"; }
# "decoding steps S s (N steps, T new tokens, ...)": the steps after the prompt's, where
# variants share the weight reads (the prompt steps are bound by arithmetic either way).
step_tokens_secs() { sed -n 's/.*decoding steps \([0-9.]*\) s ([0-9]* steps, \([0-9]*\) new tokens.*/\2 \1/p' "$1"; }
echo "checkpoint: $(du -h "$model/model.safetensors" | cut -f1), adapter rank 16 on every linear layer"
for batch in ${BATCHES:-1 2 4}; do
for bin in ${BEFORE:-} "$root/target/release/liftgate"; do
  common=(--questions "$work/q.jsonl" --max-new-tokens 16 --ignore-eos --batch "$batch")
  "$bin" answer --model "$model" --out "$work/base.jsonl" --restart "${common[@]}" 2>"$work/e1" >/dev/null
  "$bin" answer --model "$model" --adapter "$adapter" --out "$work/tuned.jsonl" --restart "${common[@]}" 2>"$work/e2" >/dev/null
  read -r t1 s1 < <(tokens_secs "$work/e1")
  read -r t2 s2 < <(tokens_secs "$work/e2")
  rm -rf "$work/rep"
  /usr/bin/time -f "%M" -o "$work/rss" "$bin" vet --model "$model" --adapter "$adapter" --report "$work/rep" --no-history \
    --resamples 1000 "${common[@]}" 2>"$work/e3" >/dev/null || true
  read -r t3 s3 < <(tokens_secs "$work/e3")
  read -r d1 e1 < <(step_tokens_secs "$work/e1")
  read -r d2 e2 < <(step_tokens_secs "$work/e2")
  read -r d3 e3 < <(step_tokens_secs "$work/e3")
  cmp -s <(sed 's/"ms":[0-9]*//' "$work/tuned.jsonl") <(sed 's/"ms":[0-9]*//' "$work/rep/candidate.answers.jsonl") && same=same || same=DIFFERENT
  awk -v who="$bin" -v b="$batch" -v t1="$t1" -v s1="$s1" -v t2="$t2" -v s2="$s2" -v t3="$t3" -v s3="$s3" -v d1="$d1" -v e1="$e1" -v d2="$d2" -v e2="$e2" -v d3="$d3" -v e3="$e3" -v same="$same" -v rss="$(tail -n 1 "$work/rss")" 'BEGIN {
    one = (t1 + t2) / (s1 + s2); both = t3 / s3;
    step1 = (d1 + d2) / (e1 + e2); step2 = d3 / e3;
    printf "%s batch %d: one after the other %.1f tokens/s, together %.1f tokens/s (%.2fx); decoding steps alone %.1f against %.1f tokens/s (%.2fx); peak RSS together %d MiB, answers %s\n", who, b, one, both, both / one, step1, step2, step2 / step1, rss / 1024, same }'
done
done
