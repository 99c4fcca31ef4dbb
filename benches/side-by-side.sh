#!/usr/bin/env bash
# The finite-difference check against the naive way, in one run (figures go to benches/README.md).
set -euo pipefail
cd "$(dirname "$0")/.."
# One thread means one thread: matrixmultiply would otherwise give the naive pass's large products
# a second one. plumb's parallel run gets its threads from rayon, over coordinates.
MATMUL_NUM_THREADS=1 cargo bench --locked -p plumb-fd --bench side_by_side
