"""Run `plumb probe` on a program from a test, and fail the test with the report's findings.

    from plumb_wire.testing import assert_probe_passes

    def test_my_backprop():
        assert_probe_passes(["python3", "my_net.py"], net="my_net.toml")

The `plumb` binary is the one named by the ``plumb`` argument, else by the ``PLUMB`` environment
variable, else the first ``plumb`` on ``PATH``. The helper reads plumb's JSON report (the schema is
docs/json.md in the plumb repository); it needs no test framework: a failure is an
``AssertionError``, which pytest and unittest both report as a failed test.
"""
import json
import os
import shutil
import subprocess


class ProbeFailed(AssertionError):
    """plumb found something wrong, or could not settle the check; ``report`` holds the details."""

    def __init__(self, report):
        super().__init__(report.summary())
        self.report = report


class ProbeUnusable(RuntimeError):
    """plumb could not run the probe at all (exit 2): a bad description, weights or data, or a
    program that crashed, hung or broke the protocol. The message is plumb's own."""


class Report:
    """plumb's probe report: the exit code, the parsed JSON document and plumb's stderr."""

    def __init__(self, code, document, stderr, command):
        self.code = code
        self.document = document
        self.stderr = stderr
        self.command = command

    @property
    def verdict(self):
        """"pass", "fail" or "inconclusive"."""
        return self.document["verdict"]

    @property
    def passed(self):
        return self.code == 0 and self.verdict == "pass"

    @property
    def findings(self):
        """Every finding: dicts with ``code``, ``severity``, ``message`` and, where one applies,
        ``tensor``."""
        return self.document.get("findings", [])

    def diagnoses(self):
        """``{tensor: code}`` for every tensor the diagnosis named (empty for a black box)."""
        return {t["name"]: t["diagnosis"]["code"] for t in self.document.get("tensors", [])
                if t.get("diagnosis")}

    def summary(self):
        """The findings of severity error and warning, one line each, after the verdict."""
        lines = [f"plumb probe: {self.verdict} (exit {self.code}) for {' '.join(self.command)}"]
        for f in self.findings:
            if f.get("severity") in ("error", "warning"):
                where = f" [{f['tensor']}]" if f.get("tensor") else ""
                lines.append(f"  {f['severity']} {f['code']}{where}: {f['message']}")
        return "\n".join(lines)


def find_plumb(plumb=None):
    """The plumb binary to run: ``plumb``, else $PLUMB, else `plumb` on PATH."""
    found = plumb or os.environ.get("PLUMB") or shutil.which("plumb")
    if not found:
        raise ProbeUnusable("no plumb binary: pass plumb=PATH, set PLUMB, or put plumb on PATH")
    return str(found)


def run_probe(command, net=None, *, weights=None, data=None, blackbox=None, seed=None,
              options=(), plumb=None, cwd=None, env=None, timeout=None):
    """Run ``plumb probe`` on ``command`` (a list: the program and its arguments) and return its
    ``Report``.

    Arguments:
        net: the network description; without it the program is probed as a black box
            (``--blackbox``: its gradient against differences of its own loss only).
        weights, data: files for ``-w`` and ``-d``; without them plumb draws both from ``seed``.
        blackbox: force ``--blackbox`` on or off (default: on exactly when ``net`` is None).
        options: more plumb options, e.g. ``["--sample", "all"]`` or ``["--timeout", "10"]``.
        plumb: the plumb binary (see ``find_plumb``); cwd, env: for the plumb process.
        timeout: seconds for the whole run, after which it is stopped (``subprocess`` raises).

    Raises ``ProbeUnusable`` with plumb's message when plumb exits with status 2.
    """
    args = [find_plumb(plumb), "probe"]
    if net is not None:
        args.append(str(net))
    if blackbox if blackbox is not None else net is None:
        args.append("--blackbox")
    if weights is not None:
        args += ["-w", str(weights)]
    if data is not None:
        args += ["-d", str(data)]
    if seed is not None:
        args += ["--seed", str(seed)]
    args += [str(o) for o in options] + ["--format", "json", "--quiet", "--"]
    args += [str(c) for c in command]
    env = dict(os.environ if env is None else env)
    env.setdefault("NO_COLOR", "1")
    done = subprocess.run(args, cwd=cwd, env=env, capture_output=True, timeout=timeout)
    stderr = done.stderr.decode("utf-8", "replace")
    if done.returncode == 2:
        raise ProbeUnusable(stderr.strip() or f"plumb probe exited with status 2: {args}")
    try:
        document = json.loads(done.stdout)
    except ValueError:
        raise ProbeUnusable(f"plumb probe (exit {done.returncode}) wrote no JSON report; "
                            f"stderr:\n{stderr}") from None
    return Report(done.returncode, document, stderr, [str(c) for c in command])


def assert_probe_passes(command, net=None, **kwargs):
    """Run ``run_probe`` and raise ``ProbeFailed`` (an ``AssertionError`` whose message lists the
    report's findings) unless plumb's verdict is pass. Returns the ``Report`` when it is."""
    report = run_probe(command, net, **kwargs)
    if not report.passed:
        raise ProbeFailed(report)
    return report


def main(argv=None):
    """``python -m plumb_wire.testing [--net NET] [-w W] [-d D] [--seed N] -- CMD ARGS``: the
    helper from a shell; prints the summary and exits 0 on pass, 1 otherwise, 2 if unusable."""
    import argparse
    import sys

    ap = argparse.ArgumentParser(prog="python -m plumb_wire.testing",
                                 description=main.__doc__.split("\n")[0])
    ap.add_argument("--net")
    ap.add_argument("-w", "--weights")
    ap.add_argument("-d", "--data")
    ap.add_argument("--seed")
    ap.add_argument("--plumb")
    ap.add_argument("command", nargs=argparse.REMAINDER)
    a = ap.parse_args(argv)
    command = a.command[1:] if a.command[:1] == ["--"] else a.command
    if not command:
        ap.error("give the program after --")
    try:
        report = run_probe(command, a.net, weights=a.weights, data=a.data, seed=a.seed,
                           plumb=a.plumb)
    except ProbeUnusable as e:
        print(e, file=sys.stderr)
        return 2
    print(report.summary())
    for tensor, code in report.diagnoses().items():
        print(f"  diagnosis {tensor}: {code}")
    return 0 if report.passed else 1


if __name__ == "__main__":
    raise SystemExit(main())
