"""plumb-wire: serve a hand-written loss and gradient to `plumb probe`, and probe it from tests.

plumb (a workbench that proves hand-written backward passes right) starts your program and talks to
it over a small wire protocol on stdin and stdout. This package is the program's side:

    import numpy as np
    from plumb_wire import serve

    def loss(params, x, y): ...                 # params: arrays in the order of `tensors`
    def gradient(params, x, y): ...             # -> (loss, [one array per tensor])

    serve("my-net", "f64", [("layer1", (8, 5)), ("layer2", (3, 9))], loss, gradient)

and ``plumb_wire.testing`` runs `plumb probe` on such a program from a test. See README.md.
"""
from .server import PROTOCOL, ProtocolError, serve

__all__ = ["PROTOCOL", "ProtocolError", "serve"]
__version__ = "1.0.0"
