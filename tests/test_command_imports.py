"""The commands a person types load no numerical libraries (speed: tests/bench_commands.py).

``--help``, ``--version``, ``status``, ``proposals``, ``accept`` and ``reject``
run here as fresh processes, against a real daemon and against the ledger of
a stopped one; each reports which modules it imported.  numba, scipy and
matplotlib cost seconds at start-up on the 2-core test machine, so none of
them may be imported; the ledger-side ``status`` and ``proposals`` import no
pydantic either.  (Nothing is timed here.)
"""

from __future__ import annotations

import os
from pathlib import Path

from tests.bench_commands import FORBIDDEN, daemon_with_proposals, probe


def _env():
    root = str(Path(__file__).resolve().parents[1])
    return {**os.environ, "PYTHONPATH": root + os.pathsep + os.environ.get("PYTHONPATH", "")}


def _check(args, *, code=0, env):
    r = probe(args, env=env)
    assert r["livequant"] and r["livequant"].startswith(str(Path(__file__).resolve()
                                                            .parents[1])), r["livequant"]
    bad = [m for m in r["imported"] if m in FORBIDDEN]
    assert not bad, f"`livequant {' '.join(args)}` imported {bad}"
    assert r["code"] == code, (args, r["code"], r["stderr"][-2000:])
    return r


def test_help_and_version_import_nothing_heavy():
    env = _env()
    assert "livequant 0." in _check(["--version"], env=env)["stdout"]
    assert "proposals" in _check(["--help"], env=env)["stdout"]
    for sub in ("status", "proposals", "accept", "reject", "analyze", "report", "bench", "demo"):
        assert "usage: livequant" in _check([sub, "--help"], env=env)["stdout"]


def test_operator_commands_import_nothing_heavy(tmp_path):
    env = _env()
    with daemon_with_proposals(tmp_path, n_frames=1) as (d, session):
        s = ["--session", str(session)]
        first, second = (p["id"] for p in d._decision_loop().list("open")[:2])
        assert "queued" in _check(["status", *s], env=env)["stderr"]
        # the table is on stdout (piped: nothing cut), the caution on stderr
        assert first in _check(["proposals", *s], env=env)["stdout"]
        _check(["status", *s, "--json"], env=env)
        # without a terminal, accept needs --yes (it asks otherwise)
        assert "accepted" in _check(["accept", first, *s, "--yes"], env=env)["stderr"]
        assert "rejected" in _check(["reject", second, *s, "--why", "edge"], env=env)["stderr"]
        _check(["accept", "p0999", *s], code=2, env=env)
    # no daemon: the ledger answers, accept says no daemon runs.  Neither reads the
    # settings schema either: pydantic alone took `proposals` from 0.2 s to 0.5 s
    # (it read one configured value, the beam current, through the full validation)
    r = _check(["proposals", *s], env=env)
    assert first in r["stdout"] and "pydantic" not in r["imported"], r["imported"]
    assert "pydantic" not in _check(["status", *s], env=env)["imported"]
    assert "no daemon is running" in _check(["accept", first, *s], code=2, env=env)["stderr"]
    _check(["reject", first, *s], code=2, env=env)
