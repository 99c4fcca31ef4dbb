"""The program side of plumb's wire protocol, version 1 (docs/protocol.md), in one function.

serve(name, dtype, tensors, loss_fn, grad_fn) answers plumb's requests on stdin/stdout until "bye".
  tensors: [(name, shape), ...], the program's parameter tensors, in the order of its hello.
  loss_fn(params, x, y) -> loss;  grad_fn(params, x, y) -> (loss, [gradient arrays]).
  x_shape, y_shape (optional): one sample's input and target shapes, declared in the hello so that
  `plumb probe --blackbox` can draw or read data without a network description.
The callbacks get the parameters as a list in the hello's order, and x, y, all of dtype float32 for
dtype "f32" and float64 for "f64". The wire always carries little-endian float64. A gradient reply
declares the shapes of the arrays grad_fn returned. Any exception becomes an "error" reply, exit 1.
"""
import json
import sys

import numpy as np

CHANGE = np.dtype([("k", "<u4"), ("tensor", "<u4"), ("index", "<u8"), ("delta", "<f8")])  # 24 bytes


def serve(name, dtype, tensors, loss_fn, grad_fn, x_shape=None, y_shape=None):
    inp, out = sys.stdin.buffer, sys.stdout.buffer
    ftype = {"f64": np.float64, "f32": np.float32}[dtype]

    def send(header, arrays=()):
        try:  # JSON has no NaN or Infinity: a non-finite loss is an error, said as one
            text = json.dumps(header, allow_nan=False)
        except ValueError:
            raise ValueError(f"the {header['type']} is not finite: {header}") from None
        out.write(text.encode() + b"\n")
        for a in arrays:
            out.write(np.ascontiguousarray(a, dtype="<f8").tobytes())
        out.flush()

    def read(n, what):
        buf = inp.read(n)
        if len(buf) != n:
            raise EOFError(f"short payload: {what} needs {n} bytes, got {len(buf)}")
        return buf

    def floats(shape, what):
        n = int(np.prod(shape, dtype=np.int64))
        return np.frombuffer(read(8 * n, what), "<f8").reshape(shape).copy()

    def cast(ps):
        return [p.astype(ftype) for p in ps]

    params = x = y = None
    try:
        while True:
            line = inp.readline()
            if not line:
                return  # plumb closed our stdin
            req = json.loads(line)
            kind = req["type"]
            if kind == "hello":
                hello = {"type": "hello", "protocol": 1, "name": name, "dtype": dtype,
                         "tensors": [{"name": n, "shape": list(s)} for n, s in tensors]}
                if x_shape is not None:  # one sample's shapes, for a black box without NET
                    hello["x"], hello["y"] = {"shape": list(x_shape)}, {"shape": list(y_shape)}
                send(hello)
            elif kind == "load":
                got = {t["name"]: floats(t["shape"], t["name"]) for t in req["tensors"]}
                params = [got[n] for n, _ in tensors]  # KeyError names a missing tensor
                x = floats(req["x"]["shape"], "x").astype(ftype)
                y = floats(req["y"]["shape"], "y").astype(ftype)
                send({"type": "ready"})
            elif kind == "loss":
                send({"type": "loss", "loss": float(loss_fn(cast(params), x, y))})
            elif kind == "gradient":
                loss, grads = grad_fn(cast(params), x, y)
                send({"type": "gradient", "loss": float(loss), "tensors": [
                    {"name": n, "shape": list(g.shape)} for (n, _), g in zip(tensors, grads)]}, grads)
            elif kind == "losses":
                count, n = req["perturbations"], req["changes"]
                recs = np.frombuffer(read(CHANGE.itemsize * n, "changes"), CHANGE)
                if n and recs["k"].max() >= count:
                    raise ValueError(f"a change names perturbation {recs['k'].max()} of {count}")
                recs = recs[np.argsort(recs["k"], kind="stable")]
                ends = np.searchsorted(recs["k"], np.arange(count + 1))
                losses = []
                for k in range(count):  # each perturbation starts from the loaded parameters
                    ps = [p.copy() for p in params]
                    for r in recs[ends[k]:ends[k + 1]]:
                        ps[int(r["tensor"])].flat[int(r["index"])] += r["delta"]
                    losses.append(float(loss_fn(cast(ps), x, y)))
                send({"type": "losses", "count": count}, [np.array(losses)])
            elif kind == "bye":
                return
            else:
                raise ValueError(f"unknown request type {kind!r}")
    except Exception as e:  # noqa: BLE001 - every failure is reported to plumb
        send({"type": "error", "message": f"{name}: {type(e).__name__}: {e}"})
        sys.exit(1)
