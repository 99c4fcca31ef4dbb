#!/usr/bin/env python3
"""Writes attention.npz: the reference loss and gradient of examples/pump-attention.toml at a
seeded point, by autograd through a plain NumPy forward pass of scaled dot-product attention
(Vaswani et al. 2017), written apart from examples/python/attention_numpy.py.

    pip install numpy autograd
    python3 examples/python/reference/generate_attention.py   # rewrites attention.npz here

One head at a time, one sample at a time, the causal mask as -1e30 added above the diagonal (its
exponential is exactly 0 in float64). The point (weights and a batch of 4 sequences of 24 steps)
is drawn from seed 20261204 and is INVENTED data. attention.npz holds param/NAME, grad/NAME,
x (4, 24, 4), y (4, 24, 3 one-hot per step), loss.
"""
import os

import autograd.numpy as anp
import numpy as np
from autograd import grad
from autograd.scipy.special import logsumexp

STEPS, FEATURES, WIDTH, HEADS, CLASSES, L2 = 24, 4, 8, 2, 3, 0.01
D = WIDTH // HEADS
SHAPES = {"embed.weight": (WIDTH, FEATURES), "embed.bias": (WIDTH,)}
for proj in ["query", "key", "value", "output"]:
    SHAPES[f"attend.{proj}.weight"] = (WIDTH, WIDTH)
    SHAPES[f"attend.{proj}.bias"] = (WIDTH,)
SHAPES["out.weight"], SHAPES["out.bias"] = (CLASSES, WIDTH), (CLASSES,)
MASK = np.triu(np.full((STEPS, STEPS), -1e30), 1)


def loss(flat, x, y):
    p = dict(zip(SHAPES, flat))
    m = x.shape[0]
    total = 0.0
    for i in range(m):
        e = anp.tanh(anp.dot(x[i], p["embed.weight"].T) + p["embed.bias"])
        proj = {n: anp.dot(e, p[f"attend.{n}.weight"].T) + p[f"attend.{n}.bias"]
                for n in ("query", "key", "value")}
        heads = []
        for h in range(HEADS):
            cols = slice(h * D, (h + 1) * D)
            scores = anp.dot(proj["query"][:, cols], proj["key"][:, cols].T) / anp.sqrt(D) + MASK
            weights = anp.exp(scores - logsumexp(scores, axis=1, keepdims=True))
            heads.append(anp.dot(weights, proj["value"][:, cols]))
        a = anp.dot(anp.concatenate(heads, axis=1), p["attend.output.weight"].T) \
            + p["attend.output.bias"]
        z = anp.dot(a, p["out.weight"].T) + p["out.bias"]
        total = total - anp.sum(y[i] * (z - logsumexp(z, axis=1, keepdims=True)))
    decay = sum(anp.sum(p[k] ** 2) for k in SHAPES if k.endswith("weight"))
    return total / (m * STEPS) + L2 / (2 * m) * decay


def main():
    rng = np.random.default_rng(20261204)
    p = {n: rng.standard_normal(s) * (0.3 if n.endswith("bias") else 1 / np.sqrt(s[-1]))
         for n, s in SHAPES.items()}
    m = 4
    x = rng.standard_normal((m, STEPS, FEATURES))
    y = np.eye(CLASSES)[rng.integers(0, CLASSES, (m, STEPS))]
    flat = [p[n] for n in SHAPES]
    value = loss(flat, x, y)
    out = {"x": x, "y": y, "loss": np.array(value)}
    for name, g in zip(SHAPES, grad(loss)(flat, x, y)):
        out["param/" + name] = p[name]
        out["grad/" + name] = g
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "attention.npz")
    np.savez(path, **out)
    print(f"wrote {path}: loss {value:.6f}")


if __name__ == "__main__":
    main()
