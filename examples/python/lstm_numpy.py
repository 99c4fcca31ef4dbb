#!/usr/bin/env python3
"""A hand-written NumPy LSTM of the invented pump scenario (c), for `plumb probe`.

The network is examples/pump-lstm.toml: an INVENTED centrifugal-pump state classifier (normal,
cavitating, bearing wear) told at every hour from 24 hourly readings of four invented sensors.
x is (m, 24, 4); y is (m, 24, 3), one-hot per step.

  lstm  6 units, gate order "ifgo", every step's h passed on: with a = W x + U h_prev + b cut into
        the blocks i, f, g, o: i, f, o = sigmoid, g = tanh, c = f c_prev + i g, h = o tanh(c),
        from h = c = 0 (lstm.input.weight 24 x 4, lstm.recurrent.weight 24 x 6, lstm.bias 24)
  out   dense 3 softmax at every step (out.weight 3 x 6, out.bias 3); cross-entropy averaged over
        samples and steps, plus (l2 / 2m) * the sum of squared weights (both lstm weights and
        out.weight; l2 = 0.01; m the number of samples)

Forward and backward (through time) passes are written out by hand below. The program speaks plumb's
wire protocol through the plumb_wire package (clients/python); anything for people goes to stderr.

  --plant CODE          plant one recurrent mistake of docs/mistakes.md: time-truncated,
                        state-gradient-dropped, time-overwritten, gates-reordered
  --dtype f32|f64       compute in that type end to end, and say so in the hello (default f64)
  --self-check FILE     no protocol: compare the loss and gradient with the reference in FILE
                        (examples/python/reference/lstm.npz, written by autograd), print the
                        relative error per tensor, exit 0 if all are within 1e-10, else 1
  --save FILE           with --self-check, also write the gradient computed to FILE (.npz)
"""
import argparse
import os
import sys

import numpy as np

from reference_check import self_check

try:
    from plumb_wire import serve
except ImportError:  # not installed: the package in this repository (clients/python)
    sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..",
                                    "clients", "python"))
    from plumb_wire import serve

STEPS, FEATURES, UNITS, CLASSES = 24, 4, 6, 3
L2 = 0.01
TENSORS = [("lstm.input.weight", (4 * UNITS, FEATURES)),
           ("lstm.recurrent.weight", (4 * UNITS, UNITS)), ("lstm.bias", (4 * UNITS,)),
           ("out.weight", (CLASSES, UNITS)), ("out.bias", (CLASSES,))]
DECAYS = ["lstm.input.weight", "lstm.recurrent.weight", "out.weight"]
MISTAKES = ["time-truncated", "state-gradient-dropped", "time-overwritten", "gates-reordered"]


def sigmoid(a):
    return 1 / (1 + np.exp(-a))


def forward(p, x):
    """Every step's gates and states (time-major lists) and the logits (m, steps, classes)."""
    m = x.shape[0]
    w, u, b = p["lstm.input.weight"], p["lstm.recurrent.weight"], p["lstm.bias"]
    h = np.zeros((m, UNITS), x.dtype)
    c = np.zeros((m, UNITS), x.dtype)
    hs, cs, gates = [h], [c], []
    for t in range(STEPS):
        a = x[:, t] @ w.T + h @ u.T + b
        i, f, g, o = (a[:, k * UNITS:(k + 1) * UNITS] for k in range(4))  # the order "ifgo"
        i, f, g, o = sigmoid(i), sigmoid(f), np.tanh(g), sigmoid(o)
        c = f * c + i * g
        h = o * np.tanh(c)
        hs.append(h)
        cs.append(c)
        gates.append((i, f, g, o))
    hall = np.stack(hs[1:], axis=1)
    logits = hall @ p["out.weight"].T + p["out.bias"]
    return hs, cs, gates, hall, logits - logits.max(axis=2, keepdims=True)


