"""The NumPy side of crates/fd/benches/graph.rs, which starts this script and hands it the
networks' values (JSON on stdin), so both sides compute on the same numbers in the same run.

Tasks:
  check     the naive full central check: for every coordinate and for 4 random directions per
            tensor and 4 over all tensors, the loss at ±h and ±2h (h = 2·∛ε·max(|θ|, 1)), each a
            whole NumPy forward pass; only the moved tensor is copied. With "limit": N, only the
            first coordinates' N or so losses are timed and the time per loss is scaled to the
            full check's count (for models whose naive check takes minutes).
  gradient  forward + backward, written out by hand (the examples' own gradient_of).

Models: "cnn" (examples/pump-cnn.toml, examples/python/cnn_numpy.py), "lstm"
(examples/pump-lstm.toml, lstm_numpy.py), "attention" (examples/pump-attention.toml,
attention_numpy.py), "sequence" (fixtures/nets/pump-sequence.toml, written out below: lstm,
causal attention, layer norm, gru with the reset before the recurrent product, dense softmax),
"mlp" (the 784-128-64-10 tanh network of crates/fd/benches/common, written out below).

Prints JSON on stdout: the loss at the given values (the bench compares it with plumb's, so the
two sides compute the same function), the best time over the repeats, the losses evaluated, and
for `gradient` the gradient in the tensors' order. The data are whatever the bench sends
(invented).
"""

import json
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "examples", "python"))

import attention_numpy  # noqa: E402
import cnn_numpy  # noqa: E402
import lstm_numpy  # noqa: E402

EPS = np.finfo(float).eps


def sigmoid(a):
    return 1 / (1 + np.exp(-a))


def sequence_loss(p, x, y):
    """fixtures/nets/pump-sequence.toml: lstm 8 (ifgo, every step) → 2-head causal attention →
    layer norm → gru 6 (rzn, reset before, last step) → dense 3 softmax; cross-entropy averaged
    over samples, no L2."""
    m, steps, _ = x.shape
    w, u, b = p["memory.input.weight"], p["memory.recurrent.weight"], p["memory.bias"]
    n = u.shape[1]
    h = np.zeros((m, n))
    c = np.zeros((m, n))
    hs = []
    for t in range(steps):
        a = x[:, t] @ w.T + h @ u.T + b
        i, f, g, o = (a[:, k * n:(k + 1) * n] for k in range(4))
        c = sigmoid(f) * c + sigmoid(i) * np.tanh(g)
        h = sigmoid(o) * np.tanh(c)
        hs.append(h)
    e = np.stack(hs, axis=1)  # m, steps, 8
    width, heads = e.shape[2], 2
    d = width // heads
    q, k, v = (e @ p[f"look-back.{s}.weight"].T + p[f"look-back.{s}.bias"]
               for s in ("query", "key", "value"))
    split = [a.reshape(m, steps, heads, d).transpose(0, 2, 1, 3) for a in (q, k, v)]
    s = split[0] @ split[1].transpose(0, 1, 3, 2) / np.sqrt(d)
    s = np.where(np.tril(np.ones((steps, steps), bool)), s, -np.inf)
    pw = np.exp(s - s.max(axis=-1, keepdims=True))
    pw /= pw.sum(axis=-1, keepdims=True)
    o = (pw @ split[2]).transpose(0, 2, 1, 3).reshape(m, steps, width)
    a = o @ p["look-back.output.weight"].T + p["look-back.output.bias"]
    mean = a.mean(axis=2, keepdims=True)
    var = ((a - mean) ** 2).mean(axis=2, keepdims=True)
    a = (a - mean) / np.sqrt(var + 1e-5) * p["layer3.scale"] + p["layer3.shift"]
    w, u = p["layer4.input.weight"], p["layer4.recurrent.weight"]
    bi, br = p["layer4.input.bias"], p["layer4.recurrent.bias"]
    n = u.shape[1]
    h = np.zeros((m, n))
    for t in range(steps):
        ai = a[:, t] @ w.T + bi
        r = sigmoid(ai[:, :n] + h @ u[:n].T + br[:n])
        z = sigmoid(ai[:, n:2 * n] + h @ u[n:2 * n].T + br[n:2 * n])
        cand = np.tanh(ai[:, 2 * n:] + (r * h) @ u[2 * n:].T + br[2 * n:])
        h = (1 - z) * cand + z * h
    logits = h @ p["classes.weight"].T + p["classes.bias"]
    logits = logits - logits.max(axis=1, keepdims=True)
    log_p = logits - np.log(np.exp(logits).sum(axis=1, keepdims=True))
    return -(y * log_p).sum() / m


