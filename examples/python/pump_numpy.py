#!/usr/bin/env python3
"""A hand-written NumPy backpropagation of the invented pump-state classifier, for `plumb probe`.

The network is examples/pump.toml (examples/pump-relu.toml with --hidden relu): an INVENTED
centrifugal-pump state classifier (normal, cavitating, bearing wear) from four invented sensor
readings, 4 inputs -> 8 -> 6 hidden units -> 3 softmax, cross-entropy, l2 = 0.01, augmented layout
(layerJ is units x (inputs + 1), column 0 multiplies the bias unit). It speaks plumb's wire protocol
through the plumb_wire package (clients/python); anything for people goes to stderr.

  --plant CODE[:LAYER]  plant one mistake of docs/mistakes.md (every code but `unexplained`).
                        Whole-network codes change every layer, or only layer LAYER (1..3).
                        Hidden-layer codes take :K (1 or 2, default 1), changing layers 1..K.
  --factor F            the factor of constant-factor (default 2.0)
  --dtype f32|f64       compute in that type end to end, and say so in the hello (default f64)
  --hidden tanh|relu    the hidden activation (default tanh)
  --fail MODE           misbehave for plumb's failure tests: crash, hang, garbage, shape, nan, version
  --units A,B           other hidden widths (default 8,6), e.g. 96,96 for the ~10k-parameter
                        benchmark network of benches/probe-10k.toml
"""
import argparse
import json
import os
import sys
import time

import numpy as np

try:
    from plumb_wire import serve
except ImportError:  # not installed: the package in this repository (clients/python)
    sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..",
                                    "clients", "python"))
    from plumb_wire import serve

SIZES = [4, 8, 6, 3]
L2 = 0.01
NAMES = [f"layer{j + 1}" for j in range(len(SIZES) - 1)]
SHAPES = [(SIZES[j + 1], SIZES[j] + 1) for j in range(len(SIZES) - 1)]

WHOLE = ["sign-flipped", "missing-batch-mean", "double-batch-mean", "constant-factor",
         "bias-regularized", "regularization-missing", "regularization-unscaled", "transposed",
         "bias-gradient-missing", "partial-batch", "output-delta-mismatch", "layers-swapped"]
HIDDEN = ["activation-derivative-missing", "derivative-at-output", "bias-rows-shifted"]


def unit(z, hidden):
    return np.tanh(z) if hidden == "tanh" else np.maximum(z, 0)


def unit_slope(z, hidden):
    # relu's slope is taken as 0 at exactly 0, as docs/description.md says.
    return 1 - np.tanh(z) ** 2 if hidden == "tanh" else (z > 0).astype(z.dtype)


def with_bias_unit(a):
    return np.hstack([np.ones((a.shape[0], 1), a.dtype), a])


def run_forward(params, x, hidden):
    """Every layer's input (ins[0] is x), the output layer's shifted logits and probabilities."""
    ins = [x]
    for theta in params[:-1]:
        ins.append(unit(with_bias_unit(ins[-1]) @ theta.T, hidden))
    logits = with_bias_unit(ins[-1]) @ params[-1].T
    logits = logits - logits.max(axis=1, keepdims=True)
    e = np.exp(logits)
    return ins, logits, e / e.sum(axis=1, keepdims=True)


# The data term's reduction over the batch: "mean" (the description's default) or "sum"
# (--reduction sum, for a description that declares reduction = "sum").
REDUCTION = "mean"


def per_sample(m):
    """What the data term's sum over the samples is divided by."""
    return m if REDUCTION == "mean" else 1


def pump_loss(params, x, y, hidden):
    """Cross-entropy (mean, or summed under --reduction sum) plus (l2 / 2m) times the sum of
    squared non-bias weights."""
    m = x.shape[0]
    _, logits, _ = run_forward(params, x, hidden)
    log_p = logits - np.log(np.exp(logits).sum(axis=1, keepdims=True))
    penalty = sum((theta[:, 1:] ** 2).sum() for theta in params)
    return -(y * log_p).sum() / per_sample(m) + L2 / (2 * m) * penalty


