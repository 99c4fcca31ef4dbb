"""The program side of plumb's wire protocol, version 1 (docs/protocol.md in the plumb repository).

`serve` answers plumb's requests on the process's stdin and stdout until plumb says "bye" or closes
stdin. Everything the program prints for people must go to stderr: stdout belongs to the protocol.
"""
import json
import sys

import numpy as np

#: The protocol version this module speaks.
PROTOCOL = 1

# One record of a "losses" request: perturbation u32, tensor u32, flat index u64, delta f64.
CHANGE = np.dtype([("k", "<u4"), ("tensor", "<u4"), ("index", "<u8"), ("delta", "<f8")])

DTYPES = {"f64": np.float64, "f32": np.float32}


class ProtocolError(Exception):
    """A request this program cannot honour; sent to plumb as an "error" reply."""


def serve(name, dtype, tensors, loss_fn, grad_fn, x_shape=None, y_shape=None, *,
          input_gradient=False, stdin=None, stdout=None):
    """Serve a loss and its gradient to `plumb probe` until plumb says "bye".

    Arguments:
        name: the program's name, shown in plumb's report.
        dtype: "f64" or "f32", the floating-point type the program computes in. The callbacks get
            their arrays in that type, and plumb sets the precision it expects from it.
        tensors: ``[(name, shape), ...]``, the parameter tensors, in the order the callbacks take
            them and the gradient is returned in.
        loss_fn: ``loss_fn(params, x, y) -> float``, the loss at the parameters ``params`` (a list
            of arrays in the order of ``tensors``) on the batch ``x`` (m, *one sample's input) and
            targets ``y`` (m, *one sample's target).
        grad_fn: ``grad_fn(params, x, y) -> (loss, [gradient arrays])``, the loss and one gradient
            per tensor, in the order of ``tensors``. A reply declares the arrays' own shapes, so a
            gradient of the wrong shape is reported by plumb, not hidden.
        x_shape, y_shape: optional, one sample's input and target shapes. Declared in the hello,
            they let ``plumb probe --blackbox`` split a CSV file or draw a batch without a network
            description. Give both or neither.
        input_gradient: if true, ``grad_fn`` returns ``(loss, [gradient arrays], dx)``, where ``dx``
            is the gradient of the loss with respect to x, of x's shape as loaded; the hello says
            so and every gradient reply ends with it as the tensor "input", which plumb checks
            against the reference's input gradient.
        stdin, stdout: binary streams to use instead of the process's (for tests).

    The wire always carries little-endian float64; values are cast to ``dtype`` before the
    callbacks see them. Each perturbation of a "losses" request starts from the loaded parameters.
    Any exception in a callback, or a request that cannot be honoured, is sent to plumb as an
    "error" reply (which ends the session and is reported) and the process exits with status 1.
    Returns normally after "bye" or when plumb closes stdin.
    """
    if dtype not in DTYPES:
        raise ValueError(f"dtype must be 'f64' or 'f32', not {dtype!r}")
    if (x_shape is None) != (y_shape is None):
        raise ValueError("give both x_shape and y_shape, or neither")
    tensors = [(str(n), tuple(int(d) for d in s)) for n, s in tensors]
    session = _Session(name, dtype, tensors, loss_fn, grad_fn, x_shape, y_shape,
                       stdin or sys.stdin.buffer, stdout or sys.stdout.buffer)
    session.input_gradient = bool(input_gradient)
    try:
        session.run()
    except Exception as e:  # noqa: BLE001 - every failure is reported to plumb
        session.send({"type": "error", "message": f"{name}: {type(e).__name__}: {e}"})
        sys.exit(1)