def mlp_loss(p, x, y):
    """A chain of dense layers named layer1, layer2, … (weight units × fan-in, bias), tanh hidden
    layers, softmax output; cross-entropy averaged over samples plus (λ / 2m) · Σ W² with
    λ = 1e-4 (biases not decayed): the 784-128-64-10 network of crates/fd/benches/common."""
    m = x.shape[0]
    layers = len(p) // 2
    a = x
    l2 = 0.0
    for j in range(1, layers + 1):
        w, b = p[f"layer{j}.weight"], p[f"layer{j}.bias"]
        a = a @ w.T + b
        if j < layers:
            a = np.tanh(a)
        l2 += (w * w).sum()
    a = a - a.max(axis=1, keepdims=True)
    log_p = a - np.log(np.exp(a).sum(axis=1, keepdims=True))
    return -(y * log_p).sum() / m + 1e-4 / (2 * m) * l2


MODELS = {
    "cnn": (cnn_numpy.loss_of, cnn_numpy.gradient_of, cnn_numpy.TENSORS),
    "lstm": (lstm_numpy.loss_of, lstm_numpy.gradient_of, lstm_numpy.TENSORS),
    "attention": (attention_numpy.loss_of, attention_numpy.gradient_of, attention_numpy.TENSORS),
    "sequence": (sequence_loss, None, None),
    "mlp": (mlp_loss, None, None),
}


def central(loss, move, theta):
    h = 2.0 * EPS ** (1.0 / 3.0) * max(abs(theta), 1.0)
    f = {s: loss(move(s)) for s in (h, -h, 2 * h, -2 * h)}
    return (f[h] - f[-h]) / (2 * h), (f[2 * h] - f[-2 * h]) / (4 * h)


def full_check(loss, p, names, x, y, directions, rng, limit=None):
    """Every coordinate and the random directions; returns the number of losses evaluated. With
    `limit`, stops after the coordinates of about that many losses."""
    count = 0
    f = lambda q: loss(q, x, y)  # noqa: E731
    for name in names:
        t = p[name]
        for k in range(t.size):
            if limit is not None and count >= limit:
                return count
            def move(d, name=name, k=k):
                q = dict(p)
                q[name] = p[name].copy()
                q[name].reshape(-1)[k] += d
                return q
            central(f, move, t.reshape(-1)[k])
            count += 4
    for scope in [None] + names:
        for _ in range(directions):
            v = {n: rng.normal(size=p[n].shape) if scope in (None, n) else np.zeros(p[n].shape)
                 for n in names}
            norm = np.sqrt(sum((a * a).sum() for a in v.values()))
            theta = max(np.abs(p[n]).max() for n in names if scope in (None, n))
            central(f, lambda d: {n: p[n] + d * v[n] / norm for n in names}, theta)
            count += 4
    return count


def main():
    job = json.load(sys.stdin)
    loss, gradient, order = MODELS[job["model"]]
    names = [t["name"] for t in job["tensors"]]
    p = {t["name"]: np.array(t["values"], float).reshape(t["shape"]) for t in job["tensors"]}
    x = np.array(job["x"], float).reshape(job["x_shape"])
    y = np.array(job["y"], float).reshape(job["y_shape"])
    out = {"loss": float(loss(p, x, y))}
    best = float("inf")
    for _ in range(job["repeat"]):
        t0 = time.perf_counter()
        if job["task"] == "check":
            limit = job.get("limit")
            done = full_check(loss, p, names, x, y, job["directions"],
                              np.random.default_rng(1), limit)
            total = 4 * sum(p[n].size for n in names) + 4 * job["directions"] * (1 + len(names))
            out["evaluations"] = total
            if done < total:  # the time per loss over the first coordinates, times all losses
                out["measured"] = done
                scale = total / done
            else:
                scale = 1.0
        else:
            for _ in range(job["inner"]):
                j, grads = gradient(p, x, y)
            out["gradient"] = {n: np.asarray(g).reshape(-1).tolist()
                               for (n, _), g in zip(order, grads)}
        best = min(best, (time.perf_counter() - t0) * (scale if job["task"] == "check" else 1.0))
    out["seconds"] = best
    json.dump(out, sys.stdout)


if __name__ == "__main__":
    main()
