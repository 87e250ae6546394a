"""The scan engine: columns land where the truth says, counts are Poisson, drift shows."""

import math

import numpy as np
import pytest
from skimage.registration import phase_cross_correlation

from sim_instrument import DriftModel, ScanEngine, Specimen, electrons_per_pixel
from sim_instrument.engine import FrameTruth
from sim_instrument.quick import perovskite_frame


def _centroids(image, guesses_px, sigma_px, background, iterations=30):
    """Gaussian-weighted centroids, iterated to their fixed point.

    With the weight centred on the estimate, a column whose surroundings are point
    symmetric about it (an A site of a perovskite lattice, also after an affine
    distortion) is a fixed point exactly, so the estimate is unbiased by neighbours or by
    the pixel grid -- unlike a plain centroid in a pixel-aligned box.
    """
    pos = np.asarray(guesses_px, float).copy()
    half = int(math.ceil(4 * sigma_px))
    rr, cc = np.mgrid[-half:half + 1, -half:half + 1]
    img = image - background
    for _ in range(iterations):
        base = np.rint(pos).astype(int)
        r = base[:, 0, None, None] + rr[None]
        c = base[:, 1, None, None] + cc[None]
        w = np.exp(-0.5 * ((r - pos[:, 0, None, None]) ** 2 + (c - pos[:, 1, None, None]) ** 2)
                   / sigma_px**2) * img[r, c]
        tot = w.sum(axis=(1, 2))
        pos = np.column_stack([(w * r).sum(axis=(1, 2)) / tot, (w * c).sum(axis=(1, 2)) / tot])
    return pos


def _interior(truth, shape, margin, site="A"):
    p = truth.positions_px
    sel = ((truth.sublattice == site) & (p[:, 0] > margin) & (p[:, 0] < shape[0] - 1 - margin)
           & (p[:, 1] > margin) & (p[:, 1] < shape[1] - 1 - margin))
    return sel


def test_dose_per_pixel():
    # CHECK-VALUES section 9: D = I t / e; 20 pA and 2 us give 250 e/pixel.
    assert electrons_per_pixel(20.0, 2.0) == pytest.approx(249.6, abs=0.1)


@pytest.mark.parametrize("rotation_deg, drift", [(0.0, (0.0, 0.0)), (30.0, (0.3, -0.2))])
def test_columns_land_where_truth_says(rotation_deg, drift):
    # Noiseless render; a symmetric-weight centroid of an A column is its centre (see
    # _centroids), up to the rasterisation of rows, far below 0.01 px.
    acq = perovskite_frame("PbTiO3", (256, 256), pixel_size_pm=10.0, rotation_deg=rotation_deg,
                           dwell_time_us=20.0, drift_nm_per_s=drift, noise=False)
    tr = acq.truth
    sel = _interior(tr, acq.pixels.shape, 18)
    assert sel.sum() >= 16
    background = 0.02 * electrons_per_pixel(20.0, 20.0)  # haadf_background_fraction
    found = _centroids(acq.pixels.astype(float), tr.positions_px[sel], 4.0, background)
    err = found - tr.positions_px[sel]
    assert np.abs(err).max() < 0.01, np.abs(err).max()
    # Positions in pm are the pixel positions times the calibrated pixel size.
    np.testing.assert_allclose(tr.positions_pm, tr.positions_px * acq.sidecar["pixel_size_pm"])


def test_b_column_truth_includes_polar_shift():
    shift = (6.0, -9.0)
    acq = perovskite_frame("SrTiO3", (160, 160), b_displacement_pm=shift, noise=False)
    tr = acq.truth
    np.testing.assert_allclose(tr.cell_displacement_b_pm, np.broadcast_to(shift, (len(tr.cell_ij), 2)),
                               atol=1e-6)
    # Measured on the image: B centroid minus mean of its 4 A neighbours (rows = +y).
    a = {tuple(ij): p for ij, p in zip(tr.ij[tr.sublattice == "A"],
                                       tr.positions_px[tr.sublattice == "A"])}
    sel = _interior(tr, acq.pixels.shape, 14, site="B")
    bg = 0.02 * electrons_per_pixel(20.0, 2.0)
    found = _centroids(acq.pixels.astype(float), tr.positions_px[sel], 3.0, bg)
    meas = []
    for (i, j), p in zip(tr.ij[sel], found):
        corners = [a.get((i + di, j + dj)) for di in (0, 1) for dj in (0, 1)]
        if all(c is not None for c in corners):
            d = p - np.mean(corners, axis=0)
            meas.append([d[1], d[0]])  # (x, y) = (col, row)
    meas = np.array(meas) * acq.sidecar["pixel_size_pm"]
    assert len(meas) > 10
    # Ti columns sit 195 pm from O columns (4.9 sigma), so the centroid is pulled by well
    # under a picometre.
    np.testing.assert_allclose(np.median(meas, axis=0), shift, atol=0.5)


