"""The naive way to check the 1-D CNN of crates/fd/benches/graph_cnn.rs: a NumPy forward pass of
the whole network for every perturbation, the same central differences (±h and ±2h per coordinate,
h = 2·∛ε·max(|θ|, 1)), over every coordinate plus 4 random directions per tensor and 4 over all
(4 evaluations each), as plumb's full check does. Same shapes, batch and loss; its own seeded
values (the time does not depend on them). Prints the time of one full check, best of three.

Run by benches/graph-cnn.sh with one BLAS thread.
"""

import time

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

rng = np.random.default_rng(1)
M, L = 32, 64


def he(shape, fan_in):
    return rng.normal(0.0, np.sqrt(2.0 / fan_in), shape)


params = [
    he((4, 1, 5), 5), he((4,), 5),
    he((8, 4, 3), 12), he((8,), 12),
    he((3, 112), 112), he((3,), 112),
]
x = rng.normal(size=(M, 1, L))
y = np.eye(3)[np.arange(M) % 3]


def conv1d(a, w, b):
    """Cross-correlation, stride 1, no padding: (m, i, n) → (m, o, n − k + 1)."""
    win = sliding_window_view(a, w.shape[2], axis=2)  # m, i, n', k
    return np.einsum("minj,oij->mon", win, w, optimize=True) + b[None, :, None]


def max_pool(a):
    n = a.shape[2] // 2 * 2
    return a[:, :, :n].reshape(a.shape[0], a.shape[1], -1, 2).max(axis=3)


def loss(p):
    w1, b1, w2, b2, w3, b3 = p
    a = max_pool(np.maximum(conv1d(x, w1, b1), 0.0))
    a = max_pool(np.maximum(conv1d(a, w2, b2), 0.0))
    z = a.reshape(M, -1) @ w3.T + b3
    z = z - z.max(axis=1, keepdims=True)
    lse = np.log(np.exp(z).sum(axis=1))
    return float(np.mean(lse - (y * z).sum(axis=1)))


EPS = np.finfo(float).eps


def central(move, theta):
    h = 2.0 * EPS ** (1.0 / 3.0) * max(abs(theta), 1.0)
    f = {d: loss(move(d)) for d in (h, -h, 2 * h, -2 * h)}
    return (f[h] - f[-h]) / (2 * h), (f[2 * h] - f[-2 * h]) / (4 * h)


def full_check():
    out = []
    for t, p in enumerate(params):
        for k in range(p.size):
            def move(d, t=t, k=k):
                q = [a.copy() for a in params]
                q[t].reshape(-1)[k] += d
                return q
            out.append(central(move, p.reshape(-1)[k]))
    scopes = [None] + list(range(len(params)))
    for s in scopes:
        for _ in range(4):
            v = [rng.normal(size=p.shape) if s in (None, t) else np.zeros(p.shape)
                 for t, p in enumerate(params)]
            n = np.sqrt(sum((a * a).sum() for a in v))
            theta = max(np.abs(p).max() for t, p in enumerate(params) if s in (None, t))
            out.append(central(lambda d: [p + d * a / n for p, a in zip(params, v)], theta))
    return out


best = min(
    (lambda t0: (full_check(), time.perf_counter() - t0)[1])(time.perf_counter())
    for _ in range(3)
)
print(f"naive NumPy full central check: {best * 1e3:.1f} ms "
      f"({sum(p.size for p in params)} coordinates + {4 * 7} directions, 4 forward passes each)")
