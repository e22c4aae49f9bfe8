# Sourced by bench/memory.sh and bench/variants.sh: sets `here`, `root`, `shape` (SHAPE, 1b
# by default) and `model`, the seeded random-init bf16 checkpoint of that shape under
# bench/models (git-ignored), made with numpy in bench/.venv-numpy when missing, and builds
# the release binary.
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(dirname "$here")"
shape="${SHAPE:-1b}"
venv="$here/.venv-numpy"
model="$here/models/random-$shape-bf16"
if [ ! -x "$venv/bin/python" ]; then
  "${PYTHON:-python3}" -m venv "$venv"
  "$venv/bin/pip" install --quiet numpy
fi
[ -f "$model/model.safetensors" ] || "$venv/bin/python" "$here/make_random_checkpoint.py" "$model" --shape "$shape"
(cd "$root" && cargo build --release --locked --quiet)
