#!/usr/bin/env bash
# GGUF decoding speed: liftgate on one seeded random-init 0.5B-class model held six ways (an f32
# checkpoint, a bf16 checkpoint widened exactly inside the products, GGUF q8_0, q4_k, a
# q4_k_m-like mix of q4_k and q6_k and a q3_k_m-like mix of q3_k, q4_k and q5_k, kept in their
# blocks), at batch 1 and batch 16, every configuration in this one run with the same threads,
# one after the other per batch size so
# they meet the same machine load; and the batch-1 bandwidth bound of each file (its bytes, all
# read once per token, over the STREAM-style triad bandwidth measured at the start of the run
# with bench/peer/stream.c, as bench/throughput.py measures it). See README, "GGUF speed".
#
#   bench/gguf.sh                                   # 2 threads, batch 1 and 16, 32 new tokens
#   THREADS=1 BATCHES="1" TOKENS=64 bench/gguf.sh   # other settings
#   BEFORE=path bench/gguf.sh                       # another liftgate binary on the same files
#   CONFIGS="q8_0 q4_k" bench/gguf.sh               # some of f32 bf16 q8_0 q4_k q4_k_m q3_k_m
#
# No llama.cpp column: llama.cpp needs a file that carries its tokenizer, which these random-init
# files lack; bench/llama_cpp.sh compares the two on a real GGUF file (README, "GGUF speed").
#
# First run (or a GGUF file missing): writes the model (~3.6 GB: bench/models/random-05b-{f32,bf16}/
# and random-05b-{q8_0,q4_k,q4_k_m,q3_k_m}.gguf, git-ignored; remove them when done) with
# bench/make_gguf_checkpoints.py, which needs numpy and the `gguf` package: PYTHON, a python
# with both, or else bench/.venv-gguf, created with them from PyPI.
#
# Two rates, both with --ignore-eos and loading excluded: "answer tok/s", all new tokens over
# the whole answering time liftgate prints (prompt prefill included), and "decode tok/s", the
# tokens of the decoding steps over their time (from liftgate's "answering time:" line, which
# splits the answering time into prompt steps and decoding steps). The bound is about decoding
# (each new token reads the file once), so "of bound" compares the decode rate with it. A binary
# that does not print the split (BEFORE=an older build) is run a second time with one new token
# a question: that run is the prompt prefill and first token, and the difference of the two runs
# is the decoding (tokens - 1 a question, over the difference in seconds).
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
root="$(dirname "$here")"
models="$here/models"
threads="${THREADS:-2}"
tokens="${TOKENS:-32}"
if [ ! -f "$models/random-05b-q4_k_m.gguf" ] || [ ! -f "$models/random-05b-q3_k_m.gguf" ]; then
  python="${PYTHON:-$here/.venv-gguf/bin/python}"
  if [ ! -x "$python" ]; then
    python3 -m venv "$here/.venv-gguf"
    "$here/.venv-gguf/bin/pip" install --quiet numpy "gguf==0.19.0"
  fi
  "$python" "$here/make_gguf_checkpoints.py" "$models"
fi
(cd "$root" && nice -n 5 cargo build --release --locked --quiet)
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

gcc -O3 -march=native -fopenmp "$here/peer/stream.c" -o "$work/stream"
triad=$(OMP_NUM_THREADS="$threads" "$work/stream" 1024 10 | python3 -c 'import json,sys; print(json.load(sys.stdin)["triad_best_GBs"])')
echo "$(date -u +%FT%TZ) load: $(cut -d' ' -f1-3 /proc/loadavg); triad bandwidth ($threads threads, best of 10): $triad GB/s"
# The f32 arithmetic peak the batch-16 rates compare with (bench/peer/fma_peak.c).
gcc -O3 -march=native -fopenmp "$here/peer/fma_peak.c" -o "$work/fma_peak"
peak=$(OMP_NUM_THREADS="$threads" "$work/fma_peak" | python3 -c 'import json,sys; print(json.load(sys.stdin)["fma_f32_best_GFLOPs"])')
echo "f32 fused multiply-add peak ($threads threads, best of 5): $peak GFLOP/s"

