"""Drift from overlapping simulated frames against the simulator's drift truth."""

import numpy as np
import pytest

from livequant.proposals.drift import DriftModel, DriftTracker, estimate_pair_drift
from sim_instrument import ScanEngine, Specimen
from sim_instrument.engine import DriftModel as SimDrift
from tests.proposals._sim import drift_image, truth_drift_nm


@pytest.fixture(scope="module")
def specimen():
    return Specimen.from_scenario("demo")


def test_identical_region_without_drift_gives_zero(specimen):
    eng = ScanEngine(specimen, seed=1, drift=SimDrift.none())
    a = drift_image(eng.acquire((0, 20), 12.0, (256, 256)))
    b = drift_image(eng.acquire((2, 21), 12.0, (256, 256)))
    r = estimate_pair_drift(a, b, search_radius_nm=0.15)
    # Truth: no drift.  Tolerance 15 pm = 0.3 px of 47 pm (line jitter and shot noise).
    assert np.abs(r.shift_nm).max() < 0.015
    assert not r.ambiguous and r.overlap_fraction > 0.7


@pytest.mark.parametrize("seed,velocity,rotation_deg", [(1, (0.012, 0.006), 0.0),
                                                        (2, (-0.02, 0.01), 10.0)])
def test_tracker_follows_the_simulated_drift(specimen, seed, velocity, rotation_deg):
    """1. Six overlapping frames, 2 s apart, each 2 nm further along x and 1 nm along y.
    2. Each is registered against the previous one (the best overlap).
    3. The drift position of each frame matches the simulator's drift since frame 1, and
       the fitted velocity the simulated one."""
    eng = ScanEngine(specimen, seed=seed, drift=SimDrift(velocity, 0.002, seed=seed + 5))
    tracker = DriftTracker(DriftModel())
    truths, errors, sigmas = [], [], []
    for k in range(6):
        acq = eng.acquire((2.0 * k, 20 + 1.0 * k), 12.0, (384, 384),
                          scan_rotation_deg=rotation_deg)
        eng.wait(2.0)
        im = drift_image(acq)
        result = tracker.observe(im)
        truths.append(truth_drift_nm(acq))
        if k:
            assert result is not None and not result.ambiguous
            d, s = tracker.model.position_of(im.frame_id, im.t_s)
            errors.append(d - (truths[-1] - truths[0]))
            sigmas.append(s)
    errors = np.array(errors)
    # Measured on these frames: errors up to ~16 pm after five chained pairs (31 pm pixels).
    assert np.abs(errors).max() < 0.030
    v, sv = tracker.model.velocity()
    assert np.abs(v - velocity).max() < 0.005 and sv < 0.01


def test_search_near_the_prediction_picks_the_right_lattice_cell(specimen):
    """1.2 nm of drift is three lattice cells: a wide search is ambiguous (and says so);
    a search around a good prediction finds the true shift."""
    eng = ScanEngine(specimen, seed=1, drift=SimDrift((0.03, -0.02), 0.0))
    a_acq = eng.acquire((0, 20), 16.0, (384, 384))
    eng.wait(40.0)
    b_acq = eng.acquire((3, 21), 16.0, (384, 384))
    a, b = drift_image(a_acq), drift_image(b_acq)
    truth = truth_drift_nm(b_acq) - truth_drift_nm(a_acq)
    wide = estimate_pair_drift(a, b, search_radius_nm=3.0, prior_sigma_nm=1.0)
    assert wide.ambiguous and wide.peak_ratio > 0.8
    guided = estimate_pair_drift(a, b, predicted_nm=truth + [0.08, -0.05],
                                 search_radius_nm=0.4, prior_sigma_nm=0.1)
    assert not guided.ambiguous
    assert np.abs(guided.shift_nm - truth).max() < 0.015


def test_model_fit_is_robust_to_an_outlier_pair():
    m = DriftModel(random_walk_nm_per_sqrt_s=0.0)
    v_true = np.array([0.01, -0.004])
    rng = np.random.default_rng(3)
    for k in range(8):
        t0, t1 = 10.0 * k, 10.0 * k + 5.0
        m.add_pair(t0, t1, v_true * 5.0 + rng.normal(0, 0.003, 2), 0.003)
    m.add_pair(100.0, 105.0, [0.4, 0.4], 0.003)  # one wrong pair (a lattice jump)
    v, sv = m.velocity()
    assert np.abs(v - v_true).max() < 3 * sv + 1e-4 and m.n_outliers == 1
    m.add_anchor("f0", 0.0, (0.0, 0.0))
    shift, sigma = m.predict_shift(0.0, 300.0, frame_id="f0")
    assert np.abs(shift - v_true * 300).max() < 3 * sigma


def test_model_without_pairs_predicts_no_drift_with_prior_uncertainty():
    m = DriftModel(prior_speed_nm_per_s=0.02, random_walk_nm_per_sqrt_s=0.0)
    shift, sigma = m.predict_shift(0.0, 50.0)
    assert np.all(shift == 0) and sigma == pytest.approx(1.0)


def test_frames_of_different_pixel_size_and_rotation_register(specimen):
    """A survey frame (47 pm pixels, no rotation) and a finer, rotated re-scan (20 pm, 20 deg)
    of the same place: both resampled on one stage grid; the shift matches the truth."""
    eng = ScanEngine(specimen, seed=9, drift=SimDrift((0.02, 0.01), 0.0))
    a_acq = eng.acquire((-20, 20), 12.0, (256, 256))
    eng.wait(3.0)
    b_acq = eng.acquire((-19, 20.5), 6.0, (300, 300), scan_rotation_deg=20.0)
    a, b = drift_image(a_acq), drift_image(b_acq)
    truth = truth_drift_nm(b_acq) - truth_drift_nm(a_acq)
    r = estimate_pair_drift(a, b, search_radius_nm=0.15, prior_sigma_nm=0.05)
    assert r is not None and not r.ambiguous
    # Tolerance 15 pm: a third of the coarser (47 pm) grid pixel.
    assert np.abs(r.shift_nm - truth).max() < 0.015


def test_frames_that_do_not_overlap_give_no_measurement(specimen):
    eng = ScanEngine(specimen, seed=9, drift=SimDrift.none())
    a = drift_image(eng.acquire((-20, 20), 8.0, (128, 128)))
    b = drift_image(eng.acquire((20, 20), 8.0, (128, 128)))
    assert estimate_pair_drift(a, b) is None
    tracker = DriftTracker(DriftModel())
    assert tracker.observe(a) is None and tracker.observe(b) is None
    assert tracker.model.n_pairs == 0
