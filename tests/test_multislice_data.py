"""Sanity checks of the multislice test frames and their coordinate convention.

Truth: the atom positions put into the multislice simulation (abTEM; Madsen & Susi,
Open Research Europe 1, 24 (2021)), stored beside each frame. The checks confirm that
every heavy column of a HAADF frame sits on an intensity maximum, and every column of an
ABF frame on an intensity minimum, within 1 px of its truth position, so x/y order, the
origin and the pixel-centre convention of the truth are right. Displaced columns
(PbTiO3 domains, BaTiO3, octahedral rotation) are also checked for the sign of their
imposed shift, which a swapped or mirrored axis would reverse.
"""

from __future__ import annotations

import numpy as np
import pytest

from tests.helpers_multislice import FRAME_NAMES, load_frame, noisy, truth_array

HAADF = ("sto_haadf", "pto_domains_haadf", "bto_haadf")
ABF = ("sto_abf", "abf_rotation", "abf_rotation_antiphase")
MARGIN_PX = 4


def _extremum(image, x_px, y_px, *, sign, radius=3):
    """Sub-pixel extremum (max for sign=+1, min for -1) near (x, y): parabola per axis."""
    img = sign * image
    r0, c0 = int(round(y_px)), int(round(x_px))
    win = img[r0 - radius : r0 + radius + 1, c0 - radius : c0 + radius + 1]
    rr, cc = np.unravel_index(np.argmax(win), win.shape)
    r, c = r0 - radius + rr, c0 - radius + cc

    def vertex(m, z, p):
        den = m - 2 * z + p
        return 0.0 if den == 0 else 0.5 * (m - p) / den

    dy = vertex(img[r - 1, c], img[r, c], img[r + 1, c])
    dx = vertex(img[r, c - 1], img[r, c], img[r, c + 1])
    return c + dx, r + dy


def _interior(truth, shape):
    h, w = shape
    return [
        t for t in truth
        if MARGIN_PX <= t["x_px"] <= w - 1 - MARGIN_PX and MARGIN_PX <= t["y_px"] <= h - 1 - MARGIN_PX
    ]


@pytest.mark.parametrize("name", FRAME_NAMES)
def test_frame_loads_with_settings(name):
    image, meta, truth = load_frame(name)
    assert image.shape == (256, 256)
    assert np.all(np.isfinite(image)) and image.min() >= 0
    for key in ("pixel_size_pm", "detector", "detector_angles_mrad", "energy_kV",
                "convergence_semiangle_mrad", "thickness_nm", "phonon_configs"):
        assert key in meta, key
    assert meta["energy_kV"] == 200.0 and meta["convergence_semiangle_mrad"] == 22.0
    assert len(truth) > 100
    sites = {t["site"] for t in truth}
    assert sites == {"A", "B", "O"}
    # The scanned period must be sampled above the probe band limit's Nyquist rate, so
    # the Fourier extension to the frame is exact: no power above 2 alpha / lambda.
    assert meta["fourier_power_above_band_limit"] < 1e-4


@pytest.mark.parametrize("name", HAADF)
def test_haadf_cation_columns_sit_on_maxima(name):
    image, meta, truth = load_frame(name)
    rows = [t for t in _interior(truth, image.shape) if t["site"] in ("A", "B")]
    found = np.array([_extremum(image, t["x_px"], t["y_px"], sign=+1) for t in rows])
    err = np.hypot(*(found - truth_array(rows)).T)
    assert err.max() < 1.0, f"{name}: worst column {err.max():.2f} px from its truth"


@pytest.mark.parametrize("name", ABF)
def test_abf_columns_sit_on_minima(name):
    image, meta, truth = load_frame(name)
    rows = _interior(truth, image.shape)
    found = np.array([_extremum(image, t["x_px"], t["y_px"], sign=-1) for t in rows])
    err = np.hypot(*(found - truth_array(rows)).T)
    assert err.max() < 1.0, f"{name}: worst column {err.max():.2f} px from its truth"


@pytest.mark.parametrize("name", ["pto_domains_haadf", "bto_haadf"])
def test_b_column_shift_has_the_imposed_sign(name):
    """B maxima lie on the side of the cell centre that the imposed shift says (+y down)."""
    image, meta, truth = load_frame(name)
    pixel_pm = meta["pixel_size_pm"]
    rows = [t for t in _interior(truth, image.shape) if t["site"] == "B"]
    for t in rows:
        x, y = _extremum(image, t["x_px"], t["y_px"], sign=+1)
        centre_y = t["y_px"] - t["imposed_dy_pm"] / pixel_pm
        measured_pm = (y - centre_y) * pixel_pm
        assert np.sign(measured_pm) == np.sign(t["imposed_dy_pm"]), (t, measured_pm)
        assert abs(measured_pm - t["imposed_dy_pm"]) < 0.5 * abs(t["imposed_dy_pm"])


def test_rotation_checkerboard_sign_in_the_image():
    """Every interior O minimum of the in-phase frame is displaced as imposed."""
    image, meta, truth = load_frame("abf_rotation")
    pixel_pm = meta["pixel_size_pm"]
    rows = [t for t in _interior(truth, image.shape) if t["site"] == "O"]
    for t in rows:
        x, y = _extremum(image, t["x_px"], t["y_px"], sign=-1)
        dx_pm, dy_pm = t["imposed_dxy_pm"]
        site_x, site_y = t["x_px"] - dx_pm / pixel_pm, t["y_px"] - dy_pm / pixel_pm
        moved = np.array([x - site_x, y - site_y]) * pixel_pm
        imposed = np.array([dx_pm, dy_pm])
        assert moved @ imposed > 0.5 * (imposed @ imposed), (t, moved)


def test_antiphase_frame_shows_no_net_rotation():
    image, meta, truth = load_frame("abf_rotation_antiphase")
    for t in truth:
        if t["site"] == "O":
            assert t["imposed_dxy_pm"] == [0.0, 0.0]
            shifts = np.array(t["layer_shifts_pm"])
            assert np.allclose(shifts.sum(axis=0), 0.0) and np.abs(shifts).max() > 10


def test_noisy_has_the_requested_mean_dose_and_is_seeded():
    image, meta, truth = load_frame("sto_haadf")
    a = noisy(image, 1250.0, seed=7)
    b = noisy(image, 1250.0, seed=7)
    assert np.array_equal(a, b)
    # Poisson: the mean of 65,536 pixels with mean 1250 has sd about 0.14 counts.
    assert abs(a.mean() - 1250.0) < 1.0
    assert np.all(a == np.round(a)) and a.min() >= 0
    with pytest.raises(ValueError, match="electrons_per_pixel_mean"):
        noisy(image, 0.0, seed=1)
