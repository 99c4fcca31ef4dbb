#!/usr/bin/env python3
"""A hand-written NumPy 1-D CNN of the invented pump scenario (b), for `plumb probe`.

The network is examples/pump-cnn.toml: an INVENTED centrifugal-pump state classifier (normal,
cavitating, bearing wear) from a window of 64 invented vibration samples. x is (m, 1, 64).

  conv1  conv1d, 4 channels, kernel 5, padding 2, bias, tanh     -> (4, 64)
  pool1  max-pool1d, size 2                                      -> (4, 32)
  conv2  conv1d, 4 channels, kernel 3, padding "same", no bias
  norm1  batch-norm (training mode: the batch's statistics), relu
  conv3  conv1d, 4 channels, kernel 3, padding 1, no bias
  norm2  batch-norm
  skip   add pool1's output, relu                                -> (4, 32)
  gap    global average pool                                     -> (4,)
  out    dense 3 softmax (out.weight 3 x 4, out.bias 3), cross-entropy averaged over the batch,
         plus (l2 / 2m) * the sum of squared conv and dense weights (l2 = 0.01)

Forward and backward passes are written out by hand below. The program speaks plumb's wire
protocol through the plumb_wire package (clients/python); anything for people goes to stderr.

  --plant CODE[:LAYER]  plant one mistake of docs/mistakes.md in every layer of its kind, or in
                        LAYER only (a layer name above). conv: kernel-flipped, channels-swapped,
                        overlap-overwritten, padding-offset; pool: pool-gradient-spread; norm:
                        norm-statistics-constant, norm-epsilon-misplaced, norm-scale-unnormalised;
                        add: skip-gradient-dropped.
  --dtype f32|f64       compute in that type end to end, and say so in the hello (default f64)
  --input-gradient      also send the gradient with respect to x (the protocol's "input"), which
                        plumb checks against the reference's input gradient
  --self-check FILE     no protocol: compare this program's loss and gradient with the reference
                        in FILE (examples/python/reference/cnn.npz, written by autograd), print
                        the relative error per tensor and exit 0 if every one is within 1e-10, 1
                        otherwise (with --plant: which tensors the mistake changes)
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

CHANNELS, LENGTH, CLASSES = 1, 64, 3
L2 = 0.01
EPSILON = 1e-5  # batch-norm's default

# name: (kernel, padding before, padding after, in-channels, out-channels, bias); stride 1
CONVS = {"conv1": (5, 2, 2, 1, 4, True), "conv2": (3, 1, 1, 4, 4, False),
         "conv3": (3, 1, 1, 4, 4, False)}
NORMS = ["norm1", "norm2"]
# The conv mistakes that, in conv1 (its input is x), change only the input gradient.
INPUT_ONLY = ["overlap-overwritten", "padding-offset"]
TENSORS = [("conv1.weight", (4, 1, 5)), ("conv1.bias", (4,)), ("conv2.weight", (4, 4, 3)),
           ("norm1.scale", (4,)), ("norm1.shift", (4,)), ("conv3.weight", (4, 4, 3)),
           ("norm2.scale", (4,)), ("norm2.shift", (4,)), ("out.weight", (3, 4)),
           ("out.bias", (3,))]
DECAYS = ["conv1.weight", "conv2.weight", "conv3.weight", "out.weight"]
# In conv1, channels-swapped changes nothing (one input channel: o x i x k and i x o x k are the
# same buffer), and overlap-overwritten and padding-offset change only the input gradient, which
# only --input-gradient sends: planted there only when named (e.g. padding-offset:conv1).
MISTAKES = {
    "kernel-flipped": list(CONVS), "channels-swapped": ["conv2", "conv3"],
    "overlap-overwritten": ["conv1", "conv2", "conv3"],
    "padding-offset": ["conv1", "conv2", "conv3"],
    "pool-gradient-spread": ["pool1"],
    "norm-statistics-constant": NORMS, "norm-epsilon-misplaced": NORMS,
    "norm-scale-unnormalised": NORMS,
    "skip-gradient-dropped": ["skip"],
}


# ---- the layers: forward returns (output, what backward needs); backward returns gradients ----

def conv_forward(w, b, x, name):
    """Cross-correlation, stride 1: out[:, o, t] = sum over c, k of w[o, c, k] xp[:, c, t + k]."""
    k, before, after = CONVS[name][:3]
    xp = np.pad(x, ((0, 0), (0, 0), (before, after)))
    length = xp.shape[2] - k + 1
    out = sum(np.einsum("oc,mct->mot", w[:, :, j], xp[:, :, j:j + length]) for j in range(k))
    if b is not None:
        out = out + b[None, :, None]
    return out, xp


def conv_backward(w, xp, dout, name, mistake):
    """Gradients of the weight's data term and of the input, with a conv mistake if asked."""
    k, before, _ = CONVS[name][:3]
    length = dout.shape[2]
    dw = np.stack([np.einsum("mot,mct->oc", dout, xp[:, :, j:j + length]) for j in range(k)], 2)
    wk = w
    if mistake == "kernel-flipped":  # both gradients as if the kernel were turned around
        dw, wk = dw[:, :, ::-1], w[:, :, ::-1]
    if mistake == "channels-swapped":  # o and i exchanged, written back into the o x i x k buffer
        dw = np.ascontiguousarray(dw.transpose(1, 0, 2)).reshape(dw.shape)
    dxp = np.zeros_like(xp)
    if mistake == "overlap-overwritten":  # each window assigns its share; the last one wins
        for t in range(length):
            for j in range(k):
                dxp[:, :, t + j] = np.einsum("oc,mo->mc", wk[:, :, j], dout[:, :, t])
    else:
        for j in range(k):
            dxp[:, :, j:j + length] += np.einsum("oc,mot->mct", wk[:, :, j], dout)
    start = 0 if mistake == "padding-offset" else before
    dx = dxp[:, :, start:start + xp.shape[2] - before - CONVS[name][2]]
    return dw, dx


