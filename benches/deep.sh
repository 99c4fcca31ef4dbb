#!/usr/bin/env bash
# The deep-network and many-tensor figures of docs/budget.md: user time and peak memory of the
# release binary on the invented inputs of benches/deep.py and benches/many.py, with the load
# beside each. Usage: benches/deep.sh [layers …] (default 500 1000 2000 5000); PLUMB= another binary.
set -euo pipefail
cd "$(dirname "$0")/.."
plumb=${PLUMB:-$PWD/target/release/plumb}
out=target/deep
layers=("${@:-500}")
[ $# -gt 0 ] || layers=(500 1000 2000 5000)
python3 benches/deep.py "$out" "${layers[@]}"
measure() {
    local what=$1
    shift
    /usr/bin/time -f "%U %M" -o "$out/time.txt" "$@" >/dev/null 2>&1 || true
    read -r user kb <"$out/time.txt"
    printf '%-44s user %7.2f s  peak %6.1f MiB  load %s\n' "$what" "$user" "$(echo "$kb / 1024" | bc -l)" \
        "$(cut -d' ' -f1-3 /proc/loadavg)"
}
cd "$out"
for n in "${layers[@]}"; do
    measure "check deep$n.toml" "$plumb" check "deep$n.toml" -q --format json
    measure "check deep$n.toml -w deep$n-biased.npz" "$plumb" check "deep$n.toml" -w "deep$n-biased.npz" -q --format json
    measure "check graph-deep$n.toml" "$plumb" check "graph-deep$n.toml" -q --format json
done
cd - >/dev/null
[ -f "$out/many.npz" ] || python3 benches/many.py "$out"
python3 benches/deep.py "$out" 2000
cd "$out"
for f in many.safetensors many.npz; do
    measure "shapes deep2000.toml -w $f" "$plumb" shapes deep2000.toml -w "$f" --format json
    measure "audit deep2000.toml -w $f" "$plumb" audit deep2000.toml -w "$f" --format json
done
measure "shapes wide.toml" "$plumb" shapes wide.toml --format json
