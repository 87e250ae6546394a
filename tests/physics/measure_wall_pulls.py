"""Pulls of the wall fit on rendered simulator frames (full pipeline): width and P0.

Truth: scenario ``moving-wall`` (half-width 0.5 nm, B-site displacement 17.0 pm in the
domains; no drift).  Usage: ``PYTHONPATH=. python tests/physics/measure_wall_pulls.py N``.
Measured (N = 40): width pull mean 0.25, std 1.05, 95 % inside 2 sigma; P0 pull mean 3.34,
std 0.94 (P0 reads ~0.4 pm high: a systematic of the column fits, not in sigma_p0).
"""
import numpy as np, sys
from sim_instrument.specimen import Specimen
from sim_instrument.engine import ScanEngine, DriftModel
from livequant.config import load_settings
from livequant.frames import Sidecar, frame_from_array, resolve_meta
from livequant.pipeline import analyze_frame
st = load_settings(overrides={"analysis.material": "PbTiO3", "analysis.physics.enabled": False})
spec = Specimen.from_scenario("moving-wall")
pw, pp = [], []
N = int(sys.argv[1])
for k in range(N):
    eng = ScanEngine(spec, seed=100 + k, drift=DriftModel.none())
    acq = eng.acquire((0.0, 0.0), 9.2, (768, 768))
    meta = resolve_meta(Sidecar.parse(acq.sidecar, where="sim"), default_id="sim", where="sim")
    w = analyze_frame(frame_from_array(acq.pixels, meta), st).summary()["cells"]["wall"]
    if w is None: print("none"); continue
    pw.append((w["width"] - 500.0) / w["sigma_width"]); pp.append((w["p0"] - 17.0) / w["sigma_p0"])
pw, pp = np.array(pw), np.array(pp)
print("n", len(pw), "width pull mean %.2f std %.2f in2s %.2f" % (pw.mean(), pw.std(), np.mean(abs(pw) < 2)))
print("p0 pull mean %.2f std %.2f in2s %.2f" % (pp.mean(), pp.std(), np.mean(abs(pp) < 2)))
