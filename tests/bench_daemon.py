"""Benchmark of the daemon: can it keep up with the microscope?

For each frame size it runs a real daemon (real analysis, worker pool,
watched folder, events socket) and measures

* sustained throughput: a burst of frames written at once, timed from the
  first frame complete on disk to the last summary published;
* end-to-end latency: frames written one per acquisition time (the pace of a
  live session), timed from "frame complete on disk" (the writer's rename of
  the sidecar) to "summary received" by a subscriber on the events socket;

and reports both beside the frame's acquisition time at the given dwell
(1024 x 1024 at 2 us: 2.1 s; 2048 x 2048: 8.4 s) as ratios, since absolute
seconds depend on the machine.

Frames are synthetic perovskite-like lattices (A and B columns, Poisson
noise), about 2,500 columns at 1024 x 1024 and 10,000 at 2048 x 2048.

Usage (from the repository root)::

    PYTHONPATH=. python tests/bench_daemon.py                 # both sizes
    PYTHONPATH=. python tests/bench_daemon.py --sizes 1024 --burst 6 --paced 4 --json

Not collected by pytest (the name does not start with ``test_``).
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path

SPACING_PX = 29.0        # ~10,000 columns (A + B) in a 2048 x 2048 frame
PIXEL_SIZE_PM = 390.0 / SPACING_PX


def _frames(size: int, n: int):
    from tests.daemon._helpers import lattice_image

    return [lattice_image((size, size), spacing_px=SPACING_PX, sigma_px=3.0, seed=s)
            for s in range(n)]


class _Listener:
    """Subscribe to ``frame`` events and note when each frame's summary arrives."""

    def __init__(self, endpoint: str):
        import zmq

        self.arrived: dict[str, float] = {}
        self.summaries: dict[str, dict] = {}
        self._stop = threading.Event()
        self._ctx = zmq.Context()
        self._endpoint = endpoint
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._ready = threading.Event()
        self._thread.start()
        self._ready.wait(5)
        time.sleep(0.3)  # let the subscription reach the publisher

    def _run(self):
        import zmq

        sock = self._ctx.socket(zmq.SUB)
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.SUBSCRIBE, b"frame")
        sock.connect(self._endpoint)
        self._ready.set()
        try:
            while not self._stop.is_set():
                if sock.poll(100):
                    _topic, payload = sock.recv_multipart()
                    t = time.time()
                    data = json.loads(payload)
                    self.arrived[data["frame_id"]] = t
                    self.summaries[data["frame_id"]] = data
        finally:
            sock.close(linger=0)

    def wait(self, ids, timeout_s: float) -> None:
        deadline = time.monotonic() + timeout_s
        while not set(ids) <= set(self.arrived):
            if time.monotonic() > deadline:
                missing = sorted(set(ids) - set(self.arrived))
                raise RuntimeError(f"no summary for {missing} within {timeout_s} s")
            time.sleep(0.02)

    def close(self):
        self._stop.set()
        self._thread.join(5)
        self._ctx.term()


