#!/usr/bin/env bash
# The Slurm job files of deploy/slurm/ on a real, single-node Slurm cluster: controller and node
# daemon on this machine (Debian's slurm-wlm and munge; no cgroups, no accounting), the bundled
# demo (eval-sets/ferry-faq.jsonl, demo/models/base + adapter) submitted as a 4-task array plus
# the dependent gather/grade/weigh job. Checks that the gathered answers and run records equal a
# single-machine run's (every byte but the `ms` timings), and that summary.json is byte-identical
# once the two working directories' paths are named alike.
#
#   sudo bash tests/slurm/run.sh            # from the repository root, as root (daemons, packages)
#
# Installs slurm-wlm and munge with apt-get when sbatch is missing. Everything else lives in a
# temporary directory (config, state, spool, logs, work) removed at the end; the daemons it
# starts are stopped by their process ids. Needs a release build (cargo build --release) or
# builds one. Takes a minute or two after the packages are installed.
set -euo pipefail
cd "$(dirname "$0")/../.."
repo=$(pwd)
shards=${SHARDS:-4}
max_new=${MAX_NEW_TOKENS:-48}

if [ "$(id -u)" -ne 0 ]; then
    echo "run as root: it starts munged, slurmctld and slurmd (and may install packages)" >&2
    exit 2
fi
if ! command -v sbatch >/dev/null || ! command -v munged >/dev/null; then
    echo "== installing slurm-wlm and munge"
    DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends slurm-wlm munge >/dev/null
fi
[ -x target/release/liftgate ] || cargo build --release --locked
liftgate="$repo/target/release/liftgate"

tmp=$(mktemp -d /tmp/liftgate-slurm.XXXXXX)
chmod 755 "$tmp" # munged runs as munge and writes its pid file here
pids=()
cleanup() {
    for p in "${pids[@]}"; do kill "$p" 2>/dev/null || true; done
    wait 2>/dev/null || true
    rm -rf "$tmp"
}
trap cleanup EXIT

echo "== munge"
mkdir -p "$tmp/munge" && chown munge: "$tmp/munge" 2>/dev/null || true
if [ ! -s /etc/munge/munge.key ]; then
    mungekey --create --keyfile=/etc/munge/munge.key 2>/dev/null ||
        dd if=/dev/urandom bs=1 count=1024 of=/etc/munge/munge.key status=none
    chown munge: /etc/munge/munge.key && chmod 400 /etc/munge/munge.key
fi
mkdir -p /run/munge && chown munge: /run/munge
socket=/run/munge/munge.socket.2
if ! munge -n >/dev/null 2>&1; then
    runuser -u munge -- munged --foreground --socket="$socket" \
        --pid-file="$tmp/munge/munged.pid" --log-file="$tmp/munge/munged.log" \
        >"$tmp/munge/munged.out" 2>&1 &
    pids+=($!)
    for _ in $(seq 50); do munge -n >/dev/null 2>&1 && break; sleep 0.1; done
fi
munge -n | unmunge >/dev/null

echo "== slurm (controller and node on $(hostname -s))"
node=$(hostname -s)
cpus=$(nproc)
mkdir -p "$tmp/state" "$tmp/spool" "$tmp/log"
export SLURM_CONF="$tmp/slurm.conf"
cat > "$SLURM_CONF" <<EOF
ClusterName=liftgate-test
SlurmctldHost=$node(127.0.0.1)
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
StateSaveLocation=$tmp/state
SlurmdSpoolDir=$tmp/spool
SlurmctldPidFile=$tmp/slurmctld.pid
SlurmdPidFile=$tmp/slurmd.pid
SlurmctldLogFile=$tmp/log/slurmctld.log
SlurmdLogFile=$tmp/log/slurmd.log
SlurmctldPort=${SLURMCTLD_PORT:-16817}
SlurmdPort=${SLURMD_PORT:-16818}
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SchedulerType=sched/backfill
ReturnToService=2
MpiDefault=none
NodeName=$node NodeAddr=127.0.0.1 CPUs=$cpus State=UNKNOWN
PartitionName=test Nodes=$node Default=YES MaxTime=INFINITE State=UP OverSubscribe=NO
EOF
slurmctld -D -f "$SLURM_CONF" >"$tmp/log/slurmctld.out" 2>&1 &
pids+=($!)
slurmd -D -f "$SLURM_CONF" -N "$node" >"$tmp/log/slurmd.out" 2>&1 &
pids+=($!)
for _ in $(seq 100); do
    sinfo -h -o %T 2>/dev/null | grep -qE '^idle' && break
    sleep 0.2
