"""``livequant bench``: can this machine keep up with my scan?

Measures, in one run on the same synthetic frames:

* columns per second of the batched refinement and of a per-column
  ``scipy.optimize.curve_fit`` reference on the same windows, and their ratio;
* whole-pipeline seconds for a 1024 x 1024 and a 2048 x 2048 frame (about
  10,000 columns) beside the frame's acquisition time at the given dwell;
* peak memory of the pipeline (numpy allocations, via tracemalloc) as a
  multiple of the frame's own size.

Figures are ratios against references measured in the same run, so they
compare across machines; absolute seconds are printed for the record.
"""

from __future__ import annotations

import json
import sys
import time
import tracemalloc
import warnings

import numpy as np

from livequant.cli import EXIT_OK

__all__ = ["register", "run_benchmarks"]

# SrTiO3 (a = 390.53 pm) at 13.5 pm pixels: 2048 x 2048 holds ~5000 cells = ~10,000 columns.
_PIXEL_PM = 13.5


def register(sub) -> None:
    p = sub.add_parser("bench", help="measure whether this machine keeps up with a scan",
                       description=__doc__.split("\n\n")[0])
    p.add_argument("--dwell-us", type=float, default=2.0,
                   help="per-pixel dwell time of your scan, microseconds (default 2)")
    p.add_argument("--reference-columns", type=int, default=300,
                   help="columns fitted one by one with curve_fit for the reference (default 300)")
    p.add_argument("--quick", action="store_true", help="skip the 2048 x 2048 frame")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
    p.set_defaults(func=run)


def _frame(size, seed):
    from livequant.synthetic import perovskite_frame

    return perovskite_frame((size, size), pixel_size_pm=_PIXEL_PM, rotation_deg=7.0,
                            sigma_pm=40.0, peak_a=300.0, peak_b=120.0, background=30.0,
                            seed=seed)


def _curve_fit_reference(image, positions, spacing_px, n_columns):
    """Fit each column alone with curve_fit: same model, window and Poisson weights."""
    from scipy.optimize import OptimizeWarning, curve_fit

    from livequant.analysis.refine import extract_windows

    win = extract_windows(image, positions[:n_columns], 0.3 * spacing_px)

    def model(rc, r0, c0, A, B, p, q, s):
        dr, dc = rc[0] - r0, rc[1] - c0
        return B + A * np.exp(-0.5 * (p * dr * dr + 2 * q * dr * dc + s * dc * dc))

    t0 = time.perf_counter()
    ok = 0
    for k in range(n_columns):  # the per-column loop *is* the reference being measured
        v = win.valid[k]
        d = win.data[k, v]
        x0 = [positions[k, 0], positions[k, 1], d.max() - d.min(), d.min(), 0.2, 0.0, 0.2]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            try:
                curve_fit(model, np.stack([win.rows[k, v], win.cols[k, v]]), d, p0=x0,
                          sigma=np.sqrt(np.maximum(d, 1.0)), absolute_sigma=True, maxfev=2000)
                ok += 1
            except RuntimeError:
                pass  # counted: `ok` reports how many the reference fitted
    return n_columns / (time.perf_counter() - t0), ok


def _batched(image, positions, spacing_px, *, joint):
    from livequant.analysis.refine import refine_columns

    # warm-up: loads (or, on the first run ever, compiles) the fit kernels
    refine_columns(image, positions[:64], spacing_px=spacing_px, joint_neighbours=joint)
    t0 = time.perf_counter()
    cols = refine_columns(image, positions, spacing_px=spacing_px, joint_neighbours=joint)
    dt = time.perf_counter() - t0
    return len(positions) / dt, int(cols.converged.sum())


