"""Overload: a burst of frames arriving faster than the analysis.

Runs a real daemon process (``livequant run --no-console``, real pipeline, one
worker by default), warms it up on one frame, then writes a burst of frames
into the watched folder as fast as the disk takes them.  It measures

* that every frame is done exactly once (ledger);
* the lag the daemon reports (``status`` command, every 0.25 s): how it rises
  while the backlog builds and drains back to 0;
* the drain time (last frame written -> last frame done) and throughput;
* peak memory: ``VmHWM`` (the kernel's high-water mark of resident memory)
  of the daemon process and of each worker from ``/proc/PID/status``, before
  and after the burst.  The growth is reported in units of the frame size, the
  baseline (after the warm-up frame) separately.

and renders the terminal display once, half-way through the backlog.

Usage (from the repository root)::

    PYTHONPATH=. python tests/bench_overload.py                  # 200 frames of 256 x 256
    PYTHONPATH=. python tests/bench_overload.py --frames 200 --size 512 --json

Not collected by pytest (the name does not start with ``test_``); the quick
version is tests/reliability/test_overload.py.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def _proc_status(pid: int) -> dict[str, int]:
    """VmHWM and VmRSS of a process in bytes ({} when it is gone)."""
    out = {}
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                key, _, rest = line.partition(":")
                if key in ("VmHWM", "VmRSS"):
                    out[key] = int(rest.split()[0]) * 1024
    except (FileNotFoundError, ProcessLookupError):
        return {}
    return out


def _children(pid: int) -> list[int]:
    """Direct children of `pid` (the worker processes and the multiprocessing helpers)."""
    kids = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as fh:
                fields = fh.read().rsplit(")", 1)[1].split()
        except (FileNotFoundError, ProcessLookupError, IndexError):
            continue
        if int(fields[1]) == pid:
            kids.append(int(entry))
    return kids


class _Memory:
    """The high-water marks of the daemon and of every child it ever had."""

    def __init__(self, pid: int):
        self.pid = pid
        self.hwm: dict[int, int] = {}
        self.rss: dict[int, int] = {}

    def sample(self) -> None:
        for p in [self.pid, *_children(self.pid)]:
            st = _proc_status(p)
            if st:
                self.hwm[p] = max(self.hwm.get(p, 0), st.get("VmHWM", 0))
                self.rss[p] = st.get("VmRSS", 0)

    def peaks(self) -> dict:
        workers = {p: v for p, v in self.hwm.items() if p != self.pid}
        return {"daemon_hwm": self.hwm.get(self.pid, 0),
                "workers_hwm": sorted(workers.values(), reverse=True),
                "total_hwm": sum(self.hwm.values())}


def _status(endpoint: str) -> dict | None:
    from livequant.daemon.commands import CommandError, send_command

    try:
        reply = send_command(endpoint, {"cmd": "status"}, timeout_s=5)
    except CommandError:
        return None
    return reply.get("status") if reply.get("ok") else None


def _render(status: dict) -> str:
    """The terminal display (80 columns) of one status reply."""
    from rich.console import Console

    from livequant.daemon.status import LastFrame, Snapshot
    from livequant.display.status import render_status

    fields = dict(status)
    fields.pop("total", None)
    last = fields.pop("last", None)
    snap = Snapshot(**{**fields, "warnings": tuple(fields.get("warnings") or ()),
                       "last": LastFrame(**last) if last else None})
    console = Console(width=80, record=True, file=open(os.devnull, "w"), color_system=None)
    console.print(render_status(snap))
    return console.export_text()


def run_overload(n_frames: int = 200, size: int = 256, *, workers: int = 1,
                 workdir: str | os.PathLike | None = None, analyze: str | None = None,
                 sidecar_extra: dict | None = None) -> dict:
    """Run the overload measurement; return the figures (see the module docstring).

    `analyze` replaces the real pipeline (``module:function``); `sidecar_extra`
    adds keys to every frame's sidecar (e.g. ``sleep_s`` for the stand-in
    analysis of the quick test).
    """
    extra = dict(sidecar_extra or {})
    from livequant.daemon import Ledger
    from livequant.frames import write_frame
    from tests.daemon._helpers import cli_argv, lattice_image, sidecar

    own_tmp = None
    if workdir is None:
        own_tmp = tempfile.TemporaryDirectory(prefix="lq-overload-")
        workdir = own_tmp.name
    work = Path(workdir)
    watch, session = work / "watch", work / "session"
    watch.mkdir(parents=True, exist_ok=True)
    frames = [lattice_image((size, size), seed=s) for s in range(n_frames + 1)]
    frame_bytes = frames[0].nbytes
    argv = cli_argv() + ["run", "--watch", str(watch), "--session", str(session),
                         "--no-console", "--workers", str(workers), "--ingest-port", "0",
                         "--events-port", "0", "--commands-port", "0"]
    if analyze:
        argv += ["--analyze", analyze]
    env = {**os.environ, "PYTHONPATH": str(REPO), "LIVEQUANT_DAEMON__HEARTBEAT_S": "0.5"}
    daemon_log = open(work / "daemon.log", "wb")
    proc = subprocess.Popen(argv, cwd=REPO, env=env, stdout=daemon_log, stderr=daemon_log,
                            start_new_session=True)
    mem = _Memory(proc.pid)
    try:
        deadline = time.monotonic() + 120
        while not (session / "daemon.json").exists():
            if proc.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError("daemon did not start: " + (work / "daemon.log").read_text())
            time.sleep(0.1)
        endpoint = json.loads((session / "daemon.json").read_text())["endpoints"]["commands"]

        def done() -> int:
            s = _status(endpoint)
            return -1 if s is None else s["counts"].get("done", 0)

        # warm-up: one frame starts the worker(s) and loads the compiled kernels
        write_frame(watch, "warmup", frames[-1], sidecar("warmup", **extra))
        while done() < 1:
            mem.sample()
            time.sleep(0.1)
        time.sleep(0.5)
        mem.sample()
        baseline = {"daemon_rss": mem.rss.get(proc.pid, 0),
                    "total_rss": sum(mem.rss.values()), **mem.peaks()}

        t_start = time.time()
        for k in range(n_frames):
            write_frame(watch, f"f{k:04d}", frames[k], sidecar(f"f{k:04d}", **extra))
        t_written = time.time()
        write_rate = n_frames / max(t_written - t_start, 1e-9)

        lags, shown = [], None
        while True:
            mem.sample()
            s = _status(endpoint)
            if s is not None:
                lags.append((time.time() - t_start, s["lag_s"], s["counts"]["queued"]))
                # the display half-way through the backlog: lag and queue both visible
                max_queued = max(q for _, _, q in lags)
                if shown is None and max_queued > 0 and s["counts"]["queued"] <= max_queued / 2:
                    shown = s
                if s["counts"]["done"] + s["counts"]["quarantined"] == n_frames + 1 \
                        and s["lag_s"] == 0:
                    break
            if time.monotonic() > deadline + 600:
                raise RuntimeError("burst not drained in time")
            time.sleep(0.25)
        t_drained = time.time()
        final = _status(endpoint)
        mem.sample()
        peaks = mem.peaks()
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(60)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(30)
    with Ledger(session / "ledger.sqlite", readonly=True) as led:
        rows = led.rows()
    done_once = sum(1 for r in rows if r.state == "done" and r.done_count == 1)
    analyse_rate = n_frames / max(t_drained - t_start, 1e-9)
    growth = peaks["total_hwm"] - baseline["total_hwm"]
    result = {
        "frames": n_frames, "size_px": size, "workers": workers,
        "frame_bytes": frame_bytes,
        "write_frames_per_s": write_rate,
        "analysis_frames_per_s": analyse_rate,
        "arrival_over_analysis": write_rate / analyse_rate,
        "done_exactly_once": done_once, "ledger_rows": len(rows),
        "max_lag_s": max(l for _, l, _ in lags), "max_queued": max(q for _, _, q in lags),
        "final_lag_s": final["lag_s"] if final else None,
        "drain_s": t_drained - t_written,
        "baseline_total_rss_mb": baseline["total_rss"] / 2**20,
        "baseline_total_hwm_mb": baseline["total_hwm"] / 2**20,
        "peak_total_hwm_mb": peaks["total_hwm"] / 2**20,
        "peak_daemon_hwm_mb": peaks["daemon_hwm"] / 2**20,
        "baseline_daemon_hwm_mb": baseline["daemon_hwm"] / 2**20,
        "peak_workers_hwm_mb": [v / 2**20 for v in peaks["workers_hwm"]],
        "growth_frames": growth / frame_bytes,
        "daemon_growth_frames": (peaks["daemon_hwm"] - baseline["daemon_hwm"]) / frame_bytes,
        "burst_bytes_frames": n_frames,
        "lag_series": lags,
        "display_mid_backlog": _render(shown) if shown else "",
    }
    if own_tmp is not None:
        own_tmp.cleanup()
    return result


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--frames", type=int, default=200)
    p.add_argument("--size", type=int, default=256, help="frame side, pixels")
    p.add_argument("--workers", type=int, default=1)
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    r = run_overload(args.frames, args.size, workers=args.workers)
    if args.json:
        print(json.dumps({k: v for k, v in r.items() if k != "display_mid_backlog"}))
        return 0
    mb = r["frame_bytes"] / 2**20
    print(f"burst of {r['frames']} frames of {r['size_px']} x {r['size_px']} uint16 "
          f"({mb:.2f} MiB each), {r['workers']} worker(s)", file=sys.stderr)
    print(f"  written at {r['write_frames_per_s']:.0f} frames/s, analysed at "
          f"{r['analysis_frames_per_s']:.1f} frames/s (arrival {r['arrival_over_analysis']:.0f}x "
          f"faster than analysis)", file=sys.stderr)
    print(f"  done exactly once: {r['done_exactly_once']} of {r['ledger_rows']} ledger rows "
          f"(incl. 1 warm-up frame)", file=sys.stderr)
    print(f"  lag: up to {r['max_lag_s']:.1f} s with {r['max_queued']} queued; drained to "
          f"{r['final_lag_s']:.1f} s, {r['drain_s']:.1f} s after the last frame was written",
          file=sys.stderr)
    print(f"  memory: baseline {r['baseline_total_hwm_mb']:.0f} MiB (daemon + workers after "
          f"the warm-up frame); peak {r['peak_total_hwm_mb']:.0f} MiB = baseline + "
          f"{r['growth_frames']:.1f} x frame size; daemon process alone +"
          f"{r['daemon_growth_frames']:.1f} x frame size (the burst is {r['frames']} frames)",
          file=sys.stderr)
    print("  the display half-way through the backlog:", file=sys.stderr)
    print(r["display_mid_backlog"], file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