done
sinfo -h -o 'partition %P: node %T, CPUs (allocated/idle/other/total) %C' ||
    { cat "$tmp"/log/*; exit 1; }

echo "== submit $shards answering tasks and the finishing job"
export WORK="$tmp/cluster" LIFTGATE="$liftgate"
export MODEL="$repo/demo/models/base" ADAPTER="$repo/demo/models/adapter"
export QUESTIONS="$repo/eval-sets/ferry-faq.jsonl"
export ANSWER_FLAGS="--max-new-tokens $max_new" WEIGH_FLAGS="--no-history"
mapfile -t ids < <(deploy/slurm/submit.sh "$shards" --cpus-per-task=1 --mem=0 --partition=test)
finish=${ids[1]}
state=
for _ in $(seq 1200); do
    state=$(scontrol show job "$finish" 2>/dev/null | sed -n 's/.*JobState=\([A-Z_]*\).*/\1/p')
    case $state in COMPLETED | FAILED | CANCELLED | TIMEOUT | NODE_FAIL | OUT_OF_MEMORY) break ;; esac
    sleep 0.5
done
echo "finishing job $finish: $state after $SECONDS s"
grep -h "answering shard" "$WORK"/liftgate-answer-*.log
cat "$WORK"/liftgate-finish-*.log
if [ "$state" != COMPLETED ] && [ "$state" != FAILED ]; then
    cat "$WORK"/liftgate-answer-*.log "$tmp"/log/*
    exit 1
fi
# FAILED is fine when weigh said NO-GO (exit 1); the log above shows the verdict.
grep -qE '^verdict: (GO|NO-GO)' "$WORK"/liftgate-finish-*.log

echo "== the same on one machine"
single="$tmp/single"
mkdir -p "$single"
for variant in baseline candidate; do
    adapter=()
    [ $variant = candidate ] && adapter=(--adapter "$ADAPTER")
    "$liftgate" answer --name $variant --model "$MODEL" "${adapter[@]}" --questions "$QUESTIONS" \
        --out "$single/$variant.answers.jsonl" --threads 1 --max-new-tokens "$max_new"
    "$liftgate" grade --questions "$QUESTIONS" --answers "$single/$variant.answers.jsonl" \
        --out "$single/$variant.grades.jsonl"
done
set +e
"$liftgate" weigh --questions "$QUESTIONS" --baseline "$single/baseline.grades.jsonl" \
    --candidate "$single/candidate.grades.jsonl" --report "$single/report" --no-history >/dev/null
set -e

echo "== compare"
strip_ms() { sed -E 's/,"ms":[0-9]+//' "$1"; }
fail=0
for variant in baseline candidate; do
    a="$WORK/$variant.answers.jsonl" b="$single/$variant.answers.jsonl"
    cmp <(strip_ms "$a") <(strip_ms "$b") || { echo "$variant answers differ"; fail=1; }
    cmp "$a.run.json" "$b.run.json" || { echo "$variant run records differ"; fail=1; }
    cmp "$WORK/$variant.grades.jsonl" "$single/$variant.grades.jsonl" ||
        { echo "$variant grades differ"; fail=1; }
done
cmp <(sed "s#$WORK#WORK#g" "$WORK/report/summary.json") \
    <(sed "s#$single#WORK#g" "$single/report/summary.json") ||
    { echo "summary.json differs"; fail=1; }
[ $fail -eq 0 ] || exit 1
echo "the gathered run equals the single-machine run ($shards shards, $(wc -l < "$QUESTIONS") questions, $SECONDS s)"
