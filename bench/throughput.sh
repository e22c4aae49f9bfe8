#!/usr/bin/env bash
# Generation throughput of liftgate against PyTorch + transformers, same models, same 64
# questions, same settings, in one run (see README, "Performance").
#
#   bench/throughput.sh            # full run: both benchmark models, 2 rounds (~25 min)
#   ROUNDS=1 SHAPES=llama100m-shape bench/throughput.sh    # a quicker look
#
# First run: creates bench/.venv-peer (PyTorch, transformers from PyPI; a few GB) and the two
# seeded random-init benchmark models under bench/models (about a minute). Environment:
# THREADS (2), NEW_TOKENS (32), ROUNDS (2), SHAPES, LIFTGATE_CONFIGS (f32:1,f32:16,f32:32,bf16:32),
# PEER_CONFIGS (f32:1,f32:16,bf16:16,bf16:32), PYTHON (python3 used to create the venv).
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
root="$(dirname "$here")"
venv="${VENV:-$here/.venv-peer}"
models="${MODELS:-$here/models}"
threads="${THREADS:-2}"

if [ ! -x "$venv/bin/python" ]; then
  "${PYTHON:-python3}" -m venv "$venv"
  "$venv/bin/pip" install --quiet -r "$here/peer/requirements.txt"
fi
for shape in qwen05-shape llama100m-shape; do
  if [ ! -f "$models/$shape/model.safetensors" ]; then
    "$venv/bin/python" "$here/peer/make_bench_model.py" "$models"
    break
  fi
done
(cd "$root" && cargo build --release --locked --quiet)

mkdir -p "$here/results"
"$venv/bin/python" "$here/throughput.py" \
  --liftgate "$root/target/release/liftgate" \
  --python "$venv/bin/python" \
  --models "$models" \
  --threads "$threads" \
  --new-tokens "${NEW_TOKENS:-32}" \
  --rounds "${ROUNDS:-2}" \
  --shapes "${SHAPES:-llama100m-shape,qwen05-shape}" \
  --liftgate-configs "${LIFTGATE_CONFIGS:-f32:1,f32:16,f32:32,bf16:32}" \
  --peer-configs "${PEER_CONFIGS:-f32:1,f32:16,bf16:16,bf16:32}" \
  --refill-model "$root/demo/models/base" \
  --refill-questions "$root/eval-sets/ferry-faq.jsonl" \
  --json-out "$here/results/throughput-$(date -u +%Y%m%dT%H%M%SZ).json"