def test_counts_are_poisson():
    gain, offset = 3.0, 100.0
    spec = Specimen.from_scenario("demo")
    inst = spec.scenario.instrument.model_copy(update={"detector": spec.scenario.instrument
                                                       .detector.model_copy(
                                                           update={"gain": gain,
                                                                   "offset": offset})})
    kw = dict(center_nm=(0.0, 20.0), fov_nm=5.0, shape_px=(256, 256))
    mean = ScanEngine(spec, instrument=inst, drift=DriftModel.none(), seed=1).acquire(
        **kw, noise=False).pixels.astype(float)
    noisy = ScanEngine(spec, instrument=inst, drift=DriftModel.none(), seed=2).acquire(
        **kw).pixels.astype(float)
    lam = (mean - offset) / gain
    counts = (noisy - offset) / gain
    assert np.allclose(counts, np.rint(counts))       # whole electrons
    z = (counts - lam) / np.sqrt(lam)
    # Poisson: variance equals mean, so z has mean 0 and variance 1; with 65536 pixels the
    # standard error of the variance is sqrt(2/N) = 0.0055.
    assert abs(z.mean()) < 0.02
    assert abs(z.var() - 1.0) < 0.03
    # The dispersion index var/mean per intensity bin is 1 at low and high counts alike.
    for lo, hi in ((3, 8), (20, 60)):
        sel = (lam > lo) & (lam < hi)
        assert sel.sum() > 500
        ratio = np.var(counts[sel] - lam[sel]) / np.mean(lam[sel])
        assert abs(ratio - 1.0) < 0.1


def _lattice_vectors(positions_px, ij):
    """Least-squares fit positions = origin + i a + j b; returns a, b as (d_row, d_col)."""
    design = np.column_stack([np.ones(len(ij)), ij[:, 0], ij[:, 1]])
    coef, *_ = np.linalg.lstsq(design, positions_px, rcond=None)
    return coef[1], coef[2]


def _measured_a_sites(acq, margin=18):
    tr = acq.truth
    sel = _interior(tr, acq.pixels.shape, margin)
    bg = 0.02 * electrons_per_pixel(20.0, float(acq.sidecar["dwell_time_us"]))
    found = _centroids(acq.pixels.astype(float), tr.positions_px[sel], 4.0, bg)
    return found, tr.ij[sel]


def test_fast_axis_drift_shears_the_lattice():
    # CHECK-VALUES section 6: drift v_x along the fast axis gives a shear v_x t_line / dy.
    v_x, dwell_us, n, pixel_pm = 0.08, 10.0, 256, 10.0
    t_line = n * dwell_us * 1e-6
    acq = perovskite_frame("PbTiO3", (n, n), pixel_size_pm=pixel_pm, dwell_time_us=dwell_us,
                           drift_nm_per_s=(v_x, 0.0), noise=True, seed=3)
    found, ij = _measured_a_sites(acq)   # measured on the noisy image, not from the truth
    a, b = _lattice_vectors(found, ij)
    shear = b[1] / b[0]                  # column shift per row along the cell's b vector
    expected = v_x * t_line / (pixel_pm / 1000.0)
    assert expected == pytest.approx(0.02048)
    assert shear == pytest.approx(expected, rel=0.03)
    assert abs(a[0] / a[1]) < 2e-3       # the fast axis stays straight


def test_slow_axis_drift_stretches_the_lattice():
    # CHECK-VALUES section 6: v_y along the slow axis scales the lattice along y by
    # 1 / (1 - v_y t_line / dy) when the specimen moves with the scan.
    v_y, dwell_us, n, pixel_pm = 0.05, 10.0, 256, 10.0
    t_line = n * dwell_us * 1e-6
    still = perovskite_frame("PbTiO3", (n, n), pixel_size_pm=pixel_pm, dwell_time_us=dwell_us,
                             noise=True, seed=4)
    moving = perovskite_frame("PbTiO3", (n, n), pixel_size_pm=pixel_pm, dwell_time_us=dwell_us,
                              drift_nm_per_s=(0.0, v_y), noise=True, seed=5)
    _, b0 = _lattice_vectors(*_measured_a_sites(still))
    _, b1 = _lattice_vectors(*_measured_a_sites(moving))
    stretch = b1[0] / b0[0] - 1
    expected = 1 / (1 - v_y * t_line / (pixel_pm / 1000.0)) - 1
    assert stretch == pytest.approx(expected, rel=0.03)


