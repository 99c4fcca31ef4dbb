"""The NumPy side of crates/engine/benches/grad_numpy.rs: the loss and parameter gradient of a
dense network (relu hidden layers, softmax output; cross-entropy averaged over the samples, L2
(λ / 2m) · Σ W² over the weights), forward and backward written out with NumPy's matrix products.

The bench writes the weights (units × fan-in), biases, x (m × inputs) and one-hot y as raw
little-endian files of the given dtype into a scratch folder and sends a JSON job on stdin:
{"dir", "dtype", "m", "sizes", "tensors", "l2", "repeat"}. This script computes in that dtype
throughout, writes each tensor's gradient as "<name>.grad" beside it, and prints JSON: the loss,
the fastest of `repeat` passes in milliseconds, and the BLAS it ran on (threadpoolctl, when
installed). The data are whatever the bench sends (invented).
"""

import json
import os
import sys
import time

import numpy as np


def gradient(ws, bs, x, y, l2):
    """Loss and gradients (dW, db per layer) of the network; no input gradient (no caller of the
    loss gradient needs it)."""
    dt = x.dtype
    m = x.shape[0]
    zs, acts = [], [x]
    a = x
    for j, (w, b) in enumerate(zip(ws, bs)):
        z = a @ w.T
        z += b
        zs.append(z)
        if j < len(ws) - 1:
            a = np.maximum(z, 0)
            acts.append(a)
    # Cross-entropy from z by log-sum-exp; softmax for the output delta.
    z = zs[-1]
    top = z.max(axis=1, keepdims=True)
    e = np.exp(z - top)
    s = e.sum(axis=1, keepdims=True)
    lse = top[:, 0] + np.log(s[:, 0])
    data = (lse - (y * z).sum(axis=1)).mean()
    factor = dt.type(l2 / (2 * m))
    loss = data + factor * sum((w * w).sum() for w in ws)
    d = (e / s - y) / dt.type(m)
    two = dt.type(2) * factor
    grads = []
    for j in range(len(ws) - 1, -1, -1):
        dw = d.T @ acts[j]
        dw += two * ws[j]
        grads.append((dw, d.sum(axis=0)))
        if j > 0:
            d = d @ ws[j]
            d *= zs[j - 1] > 0
    grads.reverse()
    return loss, grads


def main():
    job = json.load(sys.stdin)
    dt = np.dtype(job["dtype"]).newbyteorder("<")
    folder, m, sizes = job["dir"], job["m"], job["sizes"]

    def read(name, shape):
        return np.fromfile(os.path.join(folder, name), dtype=dt).astype(dt.newbyteorder("="))\
            .reshape(shape)

    names = job["tensors"]
    ws = [read(names[2 * j], (sizes[j + 1], sizes[j])) for j in range(len(sizes) - 1)]
    bs = [read(names[2 * j + 1], (sizes[j + 1],)) for j in range(len(sizes) - 1)]
    x = read("x", (m, sizes[0]))
    y = read("y", (m, sizes[-1]))

    best = float("inf")
    for _ in range(job["repeat"]):
        t = time.perf_counter()
        loss, grads = gradient(ws, bs, x, y, job["l2"])
        best = min(best, time.perf_counter() - t)
    for j, (dw, db) in enumerate(grads):
        dw.astype(dt).tofile(os.path.join(folder, names[2 * j] + ".grad"))
        db.astype(dt).tofile(os.path.join(folder, names[2 * j + 1] + ".grad"))
    try:
        import threadpoolctl

        info = threadpoolctl.threadpool_info()
        blas = ", ".join(f"{i['internal_api']} {i['version']} {i['architecture']}, "
                         f"{i['num_threads']} thread(s)" for i in info)
    except ImportError:
        blas = "BLAS unknown (no threadpoolctl)"
    print(json.dumps({"loss": float(loss), "ms": best * 1e3, "blas": blas}))


if __name__ == "__main__":
    main()
