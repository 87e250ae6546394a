"""Shared helpers for the daemon tests: synthetic frames, settings, a daemon on a thread."""

from __future__ import annotations

import contextlib
import functools
import json
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from livequant.config import Settings

PIXEL_SIZE_PM = 20.0
SPACING_PX = 19.5  # 390 pm at 20 pm/px: a cubic perovskite A-A distance (about SrTiO3's 390.5 pm)


def lattice_image(shape=(128, 128), *, spacing_px=SPACING_PX, seed=0, dose=200.0,
                  sigma_px=2.2) -> np.ndarray:
    """A square lattice of round Gaussian columns with Poisson noise (uint16 counts).

    A columns at the cell corners, weaker B columns at the centres: the
    simplest perovskite [001] HAADF picture, with known positions.
    """
    clean = _clean_lattice(tuple(shape), float(spacing_px), float(sigma_px))
    return np.random.default_rng(seed).poisson(clean * dose).astype(np.uint16)


@functools.lru_cache(maxsize=8)
def _clean_lattice(shape, spacing_px, sigma_px) -> np.ndarray:
    rows, cols = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    img = np.full(shape, 0.05)
    offset = np.array([0.37, 0.61]) * spacing_px  # not on the pixel grid
    n = int(max(shape) / spacing_px) + 2
    half = int(np.ceil(4 * sigma_px))
    for i in range(-1, n):
        for j in range(-1, n):
            for frac, amp in (((0.0, 0.0), 1.0), ((0.5, 0.5), 0.55)):
                r0 = offset[0] + (i + frac[0]) * spacing_px
                c0 = offset[1] + (j + frac[1]) * spacing_px
                r_lo, r_hi = max(0, int(r0) - half), min(shape[0], int(r0) + half + 1)
                c_lo, c_hi = max(0, int(c0) - half), min(shape[1], int(c0) + half + 1)
                if r_lo >= r_hi or c_lo >= c_hi:
                    continue
                rr, cc = rows[r_lo:r_hi, c_lo:c_hi], cols[r_lo:r_hi, c_lo:c_hi]
                img[r_lo:r_hi, c_lo:c_hi] += amp * np.exp(
                    -((rr - r0) ** 2 + (cc - c0) ** 2) / (2 * sigma_px ** 2))
    img.flags.writeable = False
    return img


def sidecar(frame_id: str, **extra) -> dict:
    return {"frame_id": frame_id, "pixel_size_pm": PIXEL_SIZE_PM, "dwell_time_us": 2.0,
            "detector": "HAADF", **extra}


def fast_settings(*, frame_defaults: dict | None = None, **daemon_overrides) -> Settings:
    """Fast settings: one worker, any free ports, short settle and heartbeat times."""
    daemon = dict(ingest_port=0, events_port=0, commands_port=0, settle_time_s=0.6,
                  rescan_interval_s=0.2, heartbeat_s=1.0, grace_s=60.0, tick_s=0.05)
    daemon.update(daemon_overrides)
    return Settings.model_validate({"workers": 1, "daemon": daemon,
                                    "frame_defaults": frame_defaults or {}})


def wait_for(condition, *, timeout_s=60.0, poll_s=0.05, what="condition"):
    """Poll until `condition()` is truthy; fail after a generous safety timeout."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        time.sleep(poll_s)
    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}")


@contextlib.contextmanager
def running_daemon(daemon):
    """Start `daemon`, run its loop on a thread, and always stop it on the way out."""
    daemon.start()
    thread = threading.Thread(target=daemon.loop, name="test-daemon-loop", daemon=True)
    thread.start()
    try:
        yield daemon
    finally:
        daemon.handle_exit()
        thread.join(60)
        daemon.shutdown()
        assert not thread.is_alive(), "daemon loop did not stop"


def read_events(session: Path, topic: str | None = None) -> list[dict]:
    path = Path(session) / "events.jsonl"
    if not path.exists():
        return []
    events = [json.loads(line) for line in path.read_text().splitlines() if line.strip()]
    return [e for e in events if topic is None or e["topic"] == topic]


# ---------------------------------------------------------------- a stand-in analysis
# Used only where a test is about the plumbing (crashes, slowness, pausing), never
# in the end-to-end tests of the real analysis.


@dataclass(frozen=True)
class _PlainResult:
    frame_id: str
    mean_counts: float
    columns = None
    cells = None

    def summary(self) -> dict:
        return {"frame_id": self.frame_id, "status": "ok", "n_columns": 0,
                "mean_counts": self.mean_counts}


def plain_analyze(frame, settings):
    """Mean of the pixels; sleeps `sleep_s` and dies on `die` from the sidecar's extras."""
    import os

    extra = frame.meta.extra
    if extra.get("die"):
        os._exit(3)  # a worker killed mid-frame (as by the OOM killer)
    if extra.get("sleep_s"):
        time.sleep(float(extra["sleep_s"]))
    if extra.get("raise"):
        raise RuntimeError("analysis bug on purpose")
    return _PlainResult(frame.frame_id, float(np.mean(frame.pixels)))


def cli_argv() -> list[str]:
    """The command line that starts ``livequant`` in a subprocess.

    ``python -m livequant`` once every sub-command module on the list exists;
    until then a launcher with only the daemon's sub-commands (same code path
    from argument parsing on).
    """
    import importlib.util
    import sys

    from livequant.cli import COMMAND_MODULES

    if all(importlib.util.find_spec(m) is not None for m in COMMAND_MODULES):
        return [sys.executable, "-m", "livequant", "-v"]
    launcher = ("import argparse, logging, sys\n"
                "from livequant.commands import run, status\n"
                "logging.basicConfig(level=logging.INFO, stream=sys.stderr)\n"
                "p = argparse.ArgumentParser(prog='livequant')\n"
                "sub = p.add_subparsers()\n"
                "run.register(sub); status.register(sub)\n"
                "a = p.parse_args(sys.argv[1:])\n"
                "sys.exit(a.func(a))\n")
    return [sys.executable, "-c", launcher]


def frame_events_by_id(session) -> dict[str, int]:
    counts: dict[str, int] = {}
    for e in read_events(session, "frame"):
        counts[e["data"]["frame_id"]] = counts.get(e["data"]["frame_id"], 0) + 1
    return counts