class _Session:
    """One conversation with plumb: the loaded parameters and data, and the replies."""

    def __init__(self, name, dtype, tensors, loss_fn, grad_fn, x_shape, y_shape, inp, out):
        self.name, self.dtype, self.tensors = name, dtype, tensors
        self.loss_fn, self.grad_fn = loss_fn, grad_fn
        self.x_shape, self.y_shape = x_shape, y_shape
        self.inp, self.out = inp, out
        self.ftype = DTYPES[dtype]
        self.params = self.x = self.y = None
        self.input_gradient = False

    def run(self):
        while True:
            line = self.inp.readline()
            if not line:
                return  # plumb closed our stdin
            try:
                req = json.loads(line)
                kind = req["type"]
            except (ValueError, KeyError, TypeError):
                raise ProtocolError(f"a request that is not a JSON object with a type: {line[:80]!r}")
            if kind == "bye":
                return
            handler = getattr(self, "on_" + str(kind), None)
            if handler is None:
                raise ProtocolError(f"unknown request type {kind!r}")
            if kind not in ("hello", "load") and self.params is None:
                raise ProtocolError(f"a {kind} request before load")
            handler(req)

    def send(self, header, arrays=()):
        try:  # JSON has no NaN or Infinity: a non-finite loss is an error, said as one
            text = json.dumps(header, allow_nan=False)
        except ValueError:
            raise ValueError(f"the {header['type']} reply is not finite: {header}") from None
        self.out.write(text.encode() + b"\n")
        for a in arrays:
            self.out.write(np.ascontiguousarray(a, dtype="<f8").tobytes())
        self.out.flush()

    def read(self, n, what):
        buf = self.inp.read(n)
        if len(buf) != n:
            raise ProtocolError(f"short payload: {what} needs {n} bytes, got {len(buf)}")
        return buf

    def floats(self, shape, what):
        n = int(np.prod(shape, dtype=np.int64))
        return np.frombuffer(self.read(8 * n, what), "<f8").reshape(shape).copy()

    def cast(self, arrays):
        return [a.astype(self.ftype) for a in arrays]

    def on_hello(self, req):
        hello = {"type": "hello", "protocol": PROTOCOL, "name": self.name, "dtype": self.dtype,
                 "tensors": [{"name": n, "shape": list(s)} for n, s in self.tensors]}
        if self.x_shape is not None:
            hello["x"] = {"shape": [int(d) for d in self.x_shape]}
            hello["y"] = {"shape": [int(d) for d in self.y_shape]}
        if self.input_gradient:
            hello["input_gradient"] = True
        self.send(hello)

    def on_load(self, req):
        # Read every payload first (in the order the request lists them), then judge it.
        got = {t["name"]: self.floats(tuple(t["shape"]), t["name"]) for t in req["tensors"]}
        x = self.floats(tuple(req["x"]["shape"]), "x")
        y = self.floats(tuple(req["y"]["shape"]), "y")
        missing = [n for n, _ in self.tensors if n not in got]
        if missing:
            raise ProtocolError(f"load lacks the tensor(s) {', '.join(missing)}")
        for n, s in self.tensors:
            if got[n].shape != s:
                raise ProtocolError(f"load gives {n} the shape {list(got[n].shape)}, "
                                    f"this program's is {list(s)}")
        self.params = [got[n] for n, _ in self.tensors]
        self.x, self.y = x.astype(self.ftype), y.astype(self.ftype)
        self.send({"type": "ready"})

    def on_loss(self, req):
        loss = self.loss_fn(self.cast(self.params), self.x, self.y)
        self.send({"type": "loss", "loss": float(loss)})

    def on_gradient(self, req):
        reply = self.grad_fn(self.cast(self.params), self.x, self.y)
        if self.input_gradient:
            loss, grads, dx = reply
        else:
            loss, grads = reply
        grads = [np.asarray(g) for g in grads]
        if len(grads) != len(self.tensors):
            raise ProtocolError(f"the gradient function returned {len(grads)} arrays for "
                                f"{len(self.tensors)} tensors")
        names = [n for n, _ in self.tensors]
        if self.input_gradient:
            dx = np.asarray(dx)
            if dx.shape != self.x.shape:
                raise ProtocolError(f"the input gradient has shape {list(dx.shape)}, "
                                    f"x was loaded as {list(self.x.shape)}")
            grads, names = grads + [dx], names + ["input"]
        self.send({"type": "gradient", "loss": float(loss), "tensors": [
            {"name": n, "shape": list(g.shape)} for n, g in zip(names, grads)]}, grads)

    def on_losses(self, req):
        count, n = int(req["perturbations"]), int(req["changes"])
        recs = np.frombuffer(self.read(CHANGE.itemsize * n, "changes"), CHANGE)
        if n and recs["k"].max() >= count:
            raise ProtocolError(f"a change names perturbation {recs['k'].max()} of {count}")
        if n and recs["tensor"].max() >= len(self.tensors):
            raise ProtocolError(f"a change names tensor {recs['tensor'].max()} of "
                                f"{len(self.tensors)}")
        recs = recs[np.argsort(recs["k"], kind="stable")]
        ends = np.searchsorted(recs["k"], np.arange(count + 1))
        losses = []
        for k in range(count):  # each perturbation starts from the loaded parameters
            ps = [p.copy() for p in self.params]
            for r in recs[ends[k]:ends[k + 1]]:
                t, i = int(r["tensor"]), int(r["index"])
                if i >= ps[t].size:
                    raise ProtocolError(f"a change at index {i} of {self.tensors[t][0]}, "
                                        f"which has {ps[t].size} values")
                ps[t].flat[i] += r["delta"]
            losses.append(float(self.loss_fn(self.cast(ps), self.x, self.y)))
        self.send({"type": "losses", "count": count}, [np.array(losses)])
