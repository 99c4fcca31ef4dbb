#!/usr/bin/env python3
"""A hand-written NumPy causal self-attention model of the invented pump scenario (c), for
`plumb probe`.

The network is examples/pump-attention.toml: an INVENTED centrifugal-pump state classifier
(normal, cavitating, bearing wear) told at every hour from 24 hourly readings of four invented
sensors. x is (m, 24, 4); y is (m, 24, 3), one-hot per step.

  embed   dense 8 tanh at every step (embed.weight 8 x 4, embed.bias 8)
  attend  2-head scaled dot-product self-attention, causal: Q, K, V = E W^T + b (8 x 8 each,
          out x in), head h the columns 4h .. 4h + 3, P = softmax(Q_h K_h^T / 2) over steps <= t,
          O_h = P V_h, output O W_o^T + b_o
  out     dense 3 softmax at every step; cross-entropy averaged over samples and steps, plus
          (l2 / 2m) * the sum of squared weights (dense and the four projections; l2 = 0.01)

Forward and backward passes are written out by hand below; the program speaks plumb's wire
protocol through the plumb_wire package (clients/python).

  --plant CODE       attention-scale-missing, mask-ignored-in-backward, softmax-jacobian-diagonal
  --dtype f32|f64    compute in that type end to end, and say so in the hello (default f64)
  --self-check FILE  no protocol: the loss and gradient against FILE (reference/attention.npz,
                     written by autograd); exit 0 if all agree within 1e-10 of the tensor's
                     largest entry (a floor of 1e-6 of the whole gradient's: the key bias's
                     gradient is exactly zero), else 1
  --save FILE        with --self-check, also write the gradient computed to FILE (.npz)
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

STEPS, FEATURES, WIDTH, HEADS, CLASSES = 24, 4, 8, 2, 3
D = WIDTH // HEADS
L2 = 0.01
PROJ = ["query", "key", "value", "output"]
TENSORS = ([("embed.weight", (WIDTH, FEATURES)), ("embed.bias", (WIDTH,))]
           + [(f"attend.{p}.{r}", (WIDTH, WIDTH) if r == "weight" else (WIDTH,))
              for p in PROJ for r in ("weight", "bias")]
           + [("out.weight", (CLASSES, WIDTH)), ("out.bias", (CLASSES,))])
DECAYS = [n for n, _ in TENSORS if n.endswith("weight")]
MISTAKES = ["attention-scale-missing", "mask-ignored-in-backward", "softmax-jacobian-diagonal"]
ALLOWED = np.tril(np.ones((STEPS, STEPS), bool))  # step t attends to steps <= t


def softmax_rows(s, mask):
    s = np.where(mask, s, -np.inf)
    e = np.exp(s - s.max(axis=-1, keepdims=True))
    return e / e.sum(axis=-1, keepdims=True)


def forward(p, x):
    s = {"e": np.tanh(x @ p["embed.weight"].T + p["embed.bias"])}
    for n in ("query", "key", "value"):
        s[n] = s["e"] @ p[f"attend.{n}.weight"].T + p[f"attend.{n}.bias"]
    split = {n: s[n].reshape(*s[n].shape[:2], HEADS, D).transpose(0, 2, 1, 3)
             for n in ("query", "key", "value")}                       # (m, heads, steps, d)
    s["split"] = split
    s["P"] = softmax_rows(split["query"] @ split["key"].transpose(0, 1, 3, 2) / D ** 0.5,
                          ALLOWED)
    s["O"] = (s["P"] @ split["value"]).transpose(0, 2, 1, 3).reshape(x.shape[0], STEPS, WIDTH)
    s["a"] = s["O"] @ p["attend.output.weight"].T + p["attend.output.bias"]
    z = s["a"] @ p["out.weight"].T + p["out.bias"]
    s["z"] = z - z.max(axis=2, keepdims=True)
    return s


def loss_of(p, x, y):
    m = x.shape[0]
    z = forward(p, x)["z"]
    log_p = z - np.log(np.exp(z).sum(axis=2, keepdims=True))
    return -(y * log_p).sum() / (m * STEPS) + L2 / (2 * m) * sum((p[n] ** 2).sum() for n in DECAYS)


def dense_back(g, name, dout, inp):
    g[name + ".weight"] = np.einsum("mto,mti->oi", dout, inp)
    g[name + ".bias"] = dout.sum(axis=(0, 1))


def gradient_of(p, x, y, code=None):
    m = x.shape[0]
    s = forward(p, x)
    e = np.exp(s["z"])
    dz = (e / e.sum(axis=2, keepdims=True) * y.sum(axis=2, keepdims=True) - y) / (m * STEPS)
    g = {}
    dense_back(g, "out", dz, s["a"])
    da = dz @ p["out.weight"]
    dense_back(g, "attend.output", da, s["O"])
    dO = (da @ p["attend.output.weight"]).reshape(m, STEPS, HEADS, D).transpose(0, 2, 1, 3)
    q, k, v = s["split"]["query"], s["split"]["key"], s["split"]["value"]
    P = s["P"]
    if code == "mask-ignored-in-backward":  # P recomputed with every step allowed
        P = softmax_rows(q @ k.transpose(0, 1, 3, 2) / D ** 0.5, np.ones_like(ALLOWED))
    dv = P.transpose(0, 1, 3, 2) @ dO
    dP = dO @ v.transpose(0, 1, 3, 2)
    if code == "softmax-jacobian-diagonal":
        dS = P * (1 - P) * dP
    else:
        dS = P * (dP - (dP * P).sum(axis=-1, keepdims=True))
    scale = 1.0 if code == "attention-scale-missing" else 1 / D ** 0.5
    dq, dk = dS @ k * scale, dS.transpose(0, 1, 3, 2) @ q * scale
    de = 0
    for n, dh in (("query", dq), ("key", dk), ("value", dv)):
        dflat = dh.transpose(0, 2, 1, 3).reshape(m, STEPS, WIDTH)
        dense_back(g, f"attend.{n}", dflat, s["e"])
        de = de + dflat @ p[f"attend.{n}.weight"]
    dense_back(g, "embed", de * (1 - s["e"] ** 2), x)
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
                          lambda p, x, y: gradient_of(p, *as_batch(x, y), args.plant), args.save,
                          floor_share=1e-6)

    def named(params):
        return dict(zip((n for n, _ in TENSORS), params))

    def loss_fn(params, x, y):
        return loss_of(named(params), *as_batch(x, y))

    def grad_fn(params, x, y):
        return gradient_of(named(params), *as_batch(x, y), args.plant)

    serve("pump-attention-numpy", args.dtype, TENSORS, loss_fn, grad_fn,
          x_shape=(STEPS, FEATURES), y_shape=(STEPS, CLASSES))
    return 0


if __name__ == "__main__":
    sys.exit(main())