def _run_case(size: int, *, n_burst: int, n_paced: int, workers: int, dwell_us: float) -> dict:
    from livequant.config import Settings
    from livequant.daemon import Daemon
    from livequant.frames import write_frame
    from tests.daemon._helpers import running_daemon

    acq_s = size * size * dwell_us * 1e-6
    images = _frames(size, n_burst + n_paced)  # all different: a repeat is a duplicate
    with tempfile.TemporaryDirectory(prefix="lq-bench-") as tmp:
        tmp = Path(tmp)
        (tmp / "watch").mkdir()
        settings = Settings.model_validate({
            "workers": workers,
            "daemon": {"ingest_port": 0, "events_port": 0, "commands_port": 0,
                       "heartbeat_s": 3600, "rescan_interval_s": 0.5},
        })
        d = Daemon(settings, session=tmp / "session", watch=tmp / "watch", log_heartbeat=False)
        with running_daemon(d):
            listener = _Listener(d.endpoints["events"])
            try:
                # Warm-up: start the worker processes and import the analysis there.
                write_frame(tmp / "watch", "warmup", images[0][:256, :256],
                            {"frame_id": "warmup", "pixel_size_pm": PIXEL_SIZE_PM})
                listener.wait(["warmup"], 300)

                # 1. burst: all frames at once; the daemon works through the backlog.
                written = {}
                for k in range(n_burst):
                    fid = f"burst{k}"
                    write_frame(tmp / "watch", fid, images[k],
                                {"frame_id": fid, "pixel_size_pm": PIXEL_SIZE_PM,
                                 "dwell_time_us": dwell_us})
                    written[fid] = time.time()
                listener.wait(written, 120 + 20 * n_burst * acq_s)
                span = max(listener.arrived[f] for f in written) - min(written.values())
                analyze_s = [listener.summaries[f]["timings_s"]["total"] for f in written]

                # 2. paced: one frame per acquisition time, as in a session.
                paced = {}
                next_t = time.monotonic()
                for k in range(n_paced):
                    time.sleep(max(0.0, next_t - time.monotonic()))
                    next_t += acq_s
                    fid = f"paced{k}"
                    write_frame(tmp / "watch", fid, images[n_burst + k],
                                {"frame_id": fid, "pixel_size_pm": PIXEL_SIZE_PM,
                                 "dwell_time_us": dwell_us})
                    paced[fid] = time.time()
                listener.wait(paced, 120 + 20 * n_paced * acq_s)
                latency = [listener.arrived[f] - paced[f] for f in paced]
                # What the daemon adds on top of the worker's read + analyse + write:
                # noticing the file, hashing, queueing, dispatch, publishing.
                overhead = [lat - sum(listener.summaries[f]["daemon"]["worker_timings_s"]
                                      .values()) for f, lat in zip(paced, latency)]
                n_columns = listener.summaries["paced0"]["n_columns"]
            finally:
                listener.close()
    per_frame_s = span / n_burst
    return {
        "size_px": size,
        "columns_per_frame": n_columns,
        "workers": workers,
        "acquisition_s": acq_s,
        "analysis_s_median": statistics.median(analyze_s),
        "burst_frames": n_burst,
        "sustained_s_per_frame": per_frame_s,
        "sustained_frames_per_s": 1.0 / per_frame_s,
        "keeps_up_ratio": acq_s / per_frame_s,
        "paced_frames": n_paced,
        "latency_s_median": statistics.median(latency),
        "latency_s_max": max(latency),
        "latency_over_acquisition": statistics.median(latency) / acq_s,
        "daemon_overhead_s_median": statistics.median(overhead),
    }


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--sizes", type=int, nargs="+", default=[1024, 2048])
    p.add_argument("--burst", type=int, default=6, help="frames in the throughput burst")
    p.add_argument("--paced", type=int, default=4, help="frames in the latency run")
    p.add_argument("--workers", type=int, default=0, help="0 = one per core")
    p.add_argument("--dwell-us", type=float, default=2.0)
    p.add_argument("--json", action="store_true", help="one JSON object on stdout")
    args = p.parse_args(argv)
    import os

    workers = args.workers or (os.cpu_count() or 1)
    results = []
    for size in args.sizes:
        print(f"{size} x {size}: burst of {args.burst}, then {args.paced} paced frames ...",
              file=sys.stderr)
        results.append(_run_case(size, n_burst=args.burst, n_paced=args.paced, workers=workers,
                                 dwell_us=args.dwell_us))
    if args.json:
        print(json.dumps({"daemon_benchmark": results}))
    for r in results:
        print(f"{r['size_px']:>5} px  {r['columns_per_frame']:>6} columns  acquisition "
              f"{r['acquisition_s']:.1f} s | analysis {r['analysis_s_median']:.2f} s/frame/worker"
              f" | sustained {r['sustained_s_per_frame']:.2f} s/frame with {r['workers']} "
              f"worker(s) = {r['keeps_up_ratio']:.2f} x the acquisition rate | latency "
              f"median {r['latency_s_median']:.2f} s (max {r['latency_s_max']:.2f} s) = "
              f"{r['latency_over_acquisition']:.2f} x acquisition time, of which "
              f"{r['daemon_overhead_s_median']:.2f} s outside the worker", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
