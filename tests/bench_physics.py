"""Benchmark of the whole pipeline on the physics-like frame, alone.

The frame is ``livequant bench``'s physics-like one (the simulated
instrument's PbTiO3 with a broad probe tail, 250 e/px at 2 us dwell, 16 pm
pixels), analysed ``--runs`` times after one untimed warm-up run with the
material set (so the tilted-background refit of the B columns runs).  Prints
each run's total and refinement seconds and their medians.  Without the
curve_fit rounds that ``livequant bench`` runs first, the figures are steadier,
and two trees can be compared in one sitting, alternating::

    PYTHONPATH=/old/tree:tests python tests/bench_physics.py
    PYTHONPATH=.:tests python tests/bench_physics.py

``PYTHONPATH`` decides which ``livequant`` is timed (``tests`` for the
simulated instrument).  Not collected by pytest (the name does not start with
``test_``).
"""

from __future__ import annotations

import argparse
import os
import time


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--size", type=int, default=2048, help="frame side in pixels")
    parser.add_argument("--runs", type=int, default=5, help="timed runs after the warm-up")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)

    import numpy as np

    import livequant
    from livequant.commands.bench import _PHYSICS_PIXEL_PM, _physics_frame
    from livequant.config import load_settings
    from livequant.frames import FrameMeta, frame_from_array
    from livequant.pipeline import analyze_frame

    frame = frame_from_array(_physics_frame(args.size, args.seed, 2.0),
                             FrameMeta(frame_id="physics", pixel_size_pm=_PHYSICS_PIXEL_PM,
                                       dwell_time_us=2.0))
    settings = load_settings(overrides={"analysis.material": "PbTiO3"})
    analyze_frame(frame, settings)  # warm-up: compiled kernels, FFT plans
    runs = []
    for _ in range(args.runs):
        t0 = time.perf_counter()
        result = analyze_frame(frame, settings)
        runs.append((time.perf_counter() - t0, result.timings_s["refine"]))
    total = np.array([r[0] for r in runs])
    refine = np.array([r[1] for r in runs])
    print(f"livequant from {os.path.dirname(livequant.__file__)}")
    print(f"{args.size} x {args.size}, {len(result.columns)} columns, "
          f"tilted refit {result.columns.extra.get('tilted_background')}")
    print("runs (total / refinement s): "
          + " ".join(f"{a:.2f}/{b:.2f}" for a, b in runs))
    print(f"median {np.median(total):.2f} s (refinement {np.median(refine):.2f} s); "
          f"load average {[round(x, 2) for x in os.getloadavg()]}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
