#!/bin/bash
# Submits the answering array of N tasks and the finishing job that waits for all of them.
#
#   WORK=/shared/run1 MODEL=/shared/models/base ADAPTER=/shared/adapters/e2 \
#   QUESTIONS=/shared/sets/faq.jsonl deploy/slurm/submit.sh 16 [SBATCH_OPTION...]
#
# SBATCH_OPTIONs (e.g. --partition=cpu --cpus-per-task=16) are given to both jobs and override
# the #SBATCH lines of the scripts. Prints the two job ids on stdout, one a line: the array's,
# then the finishing job's. See answer-shard.sbatch and finish.sbatch for the settings.
set -euo pipefail
n=${1:?usage: submit.sh N [SBATCH_OPTION...] (N: the number of shards, at most the number of questions)}
shift
here=$(cd "$(dirname "$0")" && pwd)
: "${WORK:?set WORK}" "${MODEL:?set MODEL}" "${ADAPTER:?set ADAPTER}" "${QUESTIONS:?set QUESTIONS}"
mkdir -p "$WORK"
answer=$(sbatch --parsable --export=ALL --chdir="$WORK" --array="0-$((n - 1))" "$@" \
    "$here/answer-shard.sbatch")
answer=${answer%%;*}
finish=$(sbatch --parsable --export=ALL --chdir="$WORK" --dependency="afterok:$answer" "$@" \
    "$here/finish.sbatch")
finish=${finish%%;*}
echo "$answer"
echo "$finish"
echo "submitted: answering array $answer; gather, grade, weigh $finish (report in $WORK/report)" >&2
