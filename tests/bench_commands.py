"""Benchmark of the commands a person types at the microscope.

Times ``livequant --version``, ``--help``, ``status``, ``proposals``, ``accept``
and ``reject`` as fresh processes (what the operator waits for), each run
``--runs`` times after ``--warmup`` untimed runs (warm: files in the page cache,
compiled bytecode present), and reports the median, the fastest and the
slowest run.  ``status`` and ``proposals`` are timed twice: against a running
daemon (a real :class:`~livequant.daemon.Daemon` in this process, with real
proposals from simulated frames, answering on its command socket) and, after
it stops, against the session's ledger alone.  ``accept`` and ``reject`` go to
the running daemon; the first runs decide real proposals, later runs ask for
an id that does not exist (the same round trip, answered with an error).

Each timed process also reports which heavy libraries it imported
(numba, scipy, matplotlib, numpy, pydantic): the target is under 0.3 s warm
with none of the first three (``tests/test_command_imports.py`` checks that).

Usage (from the repository root)::

    PYTHONPATH=. python tests/bench_commands.py [--runs 15] [--json]
    PYTHONPATH=/some/other/tree python tests/bench_commands.py   # that tree's commands

``PYTHONPATH`` decides which ``livequant`` the timed processes import.  Not
collected by pytest (the name does not start with ``test_``).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

#: Libraries whose import the operator's commands must not pay for.
FORBIDDEN = ("numba", "scipy", "matplotlib")
#: Also reported (they cost about 0.1-0.2 s each on the 2-core test machine).
REPORTED = FORBIDDEN + ("numpy", "pydantic")

#: Runs ``livequant`` with the given arguments, then writes the heavy modules it
#: imported and its exit code as JSON to the file named by LIVEQUANT_PROBE_OUT.
PROBE = """\
import json, os, sys
code = None
try:
    from livequant.cli import main
    code = main(sys.argv[1:])
except SystemExit as exc:
    code = exc.code
finally:
    names = %r
    with open(os.environ["LIVEQUANT_PROBE_OUT"], "w") as fh:
        lq = sys.modules.get("livequant")
        json.dump({"code": code, "imported": [n for n in names if n in sys.modules],
                   "livequant": getattr(lq, "__file__", None)}, fh)