def _vacancy_rich_specimen():
    # Many empty columns make the image aperiodic, so the correlation peak is unique.
    return Specimen.from_scenario({
        "name": "holes", "size_nm": [200.0, 200.0], "reference_material": "SrTiO3",
        "layers": [{"material": "SrTiO3"}],
        "random_vacancies": {"fraction_a": 0.2, "fraction_b": 0.2, "occupancy": 0.0},
        "seed": 5})


@pytest.mark.parametrize("rotation_deg", [0.0, 25.0])
def test_consecutive_frames_offset_by_applied_drift(rotation_deg):
    spec = _vacancy_rich_specimen()
    v = np.array([0.05, -0.03])                            # nm/s, no random walk
    engine = ScanEngine(spec, drift=DriftModel(v, 0.0), seed=7)
    # 200 pA (2500 e/pixel) keeps the registration error from shot noise near 0.03 px.
    kw = dict(center_nm=(3.0, -2.0), fov_nm=5.12, shape_px=(256, 256),
              scan_rotation_deg=rotation_deg, dwell_time_us=2.0, beam_current_pa=200.0)
    first = engine.acquire(**kw)
    engine.wait(1.5)
    second = engine.acquire(**kw)
    dt = second.truth.meta["t_start_s"] - first.truth.meta["t_start_s"]
    moved_nm = v * dt
    # The specimen moved by moved_nm on the stage; in image (col, row) axes of the rotated
    # raster that is (moved . e_fast, moved . e_slow) / pixel.
    th = math.radians(rotation_deg)
    e_f, e_s = np.array([math.cos(th), math.sin(th)]), np.array([-math.sin(th), math.cos(th)])
    pixel_nm = first.sidecar["pixel_size_pm"] / 1000.0
    moved_px = np.array([moved_nm @ e_s, moved_nm @ e_f]) / pixel_nm   # (row, col)
    # Reference implementation: scikit-image's cross-correlation registration returns the
    # shift that registers the moving image onto the reference, i.e. minus the feature
    # motion.  (Unnormalised: the whitened "phase" variant weights the noise-only high
    # frequencies as much as the lattice and is biased here by ~0.5 px.)
    shift, _, _ = phase_cross_correlation(first.pixels.astype(float),
                                          second.pixels.astype(float), upsample_factor=50,
                                          normalization=None)
    np.testing.assert_allclose(-shift, moved_px, atol=0.1)
    assert np.hypot(*moved_px) > 3
    # The sidecar reports the commanded position both times: the drift is the mismatch.
    assert (first.sidecar["stage_x_nm"], first.sidecar["stage_y_nm"]) == \
        (second.sidecar["stage_x_nm"], second.sidecar["stage_y_nm"])
    d0 = np.array(first.truth.meta["drift"]["offset_start_nm"])
    d1 = np.array(second.truth.meta["drift"]["offset_start_nm"])
    np.testing.assert_allclose(d1 - d0, moved_nm, atol=1e-12)


def test_drift_random_walk_statistics():
    # Random-walk increments: variance per axis = D^2 dt (common practice: Brownian motion).
    d = DriftModel((0.0, 0.0), 0.1, seed=0)
    t = np.arange(1, 20001) * 0.5
    off = d.offsets_nm(t)
    inc = np.diff(off, axis=0)
    np.testing.assert_allclose(inc.var(axis=0), 0.1**2 * 0.5, rtol=0.05)
    with pytest.raises(ValueError, match="must not go backwards"):
        d.offsets_nm([1.0])


def test_abf_shows_dark_columns_and_oxygen():
    haadf = perovskite_frame("SrTiO3", (128, 128), noise=False, detector="HAADF")
    abf = perovskite_frame("SrTiO3", (128, 128), noise=False, detector="ABF")
    tr = abf.truth

    def at(acq, site):
        p = np.rint(tr.positions_px[_interior(tr, acq.pixels.shape, 5, site)]).astype(int)
        return acq.pixels[p[:, 0], p[:, 1]].astype(float)

    bright = 0.6 * electrons_per_pixel(20.0, 2.0)            # abf_bright_fraction
    assert np.all(at(abf, "A") < bright) and np.all(at(abf, "Oa") < bright)
    # Common practice: in ABF light O columns are clearly visible, in HAADF nearly not.
    o_abf = (bright - at(abf, "Oa").mean()) / (bright - at(abf, "A").mean())
    bg = 0.02 * electrons_per_pixel(20.0, 2.0)
    o_haadf = (at(haadf, "Oa").mean() - bg) / (at(haadf, "A").mean() - bg)
    assert o_abf > 0.4 and o_haadf < 0.1


def test_truth_round_trip(tmp_path):
    acq = perovskite_frame("PbTiO3", (64, 64), noise=True, seed=1, b_displacement_pm=(0, 5))
    acq.truth.save(tmp_path)
    back = FrameTruth.load(tmp_path / "quick_00001.npz")
    for key, value in acq.truth.arrays.items():
        np.testing.assert_array_equal(back.arrays[key], value)
    assert back.meta["sidecar"] == acq.sidecar