def _pipeline(size, seed, dwell_us):
    from livequant.frames import FrameMeta, frame_from_array
    from livequant.pipeline import analyze_frame

    f = _frame(size, seed)
    frame = frame_from_array(f.pixels, FrameMeta(frame_id=f"bench-{size}",
                                                 pixel_size_pm=_PIXEL_PM, dwell_time_us=dwell_us))
    analyze_frame(frame)  # warm-up: imports, FFT plans
    tracemalloc.start()
    t0 = time.perf_counter()
    result = analyze_frame(frame)
    seconds = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    frame_bytes = f.pixels.astype(np.float64).nbytes
    acquisition_s = size * size * dwell_us * 1e-6   # T = Ny Nx t_px (flyback not included)
    return {
        "shape": [size, size],
        "n_columns": len(result.columns) if result.columns is not None else 0,
        "seconds": seconds,
        "acquisition_s": acquisition_s,
        "fraction_of_acquisition": seconds / acquisition_s,
        "stage_seconds": result.timings_s,
        "peak_memory_mb": peak / 2**20,
        "peak_memory_frames": peak / frame_bytes,
    }


def _threads() -> int:
    import numba

    return int(numba.get_num_threads())


def run_benchmarks(*, dwell_us=2.0, reference_columns=300, quick=False) -> dict:
    size = 1024 if quick else 2048
    f = _frame(size, seed=1)
    spacing = 390.53 / _PIXEL_PM
    # start from the truth (jittered) so both fitters solve the same problem
    start = f.positions_px + np.random.default_rng(0).normal(0, 0.3, f.positions_px.shape)
    inside = ((start > 6) & (start < size - 7)).all(axis=1)
    start = start[inside]
    ref_rate, ref_ok = _curve_fit_reference(f.pixels, start, spacing, min(reference_columns,
                                                                          len(start)))
    batch_rate, batch_ok = _batched(f.pixels, start, spacing, joint=False)
    joint_rate, _ = _batched(f.pixels, start, spacing, joint=True)
    out = {
        "refinement": {
            "frame_shape": [size, size],
            "threads": _threads(),
            "columns": len(start),
            "batched_columns_per_s": batch_rate,
            "batched_with_neighbour_passes_columns_per_s": joint_rate,
            "curve_fit_columns_per_s": ref_rate,
            "ratio": batch_rate / ref_rate,
            "ratio_with_neighbour_passes": joint_rate / ref_rate,
            "curve_fit_fitted": ref_ok,
            "batched_converged": batch_ok,
        },
        "pipeline": [_pipeline(1024, 2, dwell_us)],
        "dwell_us": dwell_us,
    }
    if not quick:
        out["pipeline"].append(_pipeline(2048, 3, dwell_us))
    return out


def run(args) -> int:
    res = run_benchmarks(dwell_us=args.dwell_us, reference_columns=args.reference_columns,
                         quick=args.quick)
    r = res["refinement"]
    lines = [
        f"refinement ({r['columns']} columns, {r['frame_shape'][0]} x {r['frame_shape'][1]}, "
        f"{r['threads']} threads):",
        f"  batched            {r['batched_columns_per_s']:10.0f} columns/s",
        f"  + neighbour passes {r['batched_with_neighbour_passes_columns_per_s']:10.0f} columns/s",
        f"  curve_fit, one by one {r['curve_fit_columns_per_s']:7.0f} columns/s",
        f"  ratio {r['ratio']:.0f}x (with neighbour passes {r['ratio_with_neighbour_passes']:.0f}x)"
        f"   target >= 50x",
    ]
    for p in res["pipeline"]:
        verdict = "keeps up" if p["seconds"] < p["acquisition_s"] else "FALLS BEHIND"
        lines.append(f"pipeline {p['shape'][0]} x {p['shape'][1]}, {p['n_columns']} columns: "
                     f"{p['seconds']:.2f} s vs {p['acquisition_s']:.2f} s acquisition at "
                     f"{res['dwell_us']:g} us dwell ({100 * p['fraction_of_acquisition']:.0f} %, "
                     f"{verdict}); peak memory {p['peak_memory_mb']:.0f} MB = "
                     f"{p['peak_memory_frames']:.1f} frames")
        lines.append("  " + " ".join(f"{k}={v:.3f}" for k, v in p["stage_seconds"].items()))
    print("\n".join(lines), file=sys.stderr)
    if args.json:
        json.dump(res, sys.stdout, indent=1)
        sys.stdout.write("\n")
    return EXIT_OK
