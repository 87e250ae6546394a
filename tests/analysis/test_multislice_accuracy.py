"""Accuracy on physics-based frames nobody on the project drew.

The frames are multislice simulations (abTEM: Madsen & Susi, Open Research
Europe 1, 24 (2021); method: Kirkland, *Advanced Computing in Electron
Microscopy*, 2nd ed., Springer 2010) made by ``tests/data/multislice/make_frames.py``
with frozen phonons; the truth is the atom positions put in (see the README
there).  Noise is added here with fixed seeds at about 1,250 electrons per pixel
(the dose the project's targets name, DESIGN.md "Targets").

What each check is held to:

* SrTiO3 lattice parameter: 390.53 pm (CHECK-VALUES section 1, IUCr sh5025), the
  value the frame was built with; target within 0.1 pm.
* PbTiO3 180 degree domains: the imposed +/-30 pm B-column shift along c
  (tests/data/multislice/README.md); target: domain means within 0.2 pm,
  per-cell scatter at most 1.5 pm at 1,250 e/px (DESIGN.md "Targets"), and
  sigmas that match the cell-to-cell scatter (pulls).
* BaTiO3: B shift +10 pm along c; the polarization must point along the B
  shift (CHECK-VALUES section 3 sign check: parallel in BaTiO3, antiparallel
  in PbTiO3).
* ABF octahedral rotation: 4.0 deg imposed, a0a0c+ (in-phase along the beam):
  per-cell |tilt| within 0.3 deg, the checkerboard sign right in at least
  95 % of cells; the a0a0c- frame has no net projected rotation (CHECK-VALUES
  section 12, projection caveat).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

from livequant.config import load_settings
from livequant.frames import FrameMeta, frame_from_array
from livequant.pipeline import analyze_frame
from tests.helpers_multislice import load_frame, noisy

DOSE_E_PER_PX = 1250.0


def _analyse(image, meta, material, **overrides):
    settings = load_settings(overrides={"analysis.material": material, **overrides})
    frame = frame_from_array(image, FrameMeta(frame_id=meta["name"],
                                              pixel_size_pm=meta["pixel_size_pm"],
                                              detector=meta["detector"]))
    return analyze_frame(frame, settings)


def _counts(image):
    """The noiseless frame in counts at the test dose (no noise)."""
    return image * (DOSE_E_PER_PX / image.mean())


def _cells_on_truth(result, truth, px, *, shift_key):
    """Each cell matched to the B column of the truth whose cage centre it is."""
    b = [t for t in truth if t["site"] == "B"]
    # the cell centre is the B position minus its imposed shift (the A-cage centre)
    centre = np.array([[t["x_px"] * px - t.get("imposed_dx_pm", 0.0),
                        t["y_px"] * px - t.get(shift_key, 0.0)] for t in b])
    c = result.cells
    d, k = cKDTree(centre).query(np.stack([c.x_pm, c.y_pm], axis=1))
    return [b[q] for q in k], d


def _pto_domain_errors(result, truth, px):
    rows, d = _cells_on_truth(result, truth, px, shift_key="imposed_dy_pm")
    dy = np.asarray(result.cells.dy_pm)
    sig = np.asarray(result.cells.sigma_dy_pm)
    imposed = np.array([t["imposed_dy_pm"] for t in rows])
    i_mod = np.array([t["i"] for t in rows]) % 12
    # domain interiors: at least one cell from either wall (README of the frames)
    interior = np.isin(i_mod, [1, 2, 3, 4, 7, 8, 9, 10]) & (d < 60) & np.isfinite(dy)
    out = {}
    for sign in (1, -1):
        sel = interior & (np.sign(imposed) == sign)
        out[sign] = (dy[sel] - imposed[sel], sig[sel])
    return out


@pytest.fixture(scope="module")
def pto():
    return load_frame("pto_domains_haadf")


# Measured on this frame (exact multislice), analysis defaults: domain means +0.01 and
# +0.07 pm off noiseless, +0.00..+0.14 pm at 1,250 e/px (3 seeds); with the flat
# background of earlier versions (analysis.refine.background = "flat") +0.74 / -0.70 pm:
# the light Ti-O column read the slope its heavy Pb neighbours put across its window as
# a shift toward the nearer pair.  The tilted background's window (3 sigma of the
# column) matters: with free slopes 2.5 sigma read +0.18 / -0.01, 3.5 sigma -0.30 /
# +0.36 (noiseless).  The independent BaTiO3 frame (below) was checked the same way.


def test_pbtio3_domain_means_noiseless(pto):
    image, meta, truth = pto
    res = _analyse(_counts(image), meta, "PbTiO3")
    for sign, (err, _) in _pto_domain_errors(res, truth, meta["pixel_size_pm"]).items():
        assert len(err) >= 30
        assert abs(err.mean()) < 0.2, f"domain {sign:+d}: mean error {err.mean():+.3f} pm"


def _pto_noisy_runs(pto, n_seeds=3):
    image, meta, truth = pto
    errors = {1: [], -1: []}
    pulls = []
    for seed in range(n_seeds):
        res = _analyse(noisy(image, DOSE_E_PER_PX, seed), meta, "PbTiO3")
        for sign, (err, sig) in _pto_domain_errors(res, truth, meta["pixel_size_pm"]).items():
            errors[sign].append(err)
            pulls.append((err - err.mean()) / sig)
    return errors, pulls


@pytest.fixture(scope="module")
def pto_noisy(pto):
    return _pto_noisy_runs(pto)


def test_pbtio3_domain_means_at_1250_e_per_px(pto_noisy):
    errors, _ = pto_noisy
    for sign, errs in errors.items():
        means = np.array([e.mean() for e in errs])
        assert abs(means.mean()) < 0.2, f"domain {sign:+d}: mean error {means.mean():+.3f} pm"


def test_pbtio3_per_cell_scatter_at_1250_e_per_px(pto_noisy):
    errors, pulls = pto_noisy
    for sign, errs in errors.items():
        scatter = np.array([e.std() for e in errs])
        # DESIGN target: at most 1.5 pm per cell at about 1,250 e/px
        assert scatter.max() <= 1.5, f"domain {sign:+d}: per-cell scatter {scatter.max():.2f} pm"
    # the sigmas are never optimistic (a pull wider than 1.4 would be)
    assert np.concatenate(pulls).std() < 1.4


def test_pbtio3_sigmas_are_honest_at_1250_e_per_px(pto_noisy):
    """Measured: pull std 0.96 (with the flat background 0.48: the model's mismatch
    raised the frame's median reduced chi-square, which scales every sigma)."""
    _, pulls = pto_noisy
    # honest uncertainty: the cell-to-cell scatter about the domain mean agrees
    # with the propagated sigma (the frame's own fixed pattern, repeated by its
    # tiling, is part of what the pull sees, so a band is asked)
    assert 0.75 < np.concatenate(pulls).std() < 1.3


def test_summary_says_whether_the_background_tilts(pto):
    """summary.json carries the tilted refit's slope statistic per sublattice:
    on the multislice PbTiO3 frame the Pb tails tilt the Ti-O columns'
    background (measured: slope_chi2 about 20 at this dose), on a frame drawn
    as Gaussians on a flat background it is the noise's 2 (measured 1.8-2.0)."""
    from livequant.synthetic import perovskite_frame

    image, meta, _ = pto
    real = _analyse(noisy(image, DOSE_E_PER_PX, 0), meta, "PbTiO3").summary()
    tilt = real["tilted_background"]["B"]
    assert tilt["slope_chi2"] > 8 and tilt["refitted"] >= 0.9 * tilt["of"]
    assert "A" not in real["tilted_background"]          # the brightest keeps its fit
    f = perovskite_frame((256, 256), pixel_size_pm=meta["pixel_size_pm"], sigma_pm=45,
                         peak_a=60, peak_b=20, background=10, seed=3)
    flat = _analyse(f.pixels, {**meta, "detector": "HAADF", "name": "gauss"},
                    "PbTiO3").summary()
    assert 1.0 < flat["tilted_background"]["B"]["slope_chi2"] < 3.5


def test_srtio3_lattice_parameter():
    image, meta, _ = load_frame("sto_haadf")
    for img in (_counts(image), noisy(image, DOSE_E_PER_PX, 3)):
        res = _analyse(img, meta, "SrTiO3")
        lat = res.lattice_summary()
        assert lat["a_pm"] == pytest.approx(390.53, abs=0.1)
        assert lat["b_pm"] == pytest.approx(390.53, abs=0.1)
        assert lat["angle_deg"] == pytest.approx(90.0, abs=0.05)


def test_barium_titanate_polarization_follows_the_b_shift():
    image, meta, truth = load_frame("bto_haadf")
    res = _analyse(noisy(image, DOSE_E_PER_PX, 5), meta, "BaTiO3")
    c = res.cells
    dy = np.nanmedian(c.dy_pm)
    # +10 pm imposed along +y (rows); sign and size (the phonon configurations of
    # this frame leave a fixed per-column pattern of about a picometre)
    assert 7.0 < dy < 12.0
    # the mean over the frame averages that pattern out: measured 10.06 pm here
    # (10.02 noiseless); the flat background read 10.22 (the heavy Ba neighbours'
    # slope, as in PbTiO3)
    assert np.nanmean(c.dy_pm) == pytest.approx(10.0, abs=0.15)
    # CHECK-VALUES section 3: in BaTiO3 P is parallel to the B shift against the A cage
    assert np.nanmedian(c.pol_y_C_per_m2) > 0
    lat = res.lattice_summary()
    assert sorted([lat["a_pm"], lat["b_pm"]]) == pytest.approx([399.98, 401.80], abs=0.15)


def _tilts(name, image):
    _, meta, truth = load_frame(name)
    res = _analyse(image, meta, "SrTiO3")
    px = meta["pixel_size_pm"]
    b = [t for t in truth if t["site"] == "B"]
    centre = np.array([[t["x_px"] * px, t["y_px"] * px] for t in b])
    c = res.cells
    d, k = cKDTree(centre).query(np.stack([c.x_pm, c.y_pm], axis=1))
    tilt = np.asarray(c.tilt_deg)
    ok = np.isfinite(tilt) & (d < 60)
    imposed = np.array([b[q].get("imposed_angle_deg", 0.0) for q in k])
    return tilt[ok], imposed[ok]


@pytest.mark.parametrize("noise_seed", [None, 7])
def test_abf_in_phase_rotation_checkerboard(noise_seed):
    image, _, _ = load_frame("abf_rotation")
    img = _counts(image) if noise_seed is None else noisy(image, DOSE_E_PER_PX, noise_seed)
    tilt, imposed = _tilts("abf_rotation", img)
    assert len(tilt) >= 60
    assert np.all(np.abs(imposed) == pytest.approx(4.0))
    assert abs(np.median(np.abs(tilt)) - 4.0) < 0.3
    assert np.mean(np.sign(tilt) == np.sign(imposed)) >= 0.95


def test_abf_antiphase_rotation_has_no_projected_tilt():
    image, _, _ = load_frame("abf_rotation_antiphase")
    tilt, _ = _tilts("abf_rotation_antiphase", noisy(image, DOSE_E_PER_PX, 11))
    assert len(tilt) >= 60
    assert abs(np.mean(tilt)) < 0.3
    assert np.median(np.abs(tilt)) < 0.6
