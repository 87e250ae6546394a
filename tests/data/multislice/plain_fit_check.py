"""Plain single-Gaussian fits on the multislice frames: the figures quoted in README.md.

Not a test and not livequant: an independent look at the images (scipy curve_fit, one
round Gaussian plus constant per column in a circular window around the truth).

    PYTHONPATH=. python tests/data/multislice/plain_fit_check.py
"""
import sys
from pathlib import Path

import numpy as np
from scipy.optimize import curve_fit

sys.path.insert(0, str(Path(__file__).resolve().parents[3]))
from tests.helpers_multislice import load_frame  # noqa: E402


def _g2(xy, x0, y0, s, a, b):
    x, y = xy
    return b + a * np.exp(-((x - x0) ** 2 + (y - y0) ** 2) / (2 * s * s))


def fit(img, x, y, r):
    c0, r0 = int(round(x)), int(round(y))
    yy, xx = np.mgrid[r0 - r : r0 + r + 1, c0 - r : c0 + r + 1]
    m = (xx - x) ** 2 + (yy - y) ** 2 <= r * r
    z = img[yy[m], xx[m]]
    po, _ = curve_fit(_g2, (xx[m], yy[m]), z, p0=[x, y, 2.0, z.max() - z.min(), z.min()])
    return po[:2]


def b_shift(name, r=4):
    """Mean B shift along y relative to the four surrounding A columns, per domain."""
    im, meta, truth = load_frame(name)
    p = meta["pixel_size_pm"]
    amap = {(t["i"], t["j"]): t for t in truth if t["site"] == "A"}
    out = {}
    for t in truth:
        if t["site"] != "B" or min(t["x_px"], t["y_px"]) < 12 or max(t["x_px"], t["y_px"]) > 243:
            continue
        corners = [(t["i"] + di, t["j"] + dj) for di in (0, 1) for dj in (0, 1)]
        if not all(c in amap for c in corners):
            continue
        by = fit(im, t["x_px"], t["y_px"], r)[1]
        ay = np.mean([fit(im, amap[c]["x_px"], amap[c]["y_px"], r)[1] for c in corners])
        out.setdefault(t.get("domain", 0), []).append((by - ay) * p)
    for dom, v in sorted(out.items()):
        print(f"{name} domain {dom:+d}: B shift {np.mean(v):+.2f} pm (per-cell sd {np.std(v):.2f}, n={len(v)})")


def tilt(name, r=3):
    """B->O angle (right-hand O of each cell) from fits to the inverted ABF image."""
    im, meta, truth = load_frame(name)
    inv = im.max() - im
    omap = {(t["i"], t["j"], t["o_kind"]): t for t in truth if t["site"] == "O"}
    res = {1: [], -1: []}
    for t in truth:
        if t["site"] != "B" or not (6 < t["x_px"] < 249 and 6 < t["y_px"] < 249):
            continue
        o = omap.get((t["i"] + 1, t["j"], "Oy"))
        if o is None or not (6 < o["x_px"] < 249):
            continue
        b = fit(inv, t["x_px"], t["y_px"], r)
        of = fit(inv, o["x_px"], o["y_px"], r)
        res[t["rotation_sign"]].append(np.degrees(np.arctan2(of[1] - b[1], of[0] - b[0])))
    for s, v in res.items():
        print(f"{name} sign {s:+d}: angle {np.mean(v):+.3f} deg (sd {np.std(v):.3f}, n={len(v)})")


if __name__ == "__main__":
    b_shift("pto_domains_haadf")
    b_shift("bto_haadf")
    tilt("abf_rotation")
    tilt("abf_rotation_antiphase")
