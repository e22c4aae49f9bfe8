#!/bin/bash
# Runs the answering Indexed Job, waits for it, then the finishing Job, prints its log (the
# verdict) and exits with its code (weigh's: 0 GO, 1 NO-GO, 2 bad input). The shared volume
# (claim liftgate-work) must already hold model/, adapter/ and set.jsonl.
set -euo pipefail
here=$(cd "$(dirname "$0")" && pwd)

# Waits until Job $1 has completed (returns 0) or failed (returns 1).
wait_job() {
    local state
    while :; do
        state=$(kubectl get "job/$1" -o jsonpath='{.status.conditions[?(@.status=="True")].type}')
        case " $state " in
            *" Complete "*) return 0 ;;
            *" Failed "*) return 1 ;;
        esac
        sleep 10
    done
}

kubectl apply -f "$here/answer-job.yaml"
if ! wait_job liftgate-answer; then
    echo "liftgate-answer failed; see: kubectl logs job/liftgate-answer" >&2
    exit 3
fi
kubectl apply -f "$here/finish-job.yaml"
wait_job liftgate-finish || true
kubectl logs job/liftgate-finish
code=$(kubectl get pods -l job-name=liftgate-finish \
    -o jsonpath='{.items[0].status.containerStatuses[0].state.terminated.exitCode}')
exit "${code:-3}"
