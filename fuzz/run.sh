#!/usr/bin/env bash
# Fuzzes liftgate's parsers of untrusted input with cargo-fuzz (libFuzzer), one target after
# the other. Not part of CI.
#
#   bash fuzz/run.sh [SECONDS_PER_TARGET] [TARGET...]
#
# Defaults: 600 s each, every target. Seeds live in fuzz/corpus/<target>/ (committed); inputs
# the fuzzer finds go to fuzz/work/<target>/ and failing inputs to fuzz/artifacts/<target>/
# (both ignored by git). Exits 1 when a target found anything. cargo-fuzz needs nightly compiler flags; RUSTC_BOOTSTRAP=1 lets the stable
# toolchain accept them. Reproduce a crash with
#   RUSTC_BOOTSTRAP=1 cargo fuzz run -s none <target> fuzz/artifacts/<target>/<file>
set -euo pipefail

cd "$(dirname "$0")"
export RUSTC_BOOTSTRAP=1

SECONDS_PER_TARGET="${1:-600}"
shift || true
TARGETS=("$@")
if [ ${#TARGETS[@]} -eq 0 ]; then
    TARGETS=(questions policy adapter_config template template_messages gguf)
fi
# One fuzzing process at a time (-fork=1). Extra libFuzzer flags, e.g. FUZZ_FLAGS="-max_len=65536".
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
    # crash-*, oom-* and timeout-* files are findings; slow-unit-* files only warn.
    count() { find "artifacts/$target" -type f \( -name 'crash-*' -o -name 'oom-*' -o -name 'timeout-*' \) | wc -l; }
    before=$(count)
    # Fork mode: the fuzzing runs in a child process, so a crash, a stack overflow (which
    # kills the process outright), an out-of-memory or a hang is recorded in
    # fuzz/artifacts/<target>/ and fuzzing goes on.
    nice -n 10 cargo fuzz run -s none "$target" "work/$target" "corpus/$target" -- \
        -fork=1 -ignore_crashes=1 -ignore_ooms=1 -ignore_timeouts=1 \
        -max_total_time="$SECONDS_PER_TARGET" -timeout=10 -rss_limit_mb=2048 \
        $FUZZ_FLAGS >"$log" 2>&1
    rc=$?
    set -e
    # The fork-mode progress line: "#<executions>: cov: .. oom/timeout/crash: a/b/c time: <s>s";
    # its exec/s is the last job's, so the average is worked out here.
    last=$(grep -E '^#[0-9]+: cov:' "$log" | tail -1)
    execs=$(sed -E 's/^#([0-9]+):.*/\1/' <<<"$last")
    secs=$(grep -oE 'time: [0-9]+s' <<<"$last" | grep -oE '[0-9]+')
    rate=$(( ${execs:-0} / (${secs:-0} > 0 ? ${secs:-1} : 1) ))
    failures=$(grep -oE 'oom/timeout/crash: [0-9/]+' <<<"$last" | cut -d' ' -f2)
    found=$(( $(count) - before ))
    echo "$target: ${execs:-?} executions in ${secs:-?} s, $rate exec/s, oom/timeout/crash ${failures:-?}," \
        "$found new file(s) in fuzz/artifacts/$target, log fuzz/$log"
    if [ "$rc" -ne 0 ] || [ "$found" -gt 0 ]; then
        status=1
        grep -m 5 -E 'panicked|overflowed|ERROR: libFuzzer|SUMMARY' "$log" || true
    fi
done
exit $status
