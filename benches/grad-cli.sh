#!/usr/bin/env bash
# `plumb grad` as a whole command against a NumPy script doing the same job, files in and out
# (benches/grad_cli.py says what and how; figures go to benches/README.md). One thread each side;
# OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE unset as in benches/grad-numpy.sh. BEFORE=path/to/plumb
# (an older build, e.g. /tmp/plumb-main) times that binary too, alternating, with same-run ratios.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --locked
uptime
env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE \
    RAYON_NUM_THREADS=1 MATMUL_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 MKL_NUM_THREADS=1 \
    python3 benches/grad_cli.py
uptime