def loss_of(p, x, y):
    m = x.shape[0]
    z = forward(p, x)[4]
    log_p = z - np.log(np.exp(z).sum(axis=2, keepdims=True))
    penalty = sum((p[n] ** 2).sum() for n in DECAYS)
    return -(y * log_p).sum() / (m * STEPS) + L2 / (2 * m) * penalty


def gradient_of(p, x, y, code=None):
    """The loss and every tensor's gradient, with the recurrent mistake `code` planted."""
    m = x.shape[0]
    w, u = p["lstm.input.weight"], p["lstm.recurrent.weight"]
    hs, cs, gates, hall, z = forward(p, x)
    e = np.exp(z)
    prob = e / e.sum(axis=2, keepdims=True)
    dz = (prob * y.sum(axis=2, keepdims=True) - y) / (m * STEPS)
    g = {"out.weight": np.einsum("mtk,mtu->ku", dz, hall), "out.bias": dz.sum(axis=(0, 1))}
    incoming = dz @ p["out.weight"]                     # (m, steps, units): dL/dh from each step
    dw, du, db = np.zeros_like(w), np.zeros_like(u), np.zeros_like(p["lstm.bias"])
    dh = np.zeros((m, UNITS), x.dtype)
    dc = np.zeros((m, UNITS), x.dtype)
    first = STEPS - 1 if code == "time-truncated" else 0
    for t in reversed(range(first, STEPS)):             # backpropagation through time
        i, f, gg, o = gates[t]
        dh = dh + incoming[:, t]
        tc = np.tanh(cs[t + 1])
        dc = dc + dh * o * (1 - tc ** 2)
        da = np.concatenate([dc * gg * i * (1 - i), dc * cs[t] * f * (1 - f),
                             dc * i * (1 - gg ** 2), dh * tc * o * (1 - o)], axis=1)
        terms = (da.T @ x[:, t], da.T @ hs[t], da.sum(axis=0))
        if code == "time-overwritten":                  # assigned, so the first step's remains
            dw, du, db = terms
        else:
            dw, du, db = dw + terms[0], du + terms[1], db + terms[2]
        if code == "state-gradient-dropped":            # each step from its own incoming only
            dh, dc = np.zeros_like(dh), np.zeros_like(dc)
        else:
            dh, dc = da @ u, dc * f
    if code == "gates-reordered":                       # the blocks written as o, g, f, i
        dw, du, db = (np.concatenate(np.split(a, 4, axis=0)[::-1], axis=0) for a in (dw, du, db))
    g["lstm.input.weight"], g["lstm.recurrent.weight"], g["lstm.bias"] = dw, du, db
    for n in DECAYS:
        g[n] = g[n] + L2 / m * p[n]
    return loss_of(p, x, y), [g[n] for n, _ in TENSORS]


def as_batch(x, y):
    return (x.reshape(x.shape[0], STEPS, FEATURES), y.reshape(y.shape[0], STEPS, CLASSES))


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--plant", choices=MISTAKES)
    ap.add_argument("--dtype", choices=["f64", "f32"], default="f64")
    ap.add_argument("--self-check", metavar="FILE")
    ap.add_argument("--save", metavar="FILE")
    args = ap.parse_args()
    if args.self_check:
        return self_check(args.self_check, TENSORS,
                          lambda p, x, y: gradient_of(p, *as_batch(x, y), args.plant), args.save)

    def named(params):
        return dict(zip((n for n, _ in TENSORS), params))

    def loss_fn(params, x, y):
        return loss_of(named(params), *as_batch(x, y))

    def grad_fn(params, x, y):
        return gradient_of(named(params), *as_batch(x, y), args.plant)

    serve("pump-lstm-numpy", args.dtype, TENSORS, loss_fn, grad_fn,
          x_shape=(STEPS, FEATURES), y_shape=(STEPS, CLASSES))
    return 0


if __name__ == "__main__":
    sys.exit(main())
