#!/usr/bin/env python3
"""Writes cnn.npz: the reference loss and gradient of examples/pump-cnn.toml at a seeded point, by
autograd through a plain NumPy forward pass written apart from examples/python/cnn_numpy.py.

    pip install numpy scipy autograd
    python3 examples/python/reference/generate_cnn.py     # rewrites cnn.npz next to this file

The convolution here gathers every window by fancy indexing (not the example's loop over taps), and
its forward pass is checked against scipy.signal.correlate before anything is written. Batch norm
uses np.var (biased: Ioffe & Szegedy's training-mode statistics), the loss a log-sum-exp. The point
(weights and a batch of 6 windows of 64 samples) is drawn from seed 20261202 and is INVENTED data,
not pump measurements. cnn.npz holds param/NAME, grad/NAME, x (6, 1, 64), y (6, 3 one-hot), loss.
"""
import os

import autograd.numpy as anp
import numpy as np
import scipy.signal
from autograd import grad
from autograd.scipy.special import logsumexp

L2, EPS = 0.01, 1e-5
# name: (kernel, padding before, padding after)
CONV = {"conv1": (5, 2, 2), "conv2": (3, 1, 1), "conv3": (3, 1, 1)}
SHAPES = {"conv1.weight": (4, 1, 5), "conv1.bias": (4,), "conv2.weight": (4, 4, 3),
          "norm1.scale": (4,), "norm1.shift": (4,), "conv3.weight": (4, 4, 3),
          "norm2.scale": (4,), "norm2.shift": (4,), "out.weight": (3, 4), "out.bias": (3,)}
DECAYS = ["conv1.weight", "conv2.weight", "conv3.weight", "out.weight"]


def conv(x, w, name):
    k, before, after = CONV[name]
    xp = anp.concatenate([anp.zeros(x.shape[:2] + (before,)), x, anp.zeros(x.shape[:2] + (after,))],
                         axis=2)
    n = xp.shape[2] - k + 1
    idx = np.arange(n)[:, None] + np.arange(k)[None, :]   # window t reads positions t .. t + k - 1
    windows = xp[:, :, idx]                               # (m, in, n, k)
    return anp.einsum("mcnk,ock->mon", windows, w)


def batch_norm(x, scale, shift):
    mean = anp.mean(x, axis=(0, 2), keepdims=True)
    var = anp.var(x, axis=(0, 2), keepdims=True)
    return scale[None, :, None] * (x - mean) / anp.sqrt(var + EPS) + shift[None, :, None]


def loss(flat, x, y):
    p = dict(zip(SHAPES, flat))
    a1 = anp.tanh(conv(x, p["conv1.weight"], "conv1") + p["conv1.bias"][None, :, None])
    m, c, n = a1.shape
    a2 = anp.max(anp.reshape(a1, (m, c, n // 2, 2)), axis=3)
    h = anp.maximum(batch_norm(conv(a2, p["conv2.weight"], "conv2"), p["norm1.scale"],
                               p["norm1.shift"]), 0)
    h = batch_norm(conv(h, p["conv3.weight"], "conv3"), p["norm2.scale"], p["norm2.shift"])
    h = anp.maximum(h + a2, 0)
    z = anp.mean(h, axis=2) @ p["out.weight"].T + p["out.bias"]
    data = -anp.sum(y * (z - logsumexp(z, axis=1, keepdims=True))) / m
    return data + L2 / (2 * m) * sum(anp.sum(p[k] ** 2) for k in DECAYS)


def main():
    rng = np.random.default_rng(20261202)
    p = {}
    for name, shape in SHAPES.items():
        if name.endswith("scale"):
            p[name] = 1 + 0.3 * rng.standard_normal(shape)
        elif name.endswith("weight"):
            fan_in = int(np.prod(shape[1:]))
            p[name] = rng.standard_normal(shape) / np.sqrt(fan_in)
        else:
            p[name] = 0.2 * rng.standard_normal(shape)
    m = 6
    x = rng.standard_normal((m, 1, 64))
    y = np.eye(3)[rng.integers(0, 3, m)]

    # The windowed convolution against scipy's correlate, per output and input channel.
    for name, (k, before, after) in CONV.items():
        w = rng.standard_normal((4, 1 if name == "conv1" else 4, k))
        xs = rng.standard_normal((2, w.shape[1], 32))
        xp = np.pad(xs, ((0, 0), (0, 0), (before, after)))
        want = np.array([[sum(scipy.signal.correlate(xp[i, c], w[o, c], mode="valid")
                              for c in range(w.shape[1])) for o in range(4)] for i in range(2)])
        assert np.allclose(conv(xs, w, name), want, rtol=1e-13, atol=1e-13), name

    flat = [p[n] for n in SHAPES]
    value = loss(flat, x, y)
    grads = grad(loss)(flat, x, y)
    out = {"x": x, "y": y, "loss": np.array(value)}
    for name, g in zip(SHAPES, grads):
        out["param/" + name] = p[name]
        out["grad/" + name] = g
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "cnn.npz")
    np.savez(path, **out)
    print(f"wrote {path}: loss {value:.6f}")


if __name__ == "__main__":
    main()
