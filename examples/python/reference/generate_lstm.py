#!/usr/bin/env python3
"""Writes lstm.npz: the reference loss and gradient of examples/pump-lstm.toml at a seeded point, by
autograd through a plain NumPy forward pass of the published LSTM with forget gate (Hochreiter &
Schmidhuber 1997; Gers, Schmidhuber & Cummins 2000), written apart from
examples/python/lstm_numpy.py.

    pip install numpy autograd
    python3 examples/python/reference/generate_lstm.py    # rewrites lstm.npz next to this file

Each gate is its own product with its own rows of the stacked weights (looked up by letter in the
declared order "ifgo"), the loss a log-sum-exp per step. The point (weights and a batch of 5
sequences of 24 steps) is drawn from seed 20261203 and is INVENTED data, not pump measurements.
lstm.npz holds param/NAME, grad/NAME, x (5, 24, 4), y (5, 24, 3 one-hot per step), loss.
"""
import os

import autograd.numpy as anp
import numpy as np
from autograd import grad
from autograd.scipy.special import logsumexp

STEPS, FEATURES, UNITS, CLASSES, L2 = 24, 4, 6, 3, 0.01
ORDER = "ifgo"
SHAPES = {"lstm.input.weight": (4 * UNITS, FEATURES), "lstm.recurrent.weight": (4 * UNITS, UNITS),
          "lstm.bias": (4 * UNITS,), "out.weight": (CLASSES, UNITS), "out.bias": (CLASSES,)}
DECAYS = ["lstm.input.weight", "lstm.recurrent.weight", "out.weight"]


def loss(flat, x, y):
    p = dict(zip(SHAPES, flat))
    m = x.shape[0]

    def gate(letter, xt, h):
        rows = slice(ORDER.index(letter) * UNITS, (ORDER.index(letter) + 1) * UNITS)
        return (anp.dot(xt, p["lstm.input.weight"][rows].T)
                + anp.dot(h, p["lstm.recurrent.weight"][rows].T) + p["lstm.bias"][rows])

    h = anp.zeros((m, UNITS))
    c = anp.zeros((m, UNITS))
    total = 0.0
    for t in range(STEPS):
        xt = x[:, t, :]
        forget = 1 / (1 + anp.exp(-gate("f", xt, h)))
        enter = 1 / (1 + anp.exp(-gate("i", xt, h)))
        emit = 1 / (1 + anp.exp(-gate("o", xt, h)))
        c = forget * c + enter * anp.tanh(gate("g", xt, h))
        h = emit * anp.tanh(c)
        z = anp.dot(h, p["out.weight"].T) + p["out.bias"]
        total = total - anp.sum(y[:, t, :] * (z - logsumexp(z, axis=1, keepdims=True)))
    return total / (m * STEPS) + L2 / (2 * m) * sum(anp.sum(p[k] ** 2) for k in DECAYS)


def main():
    rng = np.random.default_rng(20261203)
    p = {n: rng.standard_normal(s) * (0.3 if n.endswith("bias") else 1 / np.sqrt(s[-1]))
         for n, s in SHAPES.items()}
    m = 5
    x = rng.standard_normal((m, STEPS, FEATURES))
    y = np.eye(CLASSES)[rng.integers(0, CLASSES, (m, STEPS))]
    flat = [p[n] for n in SHAPES]
    value = loss(flat, x, y)
    out = {"x": x, "y": y, "loss": np.array(value)}
    for name, g in zip(SHAPES, grad(loss)(flat, x, y)):
        out["param/" + name] = p[name]
        out["grad/" + name] = g
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "lstm.npz")
    np.savez(path, **out)
    print(f"wrote {path}: loss {value:.6f}")


if __name__ == "__main__":
    main()
