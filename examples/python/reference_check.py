"""What the NumPy examples share besides the protocol (plumb_wire serves that): `--self-check`,
a program's loss and gradient against a reference file that examples/python/reference/ wrote with
autograd. Each example keeps its network, its mistakes and its protocol wiring to itself."""
import numpy as np


def self_check(path, tensors, gradient, save=None, floor_share=0.0):
    """Compares the loss and gradient with the reference file; 0 if all within 1e-10, else 1.

    gradient(p, x, y) gives the loss and the gradients in `tensors` order for the parameters p (a
    dict by name) and the file's x and y as stored. A tensor's error is relative to its largest
    reference entry, or to floor_share of the largest over all tensors when that is larger.
    With `save`, the gradients computed are also written there (.npz)."""
    ref = np.load(path)
    p = {n: ref["param/" + n] for n, _ in tensors}
    loss, grads = gradient(p, ref["x"], ref["y"])
    if save:
        np.savez(save, **{n: g for (n, _), g in zip(tensors, grads)})
    worst = abs(loss - ref["loss"]) / abs(ref["loss"])
    print(f"loss: relative error {worst:.2e}")
    bad = [] if worst <= 1e-10 else ["loss"]
    floor = max(floor_share * max(np.abs(ref["grad/" + n]).max() for n, _ in tensors), 1e-300)
    for (n, _), got in zip(tensors, grads):
        want = ref["grad/" + n]
        err = np.abs(got - want).max() / max(np.abs(want).max(), floor)
        print(f"{n}: max relative error {err:.2e}" + ("  DIFFERS" if err > 1e-10 else ""))
        if err > 1e-10:
            bad.append(n)
    print("differs: " + (", ".join(bad) if bad else "nothing"))
    return 1 if bad else 0
