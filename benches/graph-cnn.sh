#!/usr/bin/env bash
# The graph check of a small 1-D CNN against a naive NumPy loop, in one run (figures go to
# benches/README.md). One thread each: rayon and BLAS.
set -euo pipefail
cd "$(dirname "$0")/.."
export RAYON_NUM_THREADS=1 MATMUL_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 MKL_NUM_THREADS=1
python3 benches/graph_cnn.py
cargo bench --locked -p plumb-fd --bench graph_cnn