def test_bad_acquire_arguments():
    engine = ScanEngine(Specimen.from_scenario("demo"), drift=DriftModel.none())
    with pytest.raises(ValueError, match="`shape_px`"):
        engine.acquire((0, 0), 5.0, (4, 4))
    with pytest.raises(ValueError, match="`fov_nm`"):
        engine.acquire((0, 0), 0.0, (64, 64))
    with pytest.raises(ValueError, match="`detector`"):
        engine.acquire((0, 0), 5.0, (64, 64), detector="EELS")


def test_flyback_warp_is_in_the_truth():
    # The beam lags at the start of each line (amplitude A, decay tau): columns near the
    # left edge appear displaced; the truth follows them (Newton on the warped coordinate).
    raw = {"name": "fb", "size_nm": [60.0, 60.0], "reference_material": "PbTiO3",
           "layers": [{"material": "PbTiO3"}],
           "instrument": {"probe": {"tail_fraction": 0.0},
                          "distortion": {"flyback_amplitude_pm": 150.0,
                                         "flyback_time_us": 40.0}}}
    spec = Specimen.from_scenario(raw)
    engine = ScanEngine(spec, drift=DriftModel.none())
    acq = engine.acquire((0.0, 0.0), 2.56, (256, 256), dwell_time_us=2.0, noise=False)
    tr = acq.truth
    plain = ScanEngine(Specimen.from_scenario({**raw, "instrument": {
        "probe": {"tail_fraction": 0.0}}}), drift=DriftModel.none()).acquire(
            (0.0, 0.0), 2.56, (256, 256), dwell_time_us=2.0, noise=False).truth
    sel = _interior(tr, acq.pixels.shape, 18)
    found = _centroids(acq.pixels.astype(float), tr.positions_px[sel], 4.0,
                       0.02 * electrons_per_pixel(20.0, 2.0))
    err = found - tr.positions_px[sel]
    # Residual warp inside one blob biases the centroid a little where the lag still
    # changes fast (the first column of cells); further right the centroid is exact.
    assert np.abs(err).max() < 0.05, np.abs(err).max()
    assert np.abs(err[tr.positions_px[sel, 1] > 120]).max() < 0.002
    # Against the undistorted scan, the first columns moved right by ~A exp(-t/tau) / pixel.
    key = {tuple(ij) + (s,): p for ij, s, p in zip(plain.ij, plain.sublattice,
                                                   plain.positions_px)}
    shift = np.array([p[1] - key[tuple(ij) + (s,)][1] for ij, s, p in
                      zip(tr.ij[sel], tr.sublattice[sel], tr.positions_px[sel])])
    col = tr.positions_px[sel, 1]
    assert shift[np.argmin(col)] > shift[np.argmax(col)] + 1.0


def test_beyond_the_specimen_edge_is_vacuum():
    spec = Specimen.from_scenario("tilted-substrate")  # 300 nm wide: x from -150 to 150
    engine = ScanEngine(spec, drift=DriftModel.none(), seed=1)
    kw = dict(noise=False, detector="HAADF", dwell_time_us=2.0, beam_current_pa=20.0)
    edge = engine.acquire((150.0, 0.0), 4.0, (128, 128), **kw)
    cols = edge.truth.positions_px[:, 1]
    assert len(cols) > 0 and cols.max() < 63.5 + 1   # columns only left of the edge
    outside = engine.acquire((200.0, 0.0), 4.0, (64, 64), **kw)
    assert outside.truth.meta["n_columns"] == 0
    # Only the diffuse background remains (haadf_background_fraction of the beam).
    np.testing.assert_allclose(outside.pixels, 0.02 * electrons_per_pixel(20.0, 2.0), rtol=1e-6)


def test_catch_up_lets_the_specimen_drift_with_the_wall_clock():
    """Opt-in real-time clock: simulated time catches up with the wall clock, never back."""
    from datetime import timedelta

    from sim_instrument.engine import DriftModel

    spec = Specimen.from_scenario("demo")
    eng = ScanEngine(spec, seed=0, drift=DriftModel((0.1, 0.0), 0.0))
    later = eng.start_time + timedelta(seconds=50)
    assert eng.catch_up(later) == pytest.approx(50.0)
    assert eng.time_s == pytest.approx(50.0)
    assert eng.drift.peek_nm()[0] == pytest.approx(5.0)  # v t of the linear drift
    assert eng.catch_up(eng.start_time + timedelta(seconds=10)) == 0.0
    assert eng.time_s == pytest.approx(50.0)
