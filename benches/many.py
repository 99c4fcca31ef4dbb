#!/usr/bin/env python3
"""Writes the hostile files docs/budget.md times `shapes` and `audit` on (the sizes of
crates/audit/tests/it/hostile.rs).

Invented, no data: `many.safetensors` and `many.npz` hold 100,000 stray tensors `t0` … `t99999`
of one float32 zero each (for `shapes`); `many-fit.npz` holds the 2,000 layers of benches/deep.py's
`deep2000.toml` (augmented 1 × 2 matrices, seeded draws) and 98,000 strays beside them (for
`audit`, which refuses a file none of whose tensors fit); `wide.toml` is a 1 MiB description of
29,000-odd one-unit tanh layers, and `wide-half.toml` half of it.

    python3 benches/many.py target/deep
"""

import json
import pathlib
import struct
import sys

import numpy as np

TENSORS = 100_000


def safetensors(path: pathlib.Path) -> None:
    header = {f"t{i}": {"dtype": "F32", "shape": [1], "data_offsets": [4 * i, 4 * i + 4]} for i in range(TENSORS)}
    text = json.dumps(header, separators=(",", ":")).encode()
    text += b" " * (-len(text) % 8)
    path.write_bytes(struct.pack("<Q", len(text)) + text + bytes(4 * TENSORS))


def npz(path: pathlib.Path) -> None:
    zero = np.zeros(1, dtype=np.float32)
    np.savez(path, **{f"t{i}": zero for i in range(TENSORS)})


def fit(path: pathlib.Path) -> None:
    rng = np.random.default_rng(7)
    arrays = {f"layer{j + 1}": rng.uniform(-1.0, 1.0, size=(1, 2)) for j in range(2_000)}
    zero = np.zeros(1, dtype=np.float32)
    arrays.update({f"t{i}": zero for i in range(TENSORS - 2_000)})
    np.savez(path, **arrays)


def wide(path: pathlib.Path, size: int = 1 << 20) -> None:
    text = "# Invented (benches/many.py): a 1 MiB description of one-unit tanh layers.\n"
    text += 'inputs = 1\nloss = "squared-error"\n'
    layer = '[[layer]]\nunits=1\nactivation="tanh"\n'
    while len(text) + len(layer) <= size:
        text += layer
    path.write_text(text)


def main() -> None:
    out = pathlib.Path(sys.argv[1])
    out.mkdir(parents=True, exist_ok=True)
    if not (out / "many.npz").exists():
        safetensors(out / "many.safetensors")
        npz(out / "many.npz")
    fit(out / "many-fit.npz")
    wide(out / "wide.toml")
    wide(out / "wide-half.toml", 1 << 19)


if __name__ == "__main__":
    main()
