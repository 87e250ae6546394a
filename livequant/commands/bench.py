"""``livequant bench``: can this machine keep up with my scan?

Measures, in one run on the same synthetic frames:

* columns per second of the batched refinement and of a per-column
  ``scipy.optimize.curve_fit`` reference on the same windows from the same
  starting parameters with the analytic Jacobian (and, for comparison, with
  its default numeric Jacobian), and their ratio, per wall-clock second and
  per CPU-second; back-to-back rounds, medians reported;
* whole-pipeline seconds for a 1024 x 1024 and a 2048 x 2048 frame (about
  10,000 columns) beside the frame's acquisition time at the given dwell, with
  the seconds of each stage (median of the rounds);
* the same for a physics-like frame: PbTiO3 from the simulated instrument,
  its probe with a broad tail (heavy columns reaching into their neighbours),
  shot noise at the given dwell and 20 pA, about 13,000 columns at 2048 x 2048
  -- harder than the Gaussian frames (weak B columns, refits);
* peak memory of the pipeline (numpy allocations, via tracemalloc, in a
  separate untimed run) as a multiple of the frame's own size.

Figures are ratios against references measured in the same run, so they
compare across machines; absolute seconds are printed for the record.
"""

from __future__ import annotations

import json
import os
import sys
import time
import tracemalloc
import warnings

from livequant.cli import EXIT_BAD_INPUT, EXIT_OK

__all__ = ["register", "run_benchmarks"]

# SrTiO3 (a = 390.53 pm) at 13.5 pm pixels: 2048 x 2048 holds ~5000 cells = ~10,000 columns.
_PIXEL_PM = 13.5


def register(sub) -> None:
    p = sub.add_parser("bench", help="measure whether this machine keeps up with a scan",
                       description=_plain(__doc__.split("\n\n")[0]))
    p.add_argument("--dwell-us", type=float, default=2.0,
                   help="per-pixel dwell time of your scan, microseconds (default 2)")
    p.add_argument("--reference-columns", type=int, default=300,
                   help="columns fitted one by one with curve_fit for the reference (default 300)")
    p.add_argument("--quick", action="store_true", help="skip the 2048 x 2048 frame")
    p.add_argument("--rounds", type=int, default=5,
                   help="back-to-back rounds of each measurement; medians are reported "
                        "(default 5)")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
    p.set_defaults(func=run)


# PbTiO3 at 16 pm pixels: 2048 x 2048 holds ~6500 cells = ~13,000 cation columns.
_PHYSICS_PIXEL_PM = 16.0


def _physics_frame(size, seed, dwell_us):
    """Pixels of a simulated PbTiO3 frame with probe tails and shot noise."""
    from sim_instrument import perovskite_frame

    acq = perovskite_frame("PbTiO3", (size, size), pixel_size_pm=_PHYSICS_PIXEL_PM,
                           dwell_time_us=dwell_us, beam_current_pa=20.0,
                           b_displacement_pm=(0.0, 17.0), probe_tail_fraction=0.1,
                           probe_tail_sigma_pm=150.0, seed=seed)
    return acq.pixels


def _plain(text: str) -> str:
    """Docstring text for --help: without the reST markup (``code``)."""
    return text.replace("``", "")


def _frame(size, seed):
    from livequant.synthetic import perovskite_frame

    return perovskite_frame((size, size), pixel_size_pm=_PIXEL_PM, rotation_deg=7.0,
                            sigma_pm=40.0, peak_a=300.0, peak_b=120.0, background=30.0,
                            seed=seed)


def _curve_fit_reference(image, positions, spacing_px, n_columns, *, analytic_jacobian=True):
    """Fit each column alone with curve_fit: same windows, same model, same
    starting parameters as the batched fit, Poisson weights (from the data).

    With `analytic_jacobian` curve_fit gets the model's derivatives, as the
    batched fit has them; without, it differentiates numerically (7 extra model
    evaluations per iteration), which is how it is most often called.
    """
    import numpy as np
    from scipy.optimize import OptimizeWarning, curve_fit

    from livequant.analysis.refine import extract_windows, starting_parameters

    pos = positions[:n_columns]
    win = extract_windows(image, pos, 0.3 * spacing_px)
    theta0 = starting_parameters(image, pos, spacing_px=spacing_px, window_fraction=0.3)

    def model(rc, r0, c0, A, B, p, q, s):
        dr, dc = rc[0] - r0, rc[1] - c0
        return B + A * np.exp(-0.5 * (p * dr * dr + 2 * q * dr * dc + s * dc * dc))

    def jacobian(rc, r0, c0, A, B, p, q, s):
        dr, dc = rc[0] - r0, rc[1] - c0
        G = np.exp(-0.5 * (p * dr * dr + 2 * q * dr * dc + s * dc * dc))
        AG = A * G
        return np.stack([AG * (p * dr + q * dc), AG * (q * dr + s * dc), G, np.ones_like(G),
                         -0.5 * AG * dr * dr, -AG * dr * dc, -0.5 * AG * dc * dc], axis=1)

    extra = {"jac": jacobian} if analytic_jacobian else {}
    t0, c0 = time.perf_counter(), time.process_time()
    ok = 0
    for k in range(n_columns):  # the per-column loop *is* the reference being measured
        v = win.valid[k]
        d = win.data[k, v]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            try:
                curve_fit(model, np.stack([win.rows[k, v], win.cols[k, v]]), d, p0=theta0[k],
                          sigma=np.sqrt(np.maximum(d, 1.0)), absolute_sigma=True, maxfev=2000,
                          **extra)
                ok += 1
            except RuntimeError:
                pass  # counted: `ok` reports how many the reference fitted
    return n_columns / (time.perf_counter() - t0), ok, n_columns / (time.process_time() - c0)


