"""Local lattice parameter a beside a 180-degree wall, on a scored session's frames.

    PYTHONPATH=. python tests/measure_near_wall_a.py SESSION

SESSION is a session made by ``tests/score_decisions.py`` on the ``demo`` scenario (it keeps
the acquired frames and their truth).  The true in-plane a is uniform (390.53 pm, the SrTiO3
reference grid).  For the survey frames that cross the wall at x = -40 nm it prints the
median of ``a_pm`` (and ``b_pm``) in one-cell bins of signed distance from the true wall
line, against the median far from it; for every revisit frame, its scan rotation and the
median ``a_pm`` over the frame.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np


def _wall_distance_cells(res, truth):
    w = [w for w in truth.meta["walls"] if w["crosses_frame"]][0]
    p0 = np.array(w["point_px"][::-1])
    d = np.array(w["direction_image_xy"])
    px = res.pixel_size_pm
    xy = np.column_stack([res.cells.x_pm, res.cells.y_pm]) / px - p0
    return (xy[:, 0] * d[1] - xy[:, 1] * d[0]) * px / 390.53


def main(argv=None) -> int:
    from livequant.config import load_settings
    from livequant.frames import read_frame
    from livequant.pipeline import analyze_frame
    from sim_instrument.engine import FrameTruth

    session = Path((argv or sys.argv[1:])[0])
    s = load_settings(None, overrides={"analysis.material": "PbTiO3"})
    D, A, B = [], [], []
    for path in sorted((session / "acquired").glob("*.npy")):
        fid = path.stem
        truth = FrameTruth.load(session / "truth" / fid)
        walls = [w for w in truth.meta["walls"] if w["crosses_frame"]]
        res = analyze_frame(read_frame(path), s)
        if res.cells is None:
            continue
        a = np.asarray(res.cells.values["a_pm"])
        if truth.meta["sidecar"].get("request_id"):
            print(f"revisit {fid}: scan rotation {truth.meta['scan_rotation_deg']:.1f} deg, "
                  f"{truth.meta['shape_px']} px of {res.pixel_size_pm:.2f} pm, median a_pm "
                  f"{np.nanmedian(a):.2f} (truth {np.median(truth.arrays['cell_a_pm']):.2f})")
            continue
        if not walls or truth.meta["commanded_center_nm"][1] < -40:
            continue
        D.append(_wall_distance_cells(res, truth))
        A.append(a)
        B.append(np.asarray(res.cells.values["b_pm"]))
    if not D:
        print("no survey frame crosses the wall")
        return 1
    D, A, B = map(np.concatenate, (D, A, B))
    far = np.abs(D) > 6
    a0, b0 = np.nanmedian(A[far]), np.nanmedian(B[far])
    print(f"survey frames across the wall: far from it (> 6 cells) a {a0:.2f} pm, b {b0:.2f} pm")
    for lo in np.arange(-5, 5, 1.0):
        m = (D >= lo) & (D < lo + 1)
        rms = np.sqrt(np.nanmean((A[m] - a0) ** 2))
        print(f"  {lo:+.0f} .. {lo + 1:+.0f} cells: a {np.nanmedian(A[m]) - a0:+.2f} pm, "
              f"b {np.nanmedian(B[m]) - b0:+.2f} pm, rms(a) {rms:.2f} pm, {m.sum()} cells")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
