#!/usr/bin/env bash
# Benchmark of the run history (docs/history.md): fills a history file with RUNS runs of a
# QUESTIONS-question set (the set's content changes every 100 runs) through the real weigh and
# record code (examples/history_fill.rs), then times `liftgate trend` over all of it, with
# trend.md and trend.json written, and reports the file's size per run.
#
# usage: bench/history.sh [RUNS] [QUESTIONS]      (default 1000 2000; goal: trend under 1 s)
# env:   WORK  scratch directory (default: a new temporary directory, removed at the end)
set -euo pipefail
cd "$(dirname "$0")/.."
RUNS="${1:-1000}"
QUESTIONS="${2:-2000}"
WORK="${WORK:-$(mktemp -d)}"
trap '[ -z "${KEEP:-}" ] && rm -rf "$WORK"' EXIT

cargo build --release --quiet --bin liftgate --example history_fill
BIN=target/release/liftgate
H="$WORK/history.sqlite"
rm -f "$H" "$H-wal" "$H-shm"

now() { date +%s.%N; }
secs() { awk -v a="$1" -v b="$2" 'BEGIN { printf "%.3f", b - a }'; }

t0=$(now)
target/release/examples/history_fill "$H" "$RUNS" "$QUESTIONS"
t1=$(now)
# Fold the write-ahead log into the file before measuring its size.
"$BIN" trend --history "$H" --last 1 >/dev/null
bytes=$(stat -c %s "$H")
echo "filled $RUNS runs of $QUESTIONS questions in $(secs "$t0" "$t1") s"
echo "history file: $bytes bytes, $((bytes / RUNS)) bytes per run"

for i in 1 2 3; do
  /usr/bin/time -f "trend over $RUNS runs (10 consecutive comparisons, 2000 resamples each, trend.md + trend.json): %e s wall, %U s user, %S s system, %M KB peak RSS" \
    "$BIN" trend --history "$H" --out "$WORK/trend" >/dev/null
done
/usr/bin/time -f "trend --pairs 0 (all $((RUNS - 1)) consecutive comparisons): %e s wall, %U s user" \
  "$BIN" trend --history "$H" --pairs 0 >/dev/null
