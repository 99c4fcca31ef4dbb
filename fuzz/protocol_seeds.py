"""Writes the seed corpus of the `protocol` fuzz target (fuzz/corpus/protocol/).

Each seed is what `plumb_probe::fuzz_replies` reads: one byte picking the request (0 hello, 1 load,
2 loss, 3 gradient, 4 losses), one byte for the most float64 values its reply may carry, then the
bytes a program wrote to its stdout (docs/protocol.md: a JSON header line, then little-endian
float64 values). The names, losses and values are invented. `hostile-*` seeds must be refused.

    python3 fuzz/protocol_seeds.py
"""

import json
import pathlib
import struct

OUT = pathlib.Path(__file__).parent / "corpus" / "protocol"
HELLO, LOAD, LOSS, GRADIENT, LOSSES = range(5)


def line(header):
    return (json.dumps(header) + "\n").encode()


def f64(*values):
    return b"".join(struct.pack("<d", v) for v in values)


def seed(name, request, limit, stdout):
    (OUT / name).write_bytes(bytes([request, limit]) + stdout)


hello = {
    "type": "hello",
    "protocol": 1,
    "name": "invented",
    "dtype": "f64",
    "tensors": [{"name": "layer1", "shape": [3, 5]}, {"name": "layer2", "shape": [2, 4]}],
}
gradient = {"type": "gradient", "loss": 0.75, "tensors": [{"name": "layer1", "shape": [2, 3]}]}

OUT.mkdir(parents=True, exist_ok=True)
seed("hello.bin", HELLO, 0, line(hello))
seed("hello-sample-shapes.bin", HELLO, 0, line({**hello, "dtype": "f32", "x": {"shape": [4]}, "y": {"shape": [2]}}))
seed("ready.bin", LOAD, 0, line({"type": "ready"}))
seed("loss.bin", LOSS, 0, line({"type": "loss", "loss": 0.6931471805599453}))
seed("gradient.bin", GRADIENT, 6, line(gradient) + f64(0.5, -0.25, 1e-3, 0.0, 2.0, -7.5))
seed("losses.bin", LOSSES, 3, line({"type": "losses", "count": 3}) + f64(0.75, 0.7500001, 0.7499999))
seed("two-replies.bin", LOSS, 0, line({"type": "loss", "loss": 1.5}) + line({"type": "loss", "loss": 1.25}))
seed("error-reply.bin", LOSS, 0, line({"type": "error", "message": "invented failure"}))

seed("hostile-garbage.bin", LOSS, 0, b"step 1 of 10: loss 0.75\n")
seed("hostile-nan.bin", LOSS, 0, b'{"type": "loss", "loss": NaN}\n')
seed("hostile-cut-line.bin", LOSS, 0, b'{"type": "loss", "lo')
seed("hostile-wrong-type.bin", LOSS, 0, line({"type": "ready"}))
seed("hostile-protocol-2.bin", HELLO, 0, line({**hello, "protocol": 2}))
seed("hostile-dtype.bin", HELLO, 0, line({**hello, "dtype": "f16"}))
seed("hostile-no-tensors.bin", HELLO, 0, line({k: v for k, v in hello.items() if k != "tensors"}))
seed("hostile-count-huge.bin", LOSSES, 3, line({"type": "losses", "count": 2**64 - 1}))
seed("hostile-count-over-limit.bin", LOSSES, 2, line({"type": "losses", "count": 3}) + f64(1, 2, 3))
seed("hostile-losses-fewer.bin", LOSSES, 3, line({"type": "losses", "count": 2}) + f64(1, 2))
seed("hostile-payload-cut.bin", LOSSES, 3, line({"type": "losses", "count": 3}) + f64(1, 2)[:13])
seed("hostile-gradient-infinite.bin", GRADIENT, 6, line(gradient) + f64(0.5, -0.25, 1e-3, float("inf"), 2.0, -7.5))
seed("hostile-shape-overflow.bin", GRADIENT, 255,
     line({**gradient, "tensors": [{"name": "w", "shape": [2**32, 2**32, 16]}]}))
seed("hostile-shape-negative.bin", GRADIENT, 6, line({**gradient, "tensors": [{"name": "w", "shape": [-2, 3]}]}))
seed("hostile-loss-missing.bin", GRADIENT, 6, line({k: v for k, v in gradient.items() if k != "loss"}) + f64(*range(6)))
