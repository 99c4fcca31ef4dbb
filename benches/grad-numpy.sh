#!/usr/bin/env bash
# The layer graph's forward + backward pass against NumPy, batch 256 and 8192, f64 and f32, in one
# run (figures go to benches/README.md). One thread each side: matrixmultiply (and rayon) on
# plumb's, OpenBLAS on NumPy's. OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE, where the machine sets
# them for old OpenBLAS builds, slow a current NumPy: this command alone runs without them (the
# NumPy side prints the kernel it ran). Needs python3 with NumPy (threadpoolctl optional).
set -euo pipefail
cd "$(dirname "$0")/.."
uptime
env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE \
    RAYON_NUM_THREADS=1 MATMUL_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 MKL_NUM_THREADS=1 \
    cargo bench --locked -p plumb-engine --bench grad_numpy -- "$@"
uptime
