#!/usr/bin/env bash
# The layer graph's speed side by side in one run (figures go to benches/README.md): sections cnn,
# lstm, attention, sequence (all when none is named). One thread each: rayon and BLAS.
set -euo pipefail
cd "$(dirname "$0")/.."
export RAYON_NUM_THREADS=1 MATMUL_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 MKL_NUM_THREADS=1
uptime
cargo bench --locked -p plumb-fd --bench graph -- "$@"
uptime
