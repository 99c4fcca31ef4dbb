"""`plumb grad` as a command against the same job as a NumPy script, files in and out (issue 14:
"loading included"). Run through benches/grad-cli.sh, which sets one thread on each side.

For each precision (float64, float32) and batch (256, 8192) this writes, into a scratch folder, a
784-256-128-10 relu network's description (split layout, cross-entropy, L2 1e-4 over 2m), its
He-normal weights as .npz in that precision, and an invented batch (x standard normal, integer
labels) as .npz. Then it runs, alternating, `plumb grad NET -w W -d D -o G --quiet` and
`python3 benches/grad_cli.py numpy W D G` (NumPy loads both files, computes the loss and every
parameter's gradient with benches/grad_numpy.py's `gradient`, in the files' precision, and writes
them as .npz), each as a whole process, wall time by time.perf_counter around it. It prints the
fastest of the runs of each, their ratio, and the same for NumPy's time inside the script (after
`import numpy`: loading, the pass, writing), and asserts both gradient files agree (1e-9 of each
tensor's largest entry in float64, 2e-2 in float32: plumb computes in f64 whatever the file's
precision, NumPy in the file's).

With BEFORE=path/to/another/plumb (a build of an older commit), that binary runs too, in the same
alternation (before, plumb, NumPy), and each run's time of all three is printed, with the ratios
from the same run; the two plumb gradient files must then be equal byte for byte.

For float32 files a third side runs too, in the same alternation: `grad_cli.py numpy-f64`, the same
NumPy job widened to float64 after loading and its gradient rounded to float32 before writing — the
arithmetic `plumb grad` does on such files (it computes the reference in f64 whatever the files'
precision) — with its files asserted to agree with plumb's to 1e-6 of each tensor's largest entry.
And a fourth, `plumb grad --precision f32`: plumb computing in f32 as NumPy does on such files,
its gradient asserted to agree with NumPy's to the same 2e-2 of each tensor's largest entry.
"""

import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

SIZES = [784, 256, 128, 10]
L2 = 1e-4
NET = """# benches/grad_cli.py: 784-256-128-10 relu, invented data
input = 784
loss = "cross-entropy"
l2 = 0.0001
layout = "split"

[[layer]]
units = 256
activation = "relu"

[[layer]]
units = 128
activation = "relu"

[[layer]]
units = 10
activation = "softmax"
"""


def numpy_side(w_path, d_path, g_path, wide=False):
    """The NumPy job: load, compute, write; prints its own time after the import. `wide`: in
    float64 whatever the files hold, the gradient written in the files' precision."""
    start = time.perf_counter()
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from grad_numpy import gradient

    w = np.load(w_path)
    d = np.load(d_path)
    n = len(SIZES) - 1
    ws = [w[f"layer{j + 1}.weight"] for j in range(n)]
    bs = [w[f"layer{j + 1}.bias"] for j in range(n)]
    x = d["x"]
    stored = x.dtype
    if wide:
        ws = [a.astype(np.float64) for a in ws]
        bs = [a.astype(np.float64) for a in bs]
        x = x.astype(np.float64)
    labels = d["y"]
    y = np.zeros((x.shape[0], SIZES[-1]), dtype=x.dtype)
    y[np.arange(x.shape[0]), labels] = 1
    loss, grads = gradient(ws, bs, x, y, L2)
    out = {}
    for j, (dw, db) in enumerate(grads):
        out[f"layer{j + 1}.weight"] = dw.astype(stored, copy=False)
        out[f"layer{j + 1}.bias"] = db.astype(stored, copy=False)
    np.savez(g_path, **out)
    print(json.dumps({"loss": float(loss), "inside": time.perf_counter() - start}))


def make(folder, dtype, m, rng):
    with open(os.path.join(folder, "net.toml"), "w") as f:
        f.write(NET)
    w = {}
    for j in range(len(SIZES) - 1):
        fan_in, units = SIZES[j], SIZES[j + 1]
        w[f"layer{j + 1}.weight"] = (rng.standard_normal((units, fan_in)) *
                                     np.sqrt(2.0 / fan_in)).astype(dtype)
        w[f"layer{j + 1}.bias"] = (0.01 * rng.standard_normal(units)).astype(dtype)
    np.savez(os.path.join(folder, "w.npz"), **w)
    x = rng.standard_normal((m, SIZES[0])).astype(dtype)
    y = rng.integers(0, SIZES[-1], m)
    np.savez(os.path.join(folder, "d.npz"), x=x, y=y)


def timed(cmd):
    t = time.perf_counter()
    out = subprocess.run(cmd, check=True, capture_output=True, text=True)
    return time.perf_counter() - t, out.stdout