def pool_forward(x):
    """Max over windows of 2; ties go to the first maximum (argmax's choice)."""
    m, c, n = x.shape
    windows = x[:, :, :n // 2 * 2].reshape(m, c, n // 2, 2)
    which = windows.argmax(axis=3)
    return np.take_along_axis(windows, which[..., None], 3)[..., 0], (x.shape, which)


def pool_backward(saved, dout, mistake):
    shape, which = saved
    m, c, n = shape
    if mistake == "pool-gradient-spread":  # every position of the window gets the gradient
        dwin = np.repeat(dout[..., None], 2, axis=3)
    else:
        dwin = np.zeros(dout.shape + (2,), dout.dtype)
        np.put_along_axis(dwin, which[..., None], dout[..., None], 3)
    dx = np.zeros(shape, dout.dtype)
    dx[:, :, :n // 2 * 2] = dwin.reshape(m, c, -1)
    return dx


def norm_forward(scale, shift, x):
    """Batch-norm in training mode: per channel over samples and positions, biased variance."""
    mean = x.mean(axis=(0, 2), keepdims=True)
    var = ((x - mean) ** 2).mean(axis=(0, 2), keepdims=True)
    inv = 1 / np.sqrt(var + EPSILON)
    xhat = (x - mean) * inv
    return scale[None, :, None] * xhat + shift[None, :, None], (x, var, inv, xhat)


def norm_backward(scale, saved, dout, mistake):
    x, var, inv, xhat = saved
    dscale = (dout * (x if mistake == "norm-scale-unnormalised" else xhat)).sum(axis=(0, 2))
    dshift = dout.sum(axis=(0, 2))
    dxhat = dout * scale[None, :, None]
    if mistake == "norm-statistics-constant":  # the mean and variance taken as constants
        return dscale, dshift, inv * dxhat
    factor = 1 / (np.sqrt(var) + EPSILON) if mistake == "norm-epsilon-misplaced" else inv
    dx = factor * (dxhat - dxhat.mean(axis=(0, 2), keepdims=True)
                   - xhat * (dxhat * xhat).mean(axis=(0, 2), keepdims=True))
    return dscale, dshift, dx


def relu_slope(z):
    return (z > 0).astype(z.dtype)  # 0 at exactly 0


# ---- the network ----

def forward(p, x):
    """Every layer's output and what the backward pass needs; p maps tensor names to arrays."""
    s = {}
    s["z1"], s["xp1"] = conv_forward(p["conv1.weight"], p["conv1.bias"], x, "conv1")
    s["a1"] = np.tanh(s["z1"])
    s["a2"], s["pool"] = pool_forward(s["a1"])
    s["z3"], s["xp3"] = conv_forward(p["conv2.weight"], None, s["a2"], "conv2")
    s["n1"], s["norm1"] = norm_forward(p["norm1.scale"], p["norm1.shift"], s["z3"])
    s["a4"] = np.maximum(s["n1"], 0)
    s["z5"], s["xp5"] = conv_forward(p["conv3.weight"], None, s["a4"], "conv3")
    s["n2"], s["norm2"] = norm_forward(p["norm2.scale"], p["norm2.shift"], s["z5"])
    s["sum"] = s["n2"] + s["a2"]
    s["a7"] = np.maximum(s["sum"], 0)
    s["g"] = s["a7"].mean(axis=2)
    logits = s["g"] @ p["out.weight"].T + p["out.bias"]
    s["logits"] = logits - logits.max(axis=1, keepdims=True)
    return s


def loss_of(p, x, y):
    m = x.shape[0]
    z = forward(p, x)["logits"]
    log_p = z - np.log(np.exp(z).sum(axis=1, keepdims=True))
    penalty = sum((p[n] ** 2).sum() for n in DECAYS)
    return -(y * log_p).sum() / m + L2 / (2 * m) * penalty


def gradient_of(p, x, y, code=None, layer=None, with_input=False):
    """The loss and every tensor's gradient (and the input gradient, `with_input`), with mistake
    `code` planted in `layer` (None: every layer of its kind but conv1's input-only ones)."""
    m = x.shape[0]
    s = forward(p, x)

    def wrong(name):
        everywhere = layer is None and not (name == "conv1" and code in INPUT_ONLY)
        return code if code is not None and (everywhere or layer == name) and \
            name in MISTAKES[code] else None

    g = {}
    e = np.exp(s["logits"])
    prob = e / e.sum(axis=1, keepdims=True)
    dlogits = (prob * y.sum(axis=1, keepdims=True) - y) / m
    g["out.weight"] = dlogits.T @ s["g"]
    g["out.bias"] = dlogits.sum(axis=0)
    dg = dlogits @ p["out.weight"]
    da7 = np.repeat(dg[:, :, None] / s["a7"].shape[2], s["a7"].shape[2], axis=2)
    dsum = da7 * relu_slope(s["sum"])
    # The add: the same gradient into the block and into the connection to pool1.
    dskip = np.zeros_like(dsum) if wrong("skip") else dsum
    g["norm2.scale"], g["norm2.shift"], dz5 = norm_backward(p["norm2.scale"], s["norm2"], dsum,
                                                            wrong("norm2"))
    g["conv3.weight"], da4 = conv_backward(p["conv3.weight"], s["xp5"], dz5, "conv3",
                                           wrong("conv3"))
    dn1 = da4 * relu_slope(s["n1"])
    g["norm1.scale"], g["norm1.shift"], dz3 = norm_backward(p["norm1.scale"], s["norm1"], dn1,
                                                            wrong("norm1"))
    g["conv2.weight"], da2 = conv_backward(p["conv2.weight"], s["xp3"], dz3, "conv2",
                                           wrong("conv2"))
    da1 = pool_backward(s["pool"], da2 + dskip, wrong("pool1"))
    dz1 = da1 * (1 - s["a1"] ** 2)
    g["conv1.weight"], dx = conv_backward(p["conv1.weight"], s["xp1"], dz1, "conv1",
                                         wrong("conv1"))
    g["conv1.bias"] = dz1.sum(axis=(0, 2))
    for n in DECAYS:  # the L2 term, added as declared whatever the data term's mistake
        g[n] = g[n] + L2 / m * p[n]
    if with_input:
        return loss_of(p, x, y), [g[n] for n, _ in TENSORS], dx
    return loss_of(p, x, y), [g[n] for n, _ in TENSORS]


# ---- running ----

def parse_plant(text):
    code, _, layer = text.partition(":")
    if code not in MISTAKES:
        raise argparse.ArgumentTypeError(f"unknown code {code!r}; known: {', '.join(MISTAKES)}")
    if layer and layer not in MISTAKES[code]:
        raise argparse.ArgumentTypeError(
            f"{code} goes with {', '.join(MISTAKES[code])}, not {layer!r}")
    return code, layer or None


def as_batch(x, y):
    return x.reshape(x.shape[0], CHANNELS, LENGTH), y.reshape(y.shape[0], CLASSES)


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--plant", type=parse_plant, default=(None, None))
    ap.add_argument("--dtype", choices=["f64", "f32"], default="f64")
    ap.add_argument("--input-gradient", action="store_true")
    ap.add_argument("--self-check", metavar="FILE")
    ap.add_argument("--save", metavar="FILE")
    args = ap.parse_args()
    code, layer = args.plant
    if args.self_check:
        return self_check(args.self_check, TENSORS,
                          lambda p, x, y: gradient_of(p, *as_batch(x, y), code, layer), args.save)

    def named(params):
        return dict(zip((n for n, _ in TENSORS), params))

    def loss_fn(params, x, y):
        return loss_of(named(params), *as_batch(x, y))

    def grad_fn(params, x, y):
        reply = gradient_of(named(params), *as_batch(x, y), code, layer, args.input_gradient)
        if args.input_gradient:  # dx in x's own shape, as loaded
            return reply[0], reply[1], reply[2].reshape(x.shape)
        return reply

    serve("pump-cnn-numpy", args.dtype, TENSORS, loss_fn, grad_fn,
          x_shape=(CHANNELS, LENGTH), y_shape=(CLASSES,), input_gradient=args.input_gradient)
    return 0


if __name__ == "__main__":
    sys.exit(main())
