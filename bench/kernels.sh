#!/usr/bin/env bash
# Speed of the f32 matrix product every linear layer runs (examples/product_speed.rs), at the
# batch sizes of decoding (1-32 rows) and of a prompt step (100 rows), on a 1024 × 4096 and a
# 4096 × 1024 matrix (16 MB: the shapes of the 0.5B-class benchmark model's feed-forward
# layers) and a 1024 × 16384 one (64 MB, beyond the caches), next to the f32 fused multiply-add peak of this machine (bench/peer/fma_peak.c),
# all in this one run; then the product over GGUF blocks (examples/gguf_product_speed.rs) of
# q8_0 and q4_k matrices of 1024 inputs and 4096 outputs, twelve held at once (53 and 29 MB,
# beyond the caches as a model's layers are), in GB/s of block bytes and GFLOP/s.
#
#   bench/kernels.sh                       # this build, 2 threads
#   BEFORE=path bench/kernels.sh           # and another build's product_speed (and the
#                                          # gguf_product_speed beside it, if any), alternating
#   THREADS=1 ROWS="1 16" GGUF_TYPES="q6_k" bench/kernels.sh
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
root="$(dirname "$here")"
threads="${THREADS:-2}"
(cd "$root" && nice -n 5 cargo build --release --locked --quiet --example product_speed --example gguf_product_speed)
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
gcc -O3 -march=native -fopenmp "$here/peer/fma_peak.c" -o "$work/fma_peak"
echo "$(date -u +%FT%TZ) load: $(cut -d' ' -f1-3 /proc/loadavg); f32 fused multiply-add peak ($threads threads): $(OMP_NUM_THREADS="$threads" "$work/fma_peak")"
for rows in ${ROWS:-1 4 16 32 100}; do
  for shape in "1024 4096" "4096 1024" "1024 16384"; do
    calls=$((rows >= 16 ? 50 : 200))
    for bin in ${BEFORE:-} "$root/target/release/examples/product_speed"; do
      echo "$(RAYON_NUM_THREADS="$threads" "$bin" "$rows" $shape "$calls")  $bin"
    done
  done
done
before_gguf=""
if [ -n "${BEFORE:-}" ] && [ -x "$(dirname "$BEFORE")/gguf_product_speed" ]; then
  before_gguf="$(dirname "$BEFORE")/gguf_product_speed"
fi
for type in ${GGUF_TYPES:-q8_0 q4_k}; do
  for rows in ${ROWS:-1 4 16 32 100}; do
    calls=$((rows >= 16 ? 10 : 40))
    for bin in $before_gguf "$root/target/release/examples/gguf_product_speed"; do
      echo "$(RAYON_NUM_THREADS="$threads" "$bin" "$type" "$rows" 1024 4096 12 "$calls")  $bin"
    done
  done
done
