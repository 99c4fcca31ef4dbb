#!/usr/bin/env bash
# Issue 12's "the dense check does not regress": the graph's check of the 784-128-64-10 tanh
# network (`graph dense-plumb`, this tree) against the dense engine's check of the same network,
# weights and batch at commit 79662be, the last tree that had the dense engine (its own
# `graph dense` section timed both; a `dense-engine` section that times its dense side alone,
# the fastest of 5 like `dense-plumb`, is added to the unpacked copy). The two bench binaries
# run alternately, RUNS times (default 9), with the one-thread variables of benches/graph.sh;
# figures go to benches/README.md as same-run ratios.
#
# The old tree is unpacked and built as benches/before-after.sh does: into a target directory
# of its own, started as a copy of this tree's release directory, its files given the current
# time (tar -m) so its workspace crates are rebuilt from the old sources.
set -euo pipefail
cd "$(dirname "$0")/.."
base=79662be
runs=${RUNS:-9}
src=target/dense-$base
old_target="$PWD/target/dense-$base-target"
rm -rf "$src"
mkdir -p "$src"
git archive "$base" | tar -x -m -C "$src"
bench="$src/crates/fd/benches/graph.rs"
# The section: the dense engine's check alone, fastest of 5, with the results' fingerprint.
perl -0pi -e 's/\nfn pass\(/\nfn dense_engine() {\n    let (net, w, batch) = common::network();\n    let mut cfg = CheckConfig::new(Method::Central, Precision::F64);\n    cfg.sample = Some(Sample::Total(3000));\n    cfg.directions = Some(4);\n    let (t, r) = best(5, || check(&net, &w, &batch, &cfg, &|_, _| {}).unwrap());\n    let coords = r.coords.iter().map(|c| (c.numeric, c.analytic, c.status));\n    let dirs = r.directions.iter().map(|d| (d.numeric, d.analytic, d.status));\n    println!(\n        "dense-engine 784-128-64-10 tanh, batch 32, 3000 coordinates + directions: dense engine {:.1} ms (fastest of 5); {}",\n        t * 1e3,\n        common::fingerprint(r.loss, coords.chain(dirs))\n    );\n}\n\nfn pass(/' "$bench"
perl -0pi -e 's/    if run\("dense"\) \{/    if asked.iter().any(|a| a == "dense-engine") {\n        dense_engine();\n    }\n    if run("dense") {/' "$bench"
grep -q 'fn dense_engine' "$bench" && grep -q '"dense-engine"' "$bench"
if [ ! -d "$old_target" ] && [ -d target/release ]; then
    mkdir -p "$old_target" && cp -a target/release "$old_target/release"
fi
old=$(cd "$src" && CARGO_TARGET_DIR="$old_target" cargo bench --locked -p plumb-fd --bench graph --no-run 2>&1 |
    sed -n 's/.*Executable.*(\(.*\)).*/\1/p' | tail -1)
new=$(cargo bench --locked -p plumb-fd --bench graph --no-run 2>&1 |
    sed -n 's/.*Executable.*(\(.*\)).*/\1/p' | tail -1)
case "$old" in /*) ;; *) old="$PWD/$src/$old" ;; esac
case "$new" in /*) ;; *) new="$PWD/$new" ;; esac
export RAYON_NUM_THREADS=1 MATMUL_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 OMP_NUM_THREADS=1 MKL_NUM_THREADS=1
date -u
uptime
for r in $(seq "$runs"); do
    (cd "$src/crates/fd" && "$old" dense-engine --bench 2>/dev/null)
    (cd crates/fd && "$new" dense-plumb --bench 2>/dev/null)
done
date -u
uptime
