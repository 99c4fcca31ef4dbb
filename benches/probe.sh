#!/usr/bin/env bash
# plumb probe's finite-difference check of the NumPy example at about 10k parameters: the time and
# the round trips (requests) it costs, printed by plumb on stderr. Figures go to benches/README.md.
# Needs python3 with NumPy.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --locked -q
for sample in all 1000; do
    echo "--sample $sample:"
    ./target/release/plumb probe benches/probe-10k.toml --sample "$sample" \
        -- python3 examples/python/pump_numpy.py --units 96,96 2>&1 >/dev/null | grep requests
done
