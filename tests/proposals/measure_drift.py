"""Drift-estimation accuracy against the simulator's truth (a measurement, not a test).

    PYTHONPATH=. python tests/proposals/measure_drift.py [--seeds 6] [--json]

For each seed: the demo specimen, drift at a random velocity up to 0.03 nm/s per
axis plus a 0.002 nm/sqrt(s) random walk, six overlapping 384 x 384 frames over 12 nm
(31 pm pixels), 2 s apart, each moved (2, 1) nm, scan rotation alternating 0 / 10 deg.
Reports the error of each pair measurement and of each frame's chained drift position
against the truth (line-averaged drift of the simulator), the ratio of the error to
the reported sigma, and the fitted velocity's error.
"""

from __future__ import annotations

import argparse
import json
import sys

import numpy as np

from livequant.proposals.drift import DriftModel, DriftTracker
from sim_instrument import ScanEngine, Specimen
from sim_instrument.engine import DriftModel as SimDrift
from tests.proposals._sim import drift_image, truth_drift_nm


def measure(seeds: int) -> dict:
    spec = Specimen.from_scenario("demo")
    pair_err, pair_z, chain_err, v_err, n_amb, n_pairs = [], [], [], [], 0, 0
    for seed in range(seeds):
        rng = np.random.default_rng(100 + seed)
        v = rng.uniform(-0.03, 0.03, 2)
        rot = 10.0 * (seed % 2)
        eng = ScanEngine(spec, seed=seed, drift=SimDrift(v, 0.002, seed=seed + 50))
        tracker = DriftTracker(DriftModel())
        truths = {}
        first = None
        for k in range(6):
            acq = eng.acquire((2.0 * k - 20, 20 + 1.0 * k), 12.0, (384, 384),
                              scan_rotation_deg=rot)
            eng.wait(2.0)
            im = drift_image(acq)
            truths[im.frame_id] = truth_drift_nm(acq)
            first = first or im.frame_id
            r = tracker.observe(im)
            if r is None:
                continue
            n_pairs += 1
            n_amb += r.ambiguous
            t = truths[r.frame_id] - truths[r.ref_frame_id]
            pair_err.append(r.shift_nm - t)
            pair_z.append(np.abs(r.shift_nm - t) / r.sigma_nm)
            d, _ = tracker.model.position_of(im.frame_id, im.t_s)
            chain_err.append(d - (truths[im.frame_id] - truths[first]))
        vf, _ = tracker.model.velocity()
        v_err.append(vf - v)
    pe = np.abs(np.array(pair_err)) * 1000
    ce = np.abs(np.array(chain_err)) * 1000
    return {"seeds": seeds, "pairs": n_pairs, "ambiguous_pairs": n_amb,
            "pair_error_pm": {"rms": float(np.sqrt((pe ** 2).mean())), "max": float(pe.max())},
            "pair_error_over_sigma": {"median": float(np.median(pair_z)),
                                      "p90": float(np.percentile(pair_z, 90))},
            "chained_error_pm": {"rms": float(np.sqrt((ce ** 2).mean())),
                                 "max": float(ce.max())},
            "velocity_error_nm_per_s": {"max": float(np.abs(v_err).max())}}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--seeds", type=int, default=6)
    p.add_argument("--json", action="store_true")
    args = p.parse_args(argv)
    out = measure(args.seeds)
    if args.json:
        print(json.dumps(out))
    else:
        for k, v in out.items():
            print(f"{k}: {v}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
