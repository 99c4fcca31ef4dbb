#!/usr/bin/env python3
"""Writes the deep-network descriptions docs/budget.md measures `plumb check` on.

Invented networks, no data: L dense layers of one tanh unit each on one input feature, squared
error (the check draws seeded weights and a synthetic batch). `deepL.toml` runs the dense engine;
`graph-deepL.toml` is the same stack behind a one-channel input of length 1 and a `flatten`, which
sends it to the layer graph instead. Drawn weights have zero biases; `deepL-biased.npz` and
`graph-deepL-biased.npz` hold invented weights with biases (seeded draws, the layers' augmented
1 × 2 matrices [b, w]), the case where a small step is rounded away within a few dozen layers.

    python3 benches/deep.py target/deep 500 1000 2000 5000
"""

import pathlib
import sys

import numpy as np

HEADER = "# Invented for the time and memory budget (benches/deep.py): {layers} one-unit tanh layers.\n"
LAYER = '[[layer]]\nunits = 1\nactivation = "tanh"\n\n'


def dense(layers: int) -> str:
    return (
        HEADER.format(layers=layers)
        + 'inputs = 1\nloss = "squared-error"\n\n'
        + LAYER * layers
    )


def graph(layers: int) -> str:
    return (
        HEADER.format(layers=layers)
        + 'input = [1, 1]\nloss = "squared-error"\n\n[[layer]]\nkind = "flatten"\n\n'
        + LAYER * layers
    )


def main() -> None:
    out = pathlib.Path(sys.argv[1])
    out.mkdir(parents=True, exist_ok=True)
    for arg in sys.argv[2:]:
        layers = int(arg)
        (out / f"deep{layers}.toml").write_text(dense(layers))
        (out / f"graph-deep{layers}.toml").write_text(graph(layers))
        rng = np.random.default_rng(layers)
        thetas = [np.array([[rng.uniform(-0.5, 0.5), rng.uniform(-1.5, 1.5)]]) for _ in range(layers)]
        np.savez(out / f"deep{layers}-biased.npz", **{f"layer{j + 1}": t for j, t in enumerate(thetas)})
        # Behind the flatten (layer 1), the dense layers are layers 2 … L + 1.
        np.savez(out / f"graph-deep{layers}-biased.npz", **{f"layer{j + 2}": t for j, t in enumerate(thetas)})


if __name__ == "__main__":
    main()
