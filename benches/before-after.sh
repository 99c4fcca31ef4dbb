#!/usr/bin/env bash
# The f32 and f64 check (crates/fd/benches/precision.rs) before and after a change, in one run:
# "before" is an older commit (default: 4226756, the tree before the graph check's direction
# vectors and lean tails), unpacked under target/ with this tree's bench and its common/ copied
# in (they time the layer graph's check_graph, so the older tree must have it: 1c006d4 or
# later). Figures go to benches/README.md; the fingerprints show what moved.
#
# The old tree builds into a target directory of its own: cargo names a workspace crate's
# artifacts by its path within the workspace, so both trees would write the same files, and a
# file from git archive, older than the artifact, would count as built. It starts as a copy of
# this tree's release directory (the dependencies are the same), and tar -m gives the unpacked
# files the current time, so the workspace crates are rebuilt from the old sources.
set -euo pipefail
cd "$(dirname "$0")/.."
base=${1:-4226756}
src=target/before-$base
old_target="$PWD/target/before-$base-target"
rm -rf "$src"
mkdir -p "$src"
git archive "$base" | tar -x -m -C "$src"
cp crates/fd/benches/precision.rs "$src/crates/fd/benches/precision.rs"
rm -rf "$src/crates/fd/benches/common"
cp -r crates/fd/benches/common "$src/crates/fd/benches/common"
grep -q 'name = "precision"' "$src/crates/fd/Cargo.toml" ||
    printf '\n[[bench]]\nname = "precision"\nharness = false\n' >>"$src/crates/fd/Cargo.toml"
if [ ! -d "$old_target" ] && [ -d target/release ]; then
    mkdir -p "$old_target" && cp -a target/release "$old_target/release"
fi
(cd "$src" && CARGO_TARGET_DIR="$old_target" cargo bench --locked -p plumb-fd --bench precision --no-run)
cargo bench --locked -p plumb-fd --bench precision --no-run
uptime
echo "== before ($base)"
(cd "$src" && CARGO_TARGET_DIR="$old_target" MATMUL_NUM_THREADS=1 \
    cargo bench --locked -p plumb-fd --bench precision)
echo "== this tree ($(git rev-parse --short HEAD), uncommitted changes included)"
MATMUL_NUM_THREADS=1 cargo bench --locked -p plumb-fd --bench precision
uptime
