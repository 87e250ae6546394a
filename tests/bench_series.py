"""Benchmark of series registration: can it keep up with a fast-scan series?

For each frame size it simulates a short series of fast frames (the
simulated instrument: drift, per-line jitter, shot noise) and times, per
member after the first,

* the registration into the running sum (rigid phase correlation, then the
  per-line model; ``SeriesStack.add``), the step that runs once per frame;
* the average (drift and grid-jitter resampling; ``SeriesStack.average``),
  which the daemon runs before each analysis of the growing average;

beside the acquisition time of one frame at the series' dwell (rows x cols x
dwell, no flyback), as ratios: below 1 the registration keeps up with the
microscope on this machine.  The CPU seconds of the process are reported
beside the wall-clock seconds: on a loaded, shared machine they tell what
the work costs.  An orthogonal pair is timed the same way
(``correct_orthogonal_pair``, once per pair, against the pair's two frames).

Usage (from the repository root)::

    PYTHONPATH=. python tests/bench_series.py                       # 1024 and 2048
    PYTHONPATH=. python tests/bench_series.py --sizes 1024 --frames 4 --json

Not collected by pytest (the name does not start with ``test_``).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time

PIXEL_PM = 10.0


def _series(size: int, n: int, dwell_us: float, seed: int):
    from sim_instrument.quick import perovskite_engine

    eng = perovskite_engine(dwell_time_us=dwell_us, beam_current_pa=20.0,
                            drift_nm_per_s=(0.01, 0.013), line_jitter_pm=3.0, seed=seed,
                            extent_nm=2.5 * size * PIXEL_PM / 1000 + 4)
    return eng, eng.acquire_series(n, (0.0, 0.0), size * PIXEL_PM / 1000, (size, size))


def bench_size(size: int, *, frames: int, dwell_us: float, seed: int = 1) -> dict:
    from livequant.analysis.orthogonal import correct_orthogonal_pair
    from livequant.analysis.series import SeriesStack

    t0 = time.perf_counter()
    eng, acqs = _series(size, frames, dwell_us, seed)
    render_s = time.perf_counter() - t0
    acq_s = size * size * dwell_us * 1e-6
    stack = SeriesStack(line_time_s=size * dwell_us * 1e-6, dwell_s=dwell_us * 1e-6)
    add_s, avg_s, add_cpu = [], [], []
    for k, a in enumerate(acqs):
        t, c = time.perf_counter(), time.process_time()
        rec = stack.add(a.pixels, frame_id=a.frame_id, t_start_s=a.truth.meta["t_start_s"])
        dt, dc = time.perf_counter() - t, time.process_time() - c
        if k == 0:
            continue
        add_s.append(dt)
        add_cpu.append(dc)
        if not rec.accepted:
            print(f"  note: {a.frame_id} left out ({rec.reason})", file=sys.stderr)
        t = time.perf_counter()
        stack.average()
        avg_s.append(time.perf_counter() - t)
    f0, f1 = eng.acquire_orthogonal_pair((0.0, 0.0), size * PIXEL_PM / 1000, (size, size))
    t, c = time.perf_counter(), time.process_time()
    correct_orthogonal_pair(f0.pixels, f1.pixels, line_time_s=size * dwell_us * 1e-6,
                            dwell_s=dwell_us * 1e-6)
    pair_s, pair_cpu = time.perf_counter() - t, time.process_time() - c
    reg = statistics.median(add_s)
    avg = statistics.median(avg_s)
    return {
        "size": size, "dwell_us": dwell_us, "frames": frames,
        "acquisition_s": acq_s,
        "register_s_median": reg, "register_s_all": add_s,
        "register_to_acquisition": reg / acq_s,
        "average_s_median": avg, "average_to_acquisition": avg / acq_s,
        "register_plus_average_to_acquisition": (reg + avg) / acq_s,
        "register_cpu_s_median": statistics.median(add_cpu),
        "register_cpu_to_acquisition": statistics.median(add_cpu) / acq_s,
        "pair_s": pair_s, "pair_to_acquisition_of_two": pair_s / (2 * acq_s),
        "pair_cpu_s": pair_cpu,
        "simulate_s": render_s,
    }


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", type=int, nargs="+", default=[1024, 2048])
    p.add_argument("--frames", type=int, default=4, help="members per series (>= 2)")
    p.add_argument("--dwell-us", type=float, default=1.0,
                   help="dwell of the fast frames, microseconds (default 1)")
    p.add_argument("--json", action="store_true", help="one JSON object on stdout")
    a = p.parse_args(argv)
    if a.frames < 2:
        p.error("--frames must be at least 2")
    from livequant.pipeline import limit_threads

    limit_threads(os.cpu_count() or 1)
    results = []
    for size in a.sizes:
        r = bench_size(size, frames=a.frames, dwell_us=a.dwell_us)
        results.append(r)
        if not a.json:
            print(f"{size} x {size} at {a.dwell_us:g} us: acquisition {r['acquisition_s']:.2f} s; "
                  f"registration {r['register_s_median']:.2f} s per frame "
                  f"({r['register_to_acquisition']:.2f} x the acquisition; CPU "
                  f"{r['register_cpu_s_median']:.2f} s = {r['register_cpu_to_acquisition']:.2f} x), "
                  "average "
                  f"{r['average_s_median']:.2f} s ({r['average_to_acquisition']:.2f} x); "
                  f"orthogonal pair {r['pair_s']:.2f} s ({r['pair_to_acquisition_of_two']:.2f} x "
                  "its two frames)")
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else None
    if a.json:
        print(json.dumps({"results": results, "load_average_1min": load}, indent=1))
    else:
        print(f"load average {load:.2f}" if load is not None else "", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