def main():
    if len(sys.argv) > 1 and sys.argv[1] in ("numpy", "numpy-f64"):
        numpy_side(*sys.argv[2:5], wide=sys.argv[1] == "numpy-f64")
        return
    plumb = os.environ.get("PLUMB", "target/release/plumb")
    before = os.environ.get("BEFORE")
    runs = int(os.environ.get("RUNS", "7"))
    rng = np.random.default_rng(1)
    print("precision, batch | plumb grad | python3 + NumPy (whole) | NumPy / plumb "
          "| NumPy inside the script | inside / plumb")
    for dtype in ["float64", "float32"]:
        for m in [256, 8192]:
            with tempfile.TemporaryDirectory() as folder:
                make(folder, dtype, m, rng)
                p = lambda name: os.path.join(folder, name)
                ours, theirs, inside, olds, wides, singles = [], [], [], [], [], []
                grad = lambda binary, out: [binary, "grad", p("net.toml"), "-w", p("w.npz"),
                                            "-d", p("d.npz"), "-o", p(out), "--quiet",
                                            "--format", "json"]
                for _ in range(runs):
                    for g in ["g-plumb.npz", "g-numpy.npz", "g-before.npz", "g-wide.npz",
                              "g-single.npz"]:
                        if os.path.exists(p(g)):
                            os.remove(p(g))
                    if before:
                        t, _ = timed(grad(before, "g-before.npz"))
                        olds.append(t)
                    t, _ = timed(grad(plumb, "g-plumb.npz"))
                    ours.append(t)
                    t, out = timed([sys.executable, os.path.abspath(__file__), "numpy",
                                    p("w.npz"), p("d.npz"), p("g-numpy.npz")])
                    theirs.append(t)
                    inside.append(json.loads(out)["inside"])
                    if dtype == "float32":
                        t, _ = timed([sys.executable, os.path.abspath(__file__), "numpy-f64",
                                      p("w.npz"), p("d.npz"), p("g-wide.npz")])
                        wides.append(t)
                        t, _ = timed(grad(plumb, "g-single.npz") + ["--precision", "f32"])
                        singles.append(t)
                if before:
                    with open(p("g-before.npz"), "rb") as f, open(p("g-plumb.npz"), "rb") as g:
                        assert f.read() == g.read(), (dtype, m, "the gradient files differ")
                    print(f"{dtype}, {m}, each run (ms), before / plumb / NumPy: " + ", ".join(
                        f"{o * 1e3:.1f} / {t * 1e3:.1f} / {n * 1e3:.1f}"
                        for o, t, n in zip(olds, ours, theirs)))
                    print(f"{dtype}, {m}, fastest: before {min(olds) * 1e3:.1f} ms, before / "
                          f"plumb {min(olds) / min(ours):.2f}×, NumPy / before "
                          f"{min(theirs) / min(olds):.2f}× (gradient files equal byte for byte)")
                a, b = np.load(p("g-plumb.npz")), np.load(p("g-numpy.npz"))
                # In float32, NumPy's sums over 8,192 samples and the ReLU sides that flip at
                # z ≈ 0 move entries by up to ~1% of a tensor's largest against plumb's f64.
                tol = 1e-9 if dtype == "float64" else 2e-2
                for name in b.files:
                    scale = np.abs(b[name]).max()
                    gap = np.abs(a[name].astype(np.float64) - b[name].astype(np.float64)).max()
                    assert gap <= tol * scale, (dtype, m, name, gap, scale)
                if wides:
                    c = np.load(p("g-wide.npz"))
                    for name in c.files:
                        gap = np.abs(a[name].astype(np.float64) - c[name].astype(np.float64)).max()
                        assert gap <= 1e-6 * np.abs(c[name]).max(), (dtype, m, name, gap)
                    print(f"{dtype}, {m}, NumPy in f64 as plumb computes (whole process): "
                          f"{min(wides) * 1e3:.1f} ms, NumPy-f64 / plumb "
                          f"{min(wides) / min(ours):.2f}×; each run (ms) plumb / NumPy-f64: "
                          + ", ".join(f"{t * 1e3:.1f} / {w * 1e3:.1f}" for t, w in zip(ours, wides)))
                if singles:
                    c = np.load(p("g-single.npz"))
                    for name in b.files:
                        scale = np.abs(b[name]).max()
                        gap = np.abs(c[name].astype(np.float64) - b[name].astype(np.float64)).max()
                        assert gap <= 2e-2 * scale, (dtype, m, name, gap, scale)
                    print(f"{dtype}, {m}, plumb in f32 as NumPy computes (--precision f32): "
                          f"{min(singles) * 1e3:.1f} ms, NumPy / plumb-f32 "
                          f"{min(theirs) / min(singles):.2f}×; each run (ms) plumb-f32 / NumPy: "
                          + ", ".join(f"{t * 1e3:.1f} / {n * 1e3:.1f}"
                                      for t, n in zip(singles, theirs)))
                o, n, i = min(ours), min(theirs), min(inside)
                print(f"{dtype}, {m} | {o * 1e3:.1f} ms | {n * 1e3:.1f} ms | {n / o:.2f}× "
                      f"| {i * 1e3:.1f} ms | {i / o:.2f}×")


if __name__ == "__main__":
    main()