dir="$models/random-05b"
configs=("f32:$dir-f32:" "bf16:$dir-bf16:" "q8_0:$dir-f32:$dir-q8_0.gguf" "q4_k:$dir-f32:$dir-q4_k.gguf"
  "q4_k_m:$dir-f32:$dir-q4_k_m.gguf" "q3_k_m:$dir-f32:$dir-q3_k_m.gguf")
file_bytes() { # the bytes of the weights file of a configuration
  local name model gguf
  IFS=: read -r name model gguf <<<"$1"
  if [ -n "$gguf" ]; then stat -c %s "$gguf"; else stat -c %s "$model/model.safetensors"; fi
}
tokens_secs() { sed -n 's/^answered [0-9]* questions: \([0-9]*\) new tokens in \([0-9.]*\) s.*/\1 \2/p' "$1"; }
# "answering time: ... decoding steps S s (K steps, T new tokens, ...)": T and S.
decode_split() { sed -n 's/^answering time: .*decoding steps \([0-9.]*\) s ([0-9]* steps, \([0-9]*\) new tokens.*/\2 \1/p' "$1"; }
answer() { # binary, config, batch, new tokens: runs liftgate answer, stderr into $work/err
  local bin=$1 name model gguf
  IFS=: read -r name model gguf <<<"$2"
  args=(answer --model "$model" --questions "$work/q.jsonl" --out "$work/a.jsonl" --restart
    --max-new-tokens "$4" --ignore-eos --batch "$3" --threads "$threads")
  [ -z "$gguf" ] || args+=(--gguf "$gguf")
  "$bin" "${args[@]}" 2>"$work/err" >/dev/null || { cat "$work/err" >&2; exit 1; }
}

printf '%-6s %-5s %6s %12s %12s %8s %7s %9s  %s\n' config batch tokens "answer tok/s" "decode tok/s" "file MB" bound "of bound" binary
for batch in ${BATCHES:-1 16}; do
  questions=$((batch == 1 ? 4 : batch))
  head -n "$questions" "$root/eval-sets/ferry-faq.jsonl" >"$work/q.jsonl"
  for bin in ${BEFORE:-} "$root/target/release/liftgate"; do
    for c in "${configs[@]}"; do
      name=${c%%:*}
      [[ " ${CONFIGS:-$name} " == *" $name "* ]] || continue
      answer "$bin" "$c" "$batch" "$tokens"
      read -r t s < <(tokens_secs "$work/err")
      split=$(decode_split "$work/err")
      if [ -n "$split" ]; then
        read -r dt ds <<<"$split"
      else
        answer "$bin" "$c" "$batch" 1
        read -r t1 s1 < <(tokens_secs "$work/err")
        dt=$((t - t1))
        ds=$(awk -v a="$s" -v b="$s1" 'BEGIN { print a - b }')
      fi
      bytes=$(file_bytes "$c")
      awk -v n="$name" -v b="$batch" -v t="$t" -v s="$s" -v dt="$dt" -v ds="$ds" -v bytes="$bytes" -v triad="$triad" -v bin="$bin" 'BEGIN {
        rate = t / s; drate = ds > 0 ? dt / ds : 0; bound = triad * 1e9 / bytes;
        share = b == 1 ? sprintf("%.0f%%", 100 * drate / bound) : "-";
        printf "%-6s %-5d %6d %12.1f %12.1f %8.1f %7.1f %9s  %s\n", n, b, t, rate, drate, bytes / 1e6, bound, share, bin }'
    done
  done
done
triad_end=$(OMP_NUM_THREADS="$threads" "$work/stream" 1024 10 | python3 -c 'import json,sys; print(json.load(sys.stdin)["triad_best_GBs"])')
echo "$(date -u +%FT%TZ) load: $(cut -d' ' -f1-3 /proc/loadavg); triad bandwidth at the end: $triad_end GB/s (the bounds use the first)"
