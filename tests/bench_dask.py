"""Benchmark: frames per second on a Dask LocalCluster (1 and 2 workers) beside the
daemon's local process pool, and the scheduler's overhead per frame.

    PYTHONPATH=. python tests/bench_dask.py [--frames 16] [--size 512] [--rounds 3] [--json]

All runs analyse the same synthetic frames (TIFF + sidecar on disk) with the same
worker code (livequant.daemon.worker.process_path: read, analyse, write outputs):

* ``pool-2``: the daemon's spawn ProcessPoolExecutor with 2 processes;
* ``dask-1`` / ``dask-2``: LocalCluster(n_workers=1 or 2, threads_per_worker=1), tasks
  submitted directly (livequant.cluster.process_on_worker);
* ``reprocess-2``: ``livequant.reprocess.reprocess`` on the 2-worker cluster, i.e. the
  above plus the ledger (hashing, claims, records) and the Parquet tables;
  (medians of ``--rounds`` rounds that interleave the configurations);
* overhead: the wall time per task of a task that does nothing (the scheduler's and
  the transport's cost per frame), with a path argument (``reprocess``) and with a
  frame's pixels as the argument (``run --scheduler``: the pixels travel).

The three pools are started side by side and warmed first (imports, compiled kernels
loaded from the cache); idle ones cost nothing while another is timed.  The machine is shared: report the ratios.
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import json
import multiprocessing
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from livequant.config import Settings  # noqa: E402
from livequant.frames import write_frame  # noqa: E402
from tests.daemon._helpers import lattice_image, sidecar  # noqa: E402


def _frames(folder: Path, n: int, size: int) -> list[str]:
    return [str(write_frame(folder, f"f{k:03d}", lattice_image((size, size), seed=k),
                            sidecar(f"f{k:03d}"))) for k in range(n)]


def _noop(token, arg):
    return 0


class _Pool:
    """The daemon's spawn process pool with its initializer (the same worker code)."""

    def __init__(self, settings, frames_dir, n_workers):
        from livequant.daemon.worker import init_worker
        from livequant.pipeline import threads_per_worker

        self.ex = cf.ProcessPoolExecutor(
            max_workers=n_workers, mp_context=multiprocessing.get_context("spawn"),
            initializer=init_worker,
            initargs=(settings, "livequant.pipeline:analyze_frame", str(frames_dir),
                      threads_per_worker(n_workers)))

    def run(self, paths) -> list:
        from livequant.daemon.worker import process_path

        return list(self.ex.map(process_path, paths))

    def close(self):
        self.ex.shutdown()


class _Dask:
    """A LocalCluster of `n_workers` single-threaded processes with the livequant setup."""

    def __init__(self, settings, frames_dir, n_workers):
        import distributed

        from livequant.cluster import install_setup, local_cluster

        env = {"PYTHONPATH": os.pathsep.join(
            p for p in (str(ROOT), os.environ.get("PYTHONPATH")) if p)}
        self.cluster = local_cluster(n_workers, env=env, silence_logs=40)
        self.client = distributed.Client(self.cluster)
        self.client.wait_for_workers(n_workers, timeout=120)
        self.token = install_setup(self.client, settings, "livequant.pipeline:analyze_frame",
                                   frames_dir)

    def run(self, paths) -> list:
        from livequant.cluster import process_on_worker

        futs = self.client.map(process_on_worker, [self.token] * len(paths), paths,
                               keep_view=False, pure=False)
        return self.client.gather(futs)

    def close(self):
        self.client.close()
        self.cluster.close()


def _timed(fn, paths) -> float:
    t0 = time.perf_counter()
    outs = fn(paths)
    dt = time.perf_counter() - t0
    assert all(o.state == "done" for o in outs), [o.message for o in outs if o.state != "done"]
    return len(paths) / dt


def _reprocess_rate(client, folder, settings) -> float:
    from livequant.reprocess import reprocess

    with tempfile.TemporaryDirectory() as session:
        s = reprocess([folder], session, settings, client=client)
    assert s.done == len(list(Path(folder).glob("*.tif")))
    return s.done / s.elapsed_s


def _overhead(client, token, paths) -> dict:
    """Seconds per no-op task: the scheduler's cost per frame (batched and one at a time)."""
    n = 200
    client.gather(client.map(_noop, [token] * 10, paths[:1] * 10, pure=False))
    t0 = time.perf_counter()
    client.gather(client.map(_noop, [token] * n, [paths[0]] * n, pure=False))
    batched = (time.perf_counter() - t0) / n
    t0 = time.perf_counter()
    for _ in range(50):
        client.submit(_noop, token, paths[0], pure=False).result()
    serial = (time.perf_counter() - t0) / 50
    # run --scheduler: the frame's pixels go with the task (2048 x 2048 uint16 = 8 MiB)
    frame = np.zeros((2048, 2048), np.uint16)
    t0 = time.perf_counter()
    for _ in range(10):
        client.submit(_noop, token, frame, pure=False).result()
    with_pixels = (time.perf_counter() - t0) / 10
    return {"overhead_s_per_task_batched": batched, "overhead_s_per_task_serial": serial,
            "overhead_s_per_2048_frame_sent": with_pixels}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--frames", type=int, default=16)
    ap.add_argument("--size", type=int, default=512, help="frame side, pixels")
    ap.add_argument("--rounds", type=int, default=3, help="interleaved timed rounds")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    settings = Settings()
    med = np.median
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        paths = _frames(tmp / "frames", args.frames, args.size)
        load0 = os.getloadavg()[0]
        runners = {"pool_2": _Pool(settings, tmp / "o-pool", 2),
                   "dask_1": _Dask(settings, tmp / "o-d1", 1),
                   "dask_2": _Dask(settings, tmp / "o-d2", 2)}
        try:
            for r in runners.values():  # warm: imports, kernels from the cache
                r.run(paths[:2])
            rates: dict[str, list[float]] = {k: [] for k in [*runners, "reprocess_2"]}
            # rounds interleave the configurations, so a change of the machine's load
            # (it is shared) falls on all of them alike
            for _ in range(args.rounds):
                for name, r in runners.items():
                    rates[name].append(_timed(r.run, paths))
                rates["reprocess_2"].append(_reprocess_rate(runners["dask_2"].client,
                                                            tmp / "frames", settings))
            over = _overhead(runners["dask_1"].client, runners["dask_1"].token, paths)
        finally:
            for r in runners.values():
                r.close()
        load1 = os.getloadavg()[0]
    fps = {k: float(med(v)) for k, v in rates.items()}
    res = {
        "frames": args.frames, "frame_side_px": args.size, "rounds": args.rounds,
        "cores": os.cpu_count(), "load_average_before_after": [load0, load1],
        **{f"{k}_frames_per_s": v for k, v in fps.items()},
        "per_round_frames_per_s": rates,
        "ratio_dask_2_over_pool_2": fps["dask_2"] / fps["pool_2"],
        "ratio_dask_2_over_dask_1": fps["dask_2"] / fps["dask_1"],
        "ratio_reprocess_2_over_dask_2": fps["reprocess_2"] / fps["dask_2"],
        **over,
        "overhead_fraction_of_frame": over["overhead_s_per_task_batched"] * fps["dask_1"],
    }
    if args.json:
        print(json.dumps(res, indent=1))
    else:
        for k, v in res.items():
            print(f"{k:34s} {v if not isinstance(v, float) else round(v, 4)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