sys.exit(code)
""" % (REPORTED,)


def probe(args: list[str], *, env: dict | None = None, timeout_s: float = 60.0) -> dict:
    """Run ``livequant ARGS`` in a fresh process; its exit code, imports and seconds."""
    with tempfile.TemporaryDirectory(prefix="lq-probe-") as tmp:
        out = Path(tmp) / "probe.json"
        environment = dict(env or os.environ)
        environment["LIVEQUANT_PROBE_OUT"] = str(out)
        environment.setdefault("COLUMNS", "100")
        t0 = time.perf_counter()
        # cwd: a folder without a `livequant` in it, so PYTHONPATH decides which one runs
        proc = subprocess.run([sys.executable, "-c", PROBE, *args], env=environment, cwd=tmp,
                              stdin=subprocess.DEVNULL, capture_output=True, text=True,
                              timeout=timeout_s)
        seconds = time.perf_counter() - t0
        info = json.loads(out.read_text()) if out.exists() else {"code": proc.returncode,
                                                                 "imported": ["?"]}
    return {"seconds": seconds, "code": info["code"], "imported": info["imported"],
            "stderr": proc.stderr, "stdout": proc.stdout, "livequant": info.get("livequant")}


@contextmanager
def daemon_with_proposals(root: Path, n_frames: int = 3):
    """A real daemon on ``root/session`` with proposals from simulated frames, in this process.

    The analysis is the decision tests' fast stand-in (no column fitting): the
    commands under test only talk to the daemon, so what the daemon computes
    does not matter here.  Yields ``(daemon, session path)``.
    """
    from sim_instrument import ScanEngine, Specimen
    from sim_instrument.engine import DriftModel as SimDrift
    from tests.daemon._helpers import running_daemon, wait_for
    from tests.daemon.test_decisions import _daemon
    from tests.daemon._loop import write_sim

    engine = ScanEngine(Specimen.from_scenario("demo"), seed=1, drift=SimDrift.none())
    d, watch = _daemon(root)
    with running_daemon(d):
        for k in range(n_frames):
            acq = engine.acquire((60.0 * k, 20.0), 20.0, (256, 256))
            write_sim(watch, acq, test_flags=[{"x_px": 40, "y_px": 40, "score": 0.9},
                                              {"x_px": 200, "y_px": 210, "score": 0.6}])
        wait_for(lambda: d.ledger.counts()["done"] >= n_frames and len(list(
            d.ledger.proposals())) >= 2, timeout_s=120, what="frames done and proposals")
        yield d, root / "session"


def _stats(runs: list[dict]) -> dict:
    secs = [r["seconds"] for r in runs]
    imported = sorted({m for r in runs for m in r["imported"]})
    return {"median_s": statistics.median(secs), "min_s": min(secs), "max_s": max(secs),
            "runs": len(secs), "exit_codes": sorted({r["code"] for r in runs}),
            "imported": imported, "livequant": runs[0]["livequant"]}


def time_command(args: list[str] | callable, *, runs: int, warmup: int) -> dict:
    """Median seconds of ``livequant ARGS`` over `runs` fresh processes after `warmup`."""
    make = args if callable(args) else (lambda k: args)
    for k in range(warmup):
        probe(make(-1 - k))
    return _stats([probe(make(k)) for k in range(runs)])


def run(runs: int = 15, warmup: int = 3) -> dict:
    results: dict[str, dict] = {}
    results["--version"] = time_command(["--version"], runs=runs, warmup=warmup)
    results["--help"] = time_command(["--help"], runs=runs, warmup=warmup)
    with tempfile.TemporaryDirectory(prefix="lq-bench-commands-") as tmp:
        with daemon_with_proposals(Path(tmp)) as (d, session):
            s = ["--session", str(session)]
            ids = [p["id"] for p in d._decision_loop().list("open")]
            results["status (daemon)"] = time_command(["status", *s], runs=runs, warmup=warmup)
            results["proposals (daemon)"] = time_command(["proposals", *s], runs=runs,
                                                         warmup=warmup)
            half = len(ids) // 2

            def pick(pool):
                return lambda k: pool[k] if 0 <= k < len(pool) else "p0999"

            acc, rej = pick(ids[:half]), pick(ids[half:])
            results["accept (daemon)"] = time_command(lambda k: ["accept", acc(k), *s],
                                                      runs=runs, warmup=warmup)
            results["reject (daemon)"] = time_command(lambda k: ["reject", rej(k), *s],
                                                      runs=runs, warmup=warmup)
            results["accept (daemon)"]["real_decisions"] = half
            results["reject (daemon)"]["real_decisions"] = len(ids) - half
        s = ["--session", str(session)]
        results["status (ledger)"] = time_command(["status", *s], runs=runs, warmup=warmup)
        results["proposals (ledger)"] = time_command(["proposals", *s], runs=runs,
                                                     warmup=warmup)
    return {"python": sys.version.split()[0], "pythonpath": os.environ.get("PYTHONPATH", ""),
            "load_average": os.getloadavg(), "cpus": os.cpu_count(), "commands": results}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--runs", type=int, default=15, help="timed runs per command (default 15)")
    ap.add_argument("--warmup", type=int, default=3, help="untimed runs first (default 3)")
    ap.add_argument("--json", action="store_true", help="one JSON object on stdout")
    a = ap.parse_args(argv)
    out = run(a.runs, a.warmup)
    if a.json:
        print(json.dumps(out, indent=1))
        return 0
    print(f"livequant commands ({out['commands']['--help']['livequant']}), fresh process each, "
          f"{a.runs} runs after {a.warmup} warm-up (load average {out['load_average'][0]:.2f}, "
          f"{out['cpus']} CPUs)")
    print(f"{'command':<22}{'median':>9}{'min':>8}{'max':>8}  exit  heavy imports")
    for name, r in out["commands"].items():
        print(f"{name:<22}{r['median_s']:>8.3f}s{r['min_s']:>7.3f}s{r['max_s']:>7.3f}s  "
              f"{','.join(map(str, r['exit_codes'])):<5} {', '.join(r['imported']) or '-'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
