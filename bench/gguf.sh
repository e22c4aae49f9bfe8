#!/usr/bin/env bash
# GGUF decoding speed: liftgate on one seeded random-init 0.5B-class model held four ways (an f32
# checkpoint, a bf16 checkpoint widened exactly inside the products, GGUF q8_0 and q4_k kept in
# their blocks), at batch 1 and batch 16, every configuration in this one run with the same
# threads, one after the other per batch size so they meet the same machine load; and the
# batch-1 bandwidth bound of each file (its bytes, all read once per token, over the STREAM-style
# triad bandwidth measured at the start of the run with bench/peer/stream.c, as
# bench/throughput.py measures it). See README, "GGUF speed".
#
#   bench/gguf.sh                                   # 2 threads, batch 1 and 16, 32 new tokens
#   THREADS=1 BATCHES="1" TOKENS=64 bench/gguf.sh   # other settings
#   BEFORE=path bench/gguf.sh                       # another liftgate binary on the same files
#
# No llama.cpp column: no registry package installs a llama.cpp CPU build here without compiling
# it (README, "GGUF speed").
#
# First run: writes the model (~3.4 GB: bench/models/random-05b-{f32,bf16}/ and
# random-05b-{q8_0,q4_k}.gguf, git-ignored; remove them when done) with
# bench/make_gguf_checkpoints.py, which needs numpy and the `gguf` package: PYTHON, a python
# with both, or else bench/.venv-gguf, created with them from PyPI. Tokens/s: new tokens over
# the answering time liftgate prints (prompt prefill included, loading excluded), --ignore-eos.
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
root="$(dirname "$here")"
models="$here/models"
threads="${THREADS:-2}"
tokens="${TOKENS:-32}"
if [ ! -f "$models/random-05b-q4_k.gguf" ]; then
  python="${PYTHON:-$here/.venv-gguf/bin/python}"
  if [ ! -x "$python" ]; then
    python3 -m venv "$here/.venv-gguf"
    "$here/.venv-gguf/bin/pip" install --quiet numpy "gguf==0.19.0"
  fi
  "$python" "$here/make_gguf_checkpoints.py" "$models"
fi
(cd "$root" && cargo build --release --locked --quiet)
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

gcc -O3 -march=native -fopenmp "$here/peer/stream.c" -o "$work/stream"
triad=$(OMP_NUM_THREADS="$threads" "$work/stream" 1024 10 | python3 -c 'import json,sys; print(json.load(sys.stdin)["triad_best_GBs"])')
echo "$(date -u +%FT%TZ) load: $(cut -d' ' -f1-3 /proc/loadavg); triad bandwidth ($threads threads, best of 10): $triad GB/s"

dir="$models/random-05b"
configs=("f32:$dir-f32:" "bf16:$dir-bf16:" "q8_0:$dir-f32:$dir-q8_0.gguf" "q4_k:$dir-f32:$dir-q4_k.gguf")
file_bytes() { # the bytes of the weights file of a configuration
  local name model gguf
  IFS=: read -r name model gguf <<<"$1"
  if [ -n "$gguf" ]; then stat -c %s "$gguf"; else stat -c %s "$model/model.safetensors"; fi
}
tokens_secs() { sed -n 's/^answered [0-9]* questions: \([0-9]*\) new tokens in \([0-9.]*\) s.*/\1 \2/p' "$1"; }

printf '%-8s %-5s %6s %10s %12s %9s %9s  %s\n' config batch tokens "tokens/s" "file MB" "bound" "of bound" binary
for batch in ${BATCHES:-1 16}; do
  questions=$((batch == 1 ? 4 : batch))
  head -n "$questions" "$root/eval-sets/ferry-faq.jsonl" >"$work/q.jsonl"
  for bin in ${BEFORE:-} "$root/target/release/liftgate"; do
    for c in "${configs[@]}"; do
      IFS=: read -r name model gguf <<<"$c"
      args=(answer --model "$model" --questions "$work/q.jsonl" --out "$work/a.jsonl" --restart
        --max-new-tokens "$tokens" --ignore-eos --batch "$batch" --threads "$threads")
      [ -z "$gguf" ] || args+=(--gguf "$gguf")
      "$bin" "${args[@]}" 2>"$work/err" >/dev/null || { cat "$work/err" >&2; exit 1; }
      read -r t s < <(tokens_secs "$work/err")
      bytes=$(file_bytes "$c")
      awk -v n="$name" -v b="$batch" -v t="$t" -v s="$s" -v bytes="$bytes" -v triad="$triad" -v bin="$bin" 'BEGIN {
        rate = t / s; bound = triad * 1e9 / bytes;
        share = b == 1 ? sprintf("%.0f%%", 100 * rate / bound) : "-";
        printf "%-8s %-5d %6d %10.1f %12.1f %9.1f %9s  %s\n", n, b, t, rate, bytes / 1e6, bound, share, bin }'
    done
  done
done
echo "$(date -u +%FT%TZ) load: $(cut -d' ' -f1-3 /proc/loadavg)"
