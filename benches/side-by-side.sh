#!/usr/bin/env bash
# The finite-difference check against the naive way, in one run (figures go to benches/README.md).
set -euo pipefail
cd "$(dirname "$0")/.."
cargo bench --locked -p plumb-fd --bench side_by_side