def pump_gradient(params, x, y, hidden, code=None, where=None, factor=2.0):
    """Loss and per-layer gradients, with the mistake `code` planted (see the module docstring)."""
    m = x.shape[0]
    ins, _, p = run_forward(params, x, hidden)
    # Error at the output logits: softmax with cross-entropy gives (p * sum(y) - y) / m.
    err = (p * y.sum(axis=1, keepdims=True) - y) / per_sample(m)
    if code == "output-delta-mismatch":  # squared error's: softmax's Jacobian applied to (p - y) / m
        r = (p - y) / per_sample(m)
        err = p * (r - (p * r).sum(axis=1, keepdims=True))
    data, last_only = [None] * len(params), [None] * len(params)
    for j in reversed(range(len(params))):  # j is 0-based: params[j] is layer j + 1
        inputs = with_bias_unit(ins[j])
        data[j] = err.T @ inputs
        last_only[j] = err[-1:].T @ inputs[-1:]
        if j == 0:
            break
        # Push the error back through layer j + 1 to the hidden layer k = j (1-based).
        hidden_code = code if code in HIDDEN and where == j else None
        if hidden_code == "bias-rows-shifted":  # the bias column kept, the last one dropped
            back = (err @ params[j])[:, :-1]
        else:
            back = err @ params[j][:, 1:]
        if hidden_code == "activation-derivative-missing":
            err = back
        elif hidden_code == "derivative-at-output":  # the slope taken at the unit's output
            err = back * unit_slope(ins[j], hidden)
        else:
            z = with_bias_unit(ins[j - 1]) @ params[j - 1].T
            err = back * unit_slope(z, hidden)

    def regular(theta):
        r = L2 / m * theta
        r[:, 0] = 0
        return r

    right = [d + regular(t) for d, t in zip(data, params)]
    planted = {
        "sign-flipped": lambda j: -right[j],
        "missing-batch-mean": lambda j: data[j] * m + regular(params[j]),
        "double-batch-mean": lambda j: data[j] / m + regular(params[j]),
        "constant-factor": lambda j: right[j] * factor,
        "bias-regularized": lambda j: right[j] + L2 / m * np.where(
            np.arange(params[j].shape[1]) == 0, params[j], 0),
        "regularization-missing": lambda j: data[j],
        "regularization-unscaled": lambda j: data[j] + m * regular(params[j]),
        "transposed": lambda j: right[j].T.copy(),
        "bias-gradient-missing": lambda j: np.hstack([np.zeros_like(right[j][:, :1]), right[j][:, 1:]]),
        "partial-batch": lambda j: last_only[j] + regular(params[j]),
        "layers-swapped": lambda j: right[{0: 1, 1: 0}.get(j, j)],
    }
    grads = list(right)  # backward-pass codes (hidden ones, output-delta-mismatch) are in `right`
    if code in planted:
        layers = range(len(params)) if where is None else [where - 1]
        grads = [planted[code](j) if j in layers else g for j, g in enumerate(right)]
    if code == "output-delta-mismatch" and where is not None:  # only that layer wrong
        good = pump_gradient(params, x, y, hidden)[1]
        grads = [g if j == where - 1 else good[j] for j, g in enumerate(right)]
    return pump_loss(params, x, y, hidden), grads


def parse_plant(text):
    code, _, at = text.partition(":")
    if code not in WHOLE + HIDDEN:
        raise SystemExit(f"pump-numpy: unknown --plant code {code!r}; known: {', '.join(WHOLE + HIDDEN)}")
    if code in HIDDEN:
        k = int(at or 1)
        if k not in (1, 2):
            raise SystemExit(f"pump-numpy: {code} takes hidden layer 1 or 2, not {k}")
        return code, k
    if not at:
        return code, None
    if code == "layers-swapped" or int(at) not in (1, 2, 3):
        raise SystemExit(f"pump-numpy: {code} cannot be confined to layer {at!r}")
    return code, int(at)


def fail_at_hello(mode):
    """The failures that happen at the hello: answer it wrongly, then wait for plumb to go."""
    sys.stdin.buffer.readline()
    out = sys.stdout.buffer
    if mode == "garbage":
        out.write(b"pump pump pump, this is not JSON\n")
    else:
        reply = {"type": "hello", "protocol": 99 if mode == "version" else 1, "name": "pump-numpy",
                 "dtype": "f64", "tensors": [{"name": n, "shape": list(s)} for n, s in zip(NAMES, SHAPES)]}
        out.write(json.dumps(reply).encode() + b"\n")
    out.flush()
    if mode == "crash":
        print("pump-numpy: planted crash after the hello", file=sys.stderr)
        sys.exit(3)
    while sys.stdin.buffer.read(65536):
        pass


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--plant", type=parse_plant, default=(None, None))
    ap.add_argument("--factor", type=float, default=2.0)
    ap.add_argument("--dtype", choices=["f64", "f32"], default="f64")
    ap.add_argument("--hidden", choices=["tanh", "relu"], default="tanh")
    ap.add_argument("--fail", choices=["crash", "hang", "garbage", "shape", "nan", "version"])
    ap.add_argument("--units", type=lambda t: [int(u) for u in t.split(",")], default=None)
    ap.add_argument("--reduction", choices=["mean", "sum"], default="mean")
    args = ap.parse_args()
    global REDUCTION
    REDUCTION = args.reduction
    if args.units:  # the same code for wider hidden layers (the benchmark network)
        global SIZES, NAMES, SHAPES
        SIZES = [4, *args.units, 3]
        NAMES = [f"layer{j + 1}" for j in range(len(SIZES) - 1)]
        SHAPES = [(SIZES[j + 1], SIZES[j] + 1) for j in range(len(SIZES) - 1)]
    code, where = args.plant
    if args.fail in ("crash", "garbage", "version"):
        return fail_at_hello(args.fail)

    def loss_fn(params, x, y):
        return pump_loss(params, x, y, args.hidden)

    def grad_fn(params, x, y):
        loss, grads = pump_gradient(params, x, y, args.hidden, code, where, args.factor)
        if args.fail == "hang":
            print("pump-numpy: planted hang in the gradient", file=sys.stderr)
            while True:
                time.sleep(3600)
        if args.fail == "shape":
            grads[0] = grads[0][:-1]  # one row short, and the reply declares it so
        if args.fail == "nan":
            grads[1] = grads[1].copy()
            grads[1][2, 3] = np.nan
        return loss, grads

    serve("pump-numpy", args.dtype, list(zip(NAMES, SHAPES)), loss_fn, grad_fn,
          x_shape=(SIZES[0],), y_shape=(SIZES[-1],))


if __name__ == "__main__":
    main()
