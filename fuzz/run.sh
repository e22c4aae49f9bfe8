#!/usr/bin/env bash
# Fuzzes liftgate's parsers of untrusted input with cargo-fuzz (libFuzzer), one target after
# the other. Not part of CI.
#
#   bash fuzz/run.sh [SECONDS_PER_TARGET] [TARGET...]
#
# Defaults: 600 s each, every target. Seeds live in fuzz/corpus/<target>/ (committed); inputs
# the fuzzer finds go to fuzz/work/<target>/ and crashes to fuzz/artifacts/<target>/ (both
# ignored by git). cargo-fuzz needs nightly compiler flags; RUSTC_BOOTSTRAP=1 lets the stable
# toolchain accept them. Reproduce a crash with
#   RUSTC_BOOTSTRAP=1 cargo fuzz run -s none <target> fuzz/artifacts/<target>/<file>
set -euo pipefail

cd "$(dirname "$0")"
export RUSTC_BOOTSTRAP=1

SECONDS_PER_TARGET="${1:-600}"
shift || true
TARGETS=("$@")
if [ ${#TARGETS[@]} -eq 0 ]; then
    TARGETS=(questions policy adapter_config template)
fi
# One process (no -jobs: libFuzzer would fork workers). Extra libFuzzer flags, e.g.
# FUZZ_FLAGS="-max_len=65536".
FUZZ_FLAGS="${FUZZ_FLAGS:-}"

if ! cargo fuzz --version >/dev/null 2>&1; then
    echo "installing cargo-fuzz" >&2
    cargo install cargo-fuzz --locked
fi

# Safe Rust: no sanitizer needed to see panics, overflows (debug assertions are on), hangs and
# memory blow-ups; without one the targets build and run several times faster.
cargo fuzz build -s none

status=0
for target in "${TARGETS[@]}"; do
    mkdir -p "work/$target" "artifacts/$target"
    log="work/$target.log"
    echo "== $target: ${SECONDS_PER_TARGET}s" >&2
    set +e
    nice -n 10 cargo fuzz run -s none "$target" "work/$target" "corpus/$target" -- \
        -max_total_time="$SECONDS_PER_TARGET" -timeout=10 \
        -rss_limit_mb=2048 -print_final_stats=1 $FUZZ_FLAGS >"$log" 2>&1
    rc=$?
    set -e
    execs=$(grep -o 'stat::number_of_executed_units: *[0-9]*' "$log" | grep -o '[0-9]*$' | tail -1)
    rate=$(grep -o 'stat::average_exec_per_sec: *[0-9]*' "$log" | grep -o '[0-9]*$' | tail -1)
    crashes=$(find "artifacts/$target" -type f | wc -l)
    echo "$target: exit $rc, ${execs:-?} executions, ${rate:-?} exec/s, $crashes crash file(s) in fuzz/artifacts/$target, log fuzz/$log"
    if [ "$rc" -ne 0 ]; then
        status=1
        grep -m 5 -E 'panicked|ERROR: libFuzzer|SUMMARY' "$log" || true
    fi
done
exit $status