def _batched(image, positions, spacing_px, *, joint):
    from livequant.analysis.refine import refine_columns

    t0, c0 = time.perf_counter(), time.process_time()
    cols = refine_columns(image, positions, spacing_px=spacing_px, joint_neighbours=joint)
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    return len(positions) / dt, int(cols.converged.sum()), len(positions) / cpu


def _load() -> list:
    try:
        return [round(x, 2) for x in os.getloadavg()]
    except OSError:  # not available on this platform
        return []


def _pipeline(size, seed, dwell_us, repeats, *, physics=False):
    import numpy as np

    from livequant.config import load_settings
    from livequant.frames import FrameMeta, frame_from_array
    from livequant.pipeline import analyze_frame

    if physics:
        pixels, px = _physics_frame(size, seed, dwell_us), _PHYSICS_PIXEL_PM
        settings = load_settings(overrides={"analysis.material": "PbTiO3"})
    else:
        pixels, px = _frame(size, seed).pixels, _PIXEL_PM
        settings = load_settings()
    frame = frame_from_array(pixels, FrameMeta(frame_id=f"bench-{size}", pixel_size_pm=px,
                                               dwell_time_us=dwell_us))
    analyze_frame(frame, settings)  # warm-up: imports, compiled kernels, FFT plans
    runs = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        result = analyze_frame(frame, settings)
        runs.append((time.perf_counter() - t0, result.timings_s))
    runs.sort(key=lambda r: r[0])
    seconds, stages = runs[len(runs) // 2]  # the median run, with its own stage split
    # memory in a separate run: tracemalloc slows allocation, so it is not timed
    tracemalloc.start()
    result = analyze_frame(frame, settings)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    frame_bytes = pixels.astype(np.float64).nbytes
    acquisition_s = size * size * dwell_us * 1e-6   # T = Ny Nx t_px (flyback not included)
    return {
        "frame": "physics-like PbTiO3 (simulated instrument, probe tails, shot noise)"
                 if physics else "Gaussian SrTiO3",
        "shape": [size, size],
        "n_columns": len(result.columns) if result.columns is not None else 0,
        "seconds": seconds,
        "seconds_all_runs": [r[0] for r in runs],
        "acquisition_s": acquisition_s,
        "fraction_of_acquisition": seconds / acquisition_s,
        "stage_seconds": {k: float(v) for k, v in stages.items()},
        "peak_memory_mb": peak / 2**20,
        "peak_memory_frames": peak / frame_bytes,
        "load_average": _load(),
    }


def _threads() -> int:
    import numba

    return int(numba.get_num_threads())


def run_benchmarks(*, dwell_us=2.0, reference_columns=300, quick=False, rounds=5) -> dict:
    """Refinement against curve_fit in `rounds` back-to-back rounds (the ratio of
    each round is measured under the same load; the median is reported), then
    the pipeline on 1024 and 2048 frames (median of `rounds` runs)."""
    import numpy as np  # here, not at the top: `livequant --help` must start fast

    size = 1024 if quick else 2048
    f = _frame(size, seed=1)
    spacing = 390.53 / _PIXEL_PM
    # start from the truth (jittered) so both fitters solve the same problem
    start = f.positions_px + np.random.default_rng(0).normal(0, 0.3, f.positions_px.shape)
    inside = ((start > 6) & (start < size - 7)).all(axis=1)
    start = start[inside]
    n_ref = min(reference_columns, len(start))
    load_before = _load()
    # warm-up: loads (or, on the first run ever, compiles) the fit kernels
    _batched(f.pixels, start[:64], spacing, joint=True)
    _curve_fit_reference(f.pixels, start, spacing, min(n_ref, 10))  # imports
    rows = []
    for _ in range(rounds):
        ref_rate, ref_ok, ref_cpu = _curve_fit_reference(f.pixels, start, spacing, n_ref)
        num_rate, _, _ = _curve_fit_reference(f.pixels, start, spacing, n_ref,
                                              analytic_jacobian=False)
        batch_rate, batch_ok, batch_cpu = _batched(f.pixels, start, spacing, joint=False)
        joint_rate, _, _ = _batched(f.pixels, start, spacing, joint=True)
        rows.append({"curve_fit": ref_rate, "curve_fit_numeric": num_rate, "batched": batch_rate,
                     "joint": joint_rate, "ref_ok": ref_ok, "batch_ok": batch_ok,
                     "curve_fit_cpu": ref_cpu, "batched_cpu": batch_cpu})

    def med(key, over=None):
        vals = [r[key] / (r[over] if over else 1.0) for r in rows]
        return float(np.median(vals))

    out = {
        "refinement": {
            "frame_shape": [size, size],
            "threads": _threads(),
            "columns": len(start),
            "rounds": rounds,
            "batched_columns_per_s": med("batched"),
            "batched_with_neighbour_passes_columns_per_s": med("joint"),
            "curve_fit_columns_per_s": med("curve_fit"),
            "curve_fit_numeric_jacobian_columns_per_s": med("curve_fit_numeric"),
            "ratio": med("batched", "curve_fit"),
            "ratio_with_neighbour_passes": med("joint", "curve_fit"),
            "ratio_vs_numeric_jacobian": med("batched", "curve_fit_numeric"),
            "ratio_per_round": [r["batched"] / r["curve_fit"] for r in rows],
            # per core: columns per CPU-second (all threads counted).  Other
            # processes taking a core halve the wall-clock ratio of a 2-thread
            # fit against a 1-thread reference but leave this one alone.
            "ratio_cpu_time": med("batched_cpu", "curve_fit_cpu"),
            "curve_fit_fitted": rows[-1]["ref_ok"],
            "curve_fit_columns": n_ref,
            "batched_converged": rows[-1]["batch_ok"],
            "load_average": [load_before, _load()],
        },
        "pipeline": [_pipeline(1024, 2, dwell_us, rounds)],
        "dwell_us": dwell_us,
    }
    if not quick:
        out["pipeline"].append(_pipeline(2048, 3, dwell_us, rounds))
    out["pipeline"].append(_pipeline(size, 4, dwell_us, rounds, physics=True))
    return out


def run(args) -> int:
    if args.rounds < 1:
        print(f"livequant bench: --rounds must be at least 1, got {args.rounds}", file=sys.stderr)
        return EXIT_BAD_INPUT
    res = run_benchmarks(dwell_us=args.dwell_us, reference_columns=args.reference_columns,
                         quick=args.quick, rounds=args.rounds)
    r = res["refinement"]
    lines = [
        f"refinement ({r['columns']} columns, {r['frame_shape'][0]} x {r['frame_shape'][1]}, "
        f"{r['threads']} threads):",
        f"  batched            {r['batched_columns_per_s']:10.0f} columns/s",
        f"  + neighbour passes {r['batched_with_neighbour_passes_columns_per_s']:10.0f} columns/s",
        f"  curve_fit, one by one, same windows and start, analytic Jacobian "
        f"{r['curve_fit_columns_per_s']:.0f} columns/s",
        f"  (numeric Jacobian {r['curve_fit_numeric_jacobian_columns_per_s']:.0f} columns/s)",
        f"  ratio {r['ratio']:.0f}x (with neighbour passes {r['ratio_with_neighbour_passes']:.0f}x;"
        f" vs numeric Jacobian {r['ratio_vs_numeric_jacobian']:.0f}x)   target >= 50x",
        f"  per CPU-second (all threads counted) {r['ratio_cpu_time']:.0f}x",
        f"  medians of {r['rounds']} rounds; per round "
        + " ".join(f"{x:.0f}x" for x in r["ratio_per_round"])
        + f"; load average {r['load_average'][0]} -> {r['load_average'][1]}",
    ]
    for p in res["pipeline"]:
        verdict = "keeps up" if p["seconds"] < p["acquisition_s"] else "FALLS BEHIND"
        lines.append(f"pipeline, {p['frame']}, {p['shape'][0]} x {p['shape'][1]}, "
                     f"{p['n_columns']} columns: "
                     f"{p['seconds']:.2f} s vs {p['acquisition_s']:.2f} s acquisition at "
                     f"{res['dwell_us']:g} us dwell ({100 * p['fraction_of_acquisition']:.0f} %, "
                     f"{verdict}); peak memory {p['peak_memory_mb']:.0f} MB = "
                     f"{p['peak_memory_frames']:.1f} frames; load average {p['load_average']}")
        lines.append("  " + " ".join(f"{k}={v:.3f}" for k, v in p["stage_seconds"].items()))
    print("\n".join(lines), file=sys.stderr)
    if args.json:
        json.dump(res, sys.stdout, indent=1)
        sys.stdout.write("\n")
    return EXIT_OK
