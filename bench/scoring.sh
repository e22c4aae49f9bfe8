#!/usr/bin/env bash
# Benchmark of scoring and statistics (README, "Performance"): `liftgate grade` of 100,000
# invented answer pairs plus `liftgate weigh` with 10,000 resamples, and, on the same pairs in
# the same run, ROUGE-L from the rouge-score package (the reference implementation).
#
# usage: bench/scoring.sh [PAIRS]       (default 100000)
# env:   PYTHON  a Python 3 with rouge-score installed (default: python3); without rouge-score the
#                reference timing is skipped.
#        WORK    scratch directory (default: a new temporary directory, removed at the end)
#        BEFORE  another liftgate binary (e.g. a copy of an earlier build) to time on the same
#                files in the same run, before this one, for a side-by-side comparison
#        ROUNDS  how many times to time the binaries, alternating (default 1): on a shared
#                machine the spread of several rounds says more than one pair of figures
#        EMBEDDER  a sentence-embedding model directory (e.g. all-MiniLM-L6-v2): also times
#                `grade --embedder` of the current binary on EMBED_PAIRS invented pairs
#                (default 2000; embedding costs far more than the other scores) and reports
#                answers per second
set -euo pipefail
cd "$(dirname "$0")/.."
PAIRS="${1:-100000}"
PYTHON="${PYTHON:-python3}"
WORK="${WORK:-$(mktemp -d)}"
trap '[ -z "${KEEP:-}" ] && rm -rf "$WORK"' EXIT

cargo build --release --quiet
"$PYTHON" bench/make_pairs.py "$WORK" --pairs "$PAIRS"

now() { date +%s.%N; }
# CPU seconds (user + system) of one command, written to a file: the machine may be shared, and
# wall time alone then overstates the cost.
cpu() { local out="$1"; shift; /usr/bin/time -f "%U %S" -o "$out" "$@"; }
cpus() { awk '{ printf "%.3f", $1 + $2 }' "$1"; }
secs() { awk -v a="$1" -v b="$2" 'BEGIN { printf "%.3f", b - a }'; }

# One timing of grade (both files) and weigh with binary $2, labelled $1.
run() {
  local label="$1" BIN="$2" out="$WORK/$1"
  mkdir -p "$out"
  t0=$(now)
  cpu "$out/cpu.grade" "$BIN" grade --questions "$WORK/set.jsonl" --answers "$WORK/tuned.jsonl" --out "$out/tuned.grades.jsonl"
  t1=$(now)
  "$BIN" grade --questions "$WORK/set.jsonl" --answers "$WORK/base.jsonl" --out "$out/base.grades.jsonl"
  t2=$(now)
  set +e
  cpu "$out/cpu.weigh" "$BIN" weigh --questions "$WORK/set.jsonl" --baseline "$out/base.grades.jsonl" \
    --candidate "$out/tuned.grades.jsonl" --report "$out/report-$round" --resamples 10000 > "$out/weigh.txt"
  code=$?
  set -e
  t3=$(now)
  [ "$code" -le 1 ] || { echo "weigh failed with exit $code" >&2; exit "$code"; }

  grade=$(secs "$t0" "$t1")
  weigh=$(secs "$t2" "$t3")
  total=$(awk -v a="$grade" -v b="$weigh" 'BEGIN { printf "%.3f", a + b }')
  echo "{\"binary\": \"$label\", \"kind\": \"liftgate_grade\", \"pairs\": $PAIRS, \"seconds\": $grade, \"cpu_seconds\": $(cpus "$out/cpu.grade")}"
  echo "{\"binary\": \"$label\", \"kind\": \"liftgate_grade_second_file\", \"pairs\": $PAIRS, \"seconds\": $(secs "$t1" "$t2")}"
  echo "{\"binary\": \"$label\", \"kind\": \"liftgate_weigh\", \"questions\": $PAIRS, \"resamples\": 10000, \"seconds\": $weigh, \"cpu_seconds\": $(cpus "$out/cpu.weigh"), \"verdict\": \"$(head -1 "$out/weigh.txt")\"}"
  echo "{\"binary\": \"$label\", \"kind\": \"liftgate_grade_plus_weigh\", \"round\": $round, \"pairs\": $PAIRS, \"seconds\": $total, \"cores\": $(nproc), \"load_average\": \"$(cut -d' ' -f1-3 /proc/loadavg)\"}"
}

# ROUNDS rounds, the two binaries alternating within each, so both meet the same load. Each
# binary records its runs in a history of its own beside the reports: round 1 creates it and
# records the set (a first run), later rounds add a run of a set it knows (a run after it).
for round in $(seq "${ROUNDS:-1}"); do
  if [ -n "${BEFORE:-}" ]; then
    run before "$BEFORE"
  fi
  run current target/release/liftgate
done

if [ -n "${EMBEDDER:-}" ]; then
  EMBED_PAIRS="${EMBED_PAIRS:-2000}"
  mkdir -p "$WORK/emb"
  "$PYTHON" bench/make_pairs.py "$WORK/emb" --pairs "$EMBED_PAIRS"
  t0=$(now)
  cpu "$WORK/emb/cpu" target/release/liftgate grade --questions "$WORK/emb/set.jsonl" --answers "$WORK/emb/tuned.jsonl" \
    --out "$WORK/emb/tuned.grades.jsonl" --embedder "$EMBEDDER" 2> "$WORK/emb/stderr"
  t1=$(now)
  s=$(secs "$t0" "$t1")
  echo "{\"binary\": \"current\", \"kind\": \"liftgate_grade_embedder\", \"pairs\": $EMBED_PAIRS, \"seconds\": $s, \"cpu_seconds\": $(cpus "$WORK/emb/cpu"), \"answers_per_second\": $(awk -v n="$EMBED_PAIRS" -v s="$s" 'BEGIN { printf "%.0f", n / s }'), \"texts_embedded\": \"$(grep -o 'embedding [0-9]* distinct' "$WORK/emb/stderr" | grep -o '[0-9]*')\", \"load_average\": \"$(cut -d' ' -f1-3 /proc/loadavg)\"}"
fi

if "$PYTHON" -c "import rouge_score" 2>/dev/null; then
  "$PYTHON" - "$WORK/pairs.jsonl" "$grade" <<'PY'
import json, sys, time
from importlib.metadata import version
from rouge_score import rouge_scorer
pairs = [json.loads(l) for l in open(sys.argv[1])]
pairs = [(a, r) for a, r in pairs if r]
sc = rouge_scorer.RougeScorer(["rougeL"], use_stemmer=False)
t = time.perf_counter()
vals = [sc.score(r, a)["rougeL"].fmeasure for a, r in pairs]
dt = time.perf_counter() - t
grade = float(sys.argv[2])
print(json.dumps({"kind": "rouge_score_rougeL", "version": version("rouge-score"), "pairs": len(pairs),
                  "seconds": round(dt, 3), "mean_f": round(sum(vals) / len(vals), 4),
                  "ratio_to_liftgate_grade": round(dt / grade, 1)}))
PY
else
  echo '{"kind": "rouge_score_rougeL", "skipped": "rouge-score not installed for '"$PYTHON"'"}'
fi
