#!/usr/bin/env bash
# Issue 14's first figures, before and after, in one run (figures go to benches/README.md): the
# audit of a 784-1024-1024-10 f32 file on 10,000 probe samples, and the full check of a
# 784-128-64-10 tanh network in f64 and f32. "Before" is an older commit (default: the one the
# performance work started from), unpacked under target/ with this tree's two bench files copied
# in, and built into the same target directory.
set -euo pipefail
cd "$(dirname "$0")/.."
base=${1:-fd23f65}
src=target/before-$base
rm -rf "$src"
mkdir -p "$src"
git archive "$base" | tar -x -C "$src"
cp crates/audit/benches/audit.rs "$src/crates/audit/benches/audit.rs"
cp crates/fd/benches/precision.rs "$src/crates/fd/benches/precision.rs"
grep -q 'name = "precision"' "$src/crates/fd/Cargo.toml" ||
    printf '\n[[bench]]\nname = "precision"\nharness = false\n' >>"$src/crates/fd/Cargo.toml"
export CARGO_TARGET_DIR="$PWD/target"
for tree in "$src" .; do
    (cd "$tree" && cargo bench --locked -p plumb-audit --bench audit --no-run &&
        cargo bench --locked -p plumb-fd --bench precision --no-run)
done
uptime
for tree in "$src" .; do
    echo "== ${tree/#./this tree}"
    (cd "$tree" && cargo bench --locked -p plumb-audit --bench audit -- 1024 &&
        MATMUL_NUM_THREADS=1 cargo bench --locked -p plumb-fd --bench precision)
done
uptime
