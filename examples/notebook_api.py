"""livequant from Python: analyse one image, then read a whole session's tables.

Run:  python examples/notebook_api.py [SESSION_DIR]

The image is a synthetic SrTiO3 [001] HAADF frame (a = 390.53 pm) with shot noise,
rotated by 12 degrees on a 9.37 pm pixel grid, so the answer is known.
"""

import sys

import numpy as np

import livequant
from livequant.synthetic import perovskite_frame

ex = perovskite_frame(shape=(256, 256), a_pm=390.53, pixel_size_pm=9.37, rotation_deg=12.0,
                      sigma_pm=42.0, peak_a=300.0, peak_b=120.0, background=30.0, seed=7)
res = livequant.analyze(ex.pixels, pixel_size_pm=9.37, detector="HAADF", material="SrTiO3")

lat = res.lattice
print(f"a = {lat['a_pm']:.2f} +- {lat['sigma_a_pm']:.2f} pm (SrTiO3: 390.53 pm), "
      f"b = {lat['b_pm']:.2f} pm, angle {lat['angle_deg']:.2f} deg")
cols = res.columns                      # a pandas DataFrame, or a numpy record array
b_sites = cols[np.asarray(cols["sublattice"]) == "B"]
print(f"{len(cols)} columns, {len(b_sites)} on the B sublattice; median position sigma "
      f"{np.median(np.asarray(cols['sigma_x_pm'])):.2f} pm")
cells = res.cells
print(f"{len(cells)} unit cells; mean B-site displacement "
      f"({np.nanmean(np.asarray(cells['dx_pm'])):+.2f}, "
      f"{np.nanmean(np.asarray(cells['dy_pm'])):+.2f}) pm (truth: 0, 0)")

if len(sys.argv) > 1:                   # a session from `livequant run` or `reprocess`
    session = livequant.open_session(sys.argv[1])
    print(f"session {session.path}: {len(session.frames)} frames, {len(session.cells)} cells, "
          f"{len(session.columns)} columns, {len(session.flags)} flags")
