"""The built-in rules' numerics on exact synthetic cell tables (known answers)."""

from __future__ import annotations

import numpy as np
import pytest

from livequant.analysis.cells import VALUE_FIELDS
from livequant.analysis.topology import winding_numbers
from livequant.config import Settings
from livequant.frames import FrameMeta
from livequant.rules import FrameView, RuleManager, SessionContext
from livequant.rules.builtin.interfaces import row_steps
from livequant.rules.builtin.vortex_cores import loop_windings

CELL_PX = 20.0


def _cells(ni, nj, **values):
    """A cell table on a square grid: i along x, j along y, 20 px cells, origin (10, 10)."""
    i, j = np.meshgrid(np.arange(ni), np.arange(nj), indexing="ij")
    out = {"i": i.ravel(), "j": j.ravel(), "x_px": 10.0 + CELL_PX * i.ravel(),
           "y_px": 10.0 + CELL_PX * j.ravel()}
    out["x_pm"], out["y_pm"] = out["x_px"] * 10.0, out["y_px"] * 10.0
    for name in VALUE_FIELDS:
        out[name] = np.full(ni * nj, np.nan)
    for name, v in values.items():
        out[name] = np.broadcast_to(np.asarray(v, float), (ni, nj)).ravel().copy()
    return out


def _view(cells, frame_id="u1"):
    return FrameView(frame_id=frame_id, meta=FrameMeta(frame_id=frame_id, pixel_size_pm=10.0),
                     shape=(512, 512), status="ok", summary={}, cells=cells)


# ---------------------------------------------------------------- winding loops


@pytest.mark.parametrize("handedness", [1, -1])
def test_one_cell_loops_are_the_plaquette_windings_of_analysis_topology(handedness):
    rng = np.random.RandomState(7)
    ux, uy = rng.normal(size=(2, 12, 9))
    valid = rng.uniform(size=(12, 9)) > 0.1
    ours = loop_windings(ux, uy, loop_cells=1, valid=valid, handedness=handedness)
    ref = winding_numbers(ux, uy, valid=valid, handedness=handedness)
    np.testing.assert_array_equal(ours, ref)
    assert np.nansum(np.abs(ref)) > 0          # the random field does wind somewhere


@pytest.mark.parametrize("L", [2, 3, 4])
@pytest.mark.parametrize("field, winding", [(lambda x, y: (-y, x), 1),    # circulating
                                             (lambda x, y: (x, -y), -1)])  # saddle
def test_every_loop_around_a_point_core_winds_and_no_other(L, field, winding):
    # Core at a plaquette centre of a 12 x 12 grid: exactly L^2 loops of side L enclose it.
    x, y = np.meshgrid(np.arange(12) - 5.5, np.arange(12) - 5.5, indexing="ij")
    w = loop_windings(*field(x, y), loop_cells=L)
    assert np.all(np.isfinite(w))
    assert np.sum(w == winding) == L * L and np.sum(w != 0) == L * L


def test_a_loop_across_a_180_degree_flip_is_not_used():
    # P along +y on the left, -y on the right: the direction jumps by pi between two cells.
    x = np.arange(10)[:, None] * np.ones((1, 8))
    ux = np.zeros_like(x) + 1e-3 * np.sin(x)       # a hint of x so angles are not exactly pi
    uy = np.where(x < 4.5, 1.0, -1.0)
    w = loop_windings(ux, uy, loop_cells=3, max_step_rad=np.radians(90))
    crossing = np.zeros(w.shape, bool)
    crossing[2:5, :] = True                         # loops starting at i = 2..4 straddle 4|5
    assert np.all(np.isnan(w[crossing])) and np.all(w[~crossing] == 0)


def test_vortex_rule_on_an_ideal_core_with_noise():
    # A counter-clockwise vortex of 20 pm at a cell corner, 3 pm noise per component: one
    # vortex flag at the corner to within a fifth of a cell.
    rng = np.random.RandomState(11)
    ni = nj = 16
    i, j = np.meshgrid(np.arange(ni), np.arange(nj), indexing="ij")
    xc, yc = 10 + CELL_PX * 7.5, 10 + CELL_PX * 8.5
    x, y = 10 + CELL_PX * i, 10 + CELL_PX * j
    phi = np.arctan2(y - yc, x - xc) + np.pi / 2
    r = np.hypot(x - xc, y - yc)
    mag = 20.0 * np.tanh(r / (1.5 * CELL_PX))
    dx = mag * np.cos(phi) + rng.normal(0, 3.0, phi.shape)
    dy = mag * np.sin(phi) + rng.normal(0, 3.0, phi.shape)
    cells = _cells(ni, nj, dx_pm=dx, dy_pm=dy, sigma_d_pm=3.0)
    flags = RuleManager.from_settings(Settings.model_validate(
        {"rules": {"enabled": ["vortex_cores"]}})).evaluate(_view(cells),
                                                           SessionContext().readonly())
    assert [f.kind for f in flags] == ["vortex"]
    f = flags[0]
    assert np.hypot(f.region.x_px - xc, f.region.y_px - yc) < 0.2 * CELL_PX
    assert f.evidence["winding"] == 1 and f.evidence["n_loops"] >= 4


# ---------------------------------------------------------------- interface steps


def test_row_step_errors_are_calibrated():
    # A 2.0 step between rows 5 and 6 of a noisy 12 x 30 grid (sigma 1): over many noise
    # draws the estimated steps scatter as their standard errors say.
    rng = np.random.RandomState(3)
    pulls, steps = [], []
    for _ in range(300):
        g = rng.normal(0, 1.0, (12, 30)) + np.where(np.arange(12) >= 6, 2.0, 0.0)[:, None]
        ks, step, se, left, right, _ = row_steps(g, window_rows=3)
        k = np.flatnonzero(ks == 6)[0]
        pulls.append((step[k] - 2.0) / se[k])
        steps.append(step[k])
        # The most significant boundary is the true one or its neighbour (the standard errors
        # are estimated per row, so the flanks can edge ahead; the rule locates the step by
        # the half-way crossing instead).
        assert abs(ks[np.argmax(np.abs(step) / se)] - 6) <= 1
    assert np.mean(steps) == pytest.approx(2.0, abs=0.03)
    assert 0.8 < np.std(pulls) < 1.25


def test_interface_rule_finds_a_ratio_step_along_rows():
    # Column intensity ratio 1.3 below j = 7, 0.3 from j = 7 up: the interface is the line
    # midway between rows j = 6 and 7 (y = 10 + 6.5 * 20 = 140 px), running along x.
    rng = np.random.RandomState(5)
    j = np.arange(14)[None, :]
    ratio = np.where(j >= 7, 0.3, 1.3) + rng.normal(0, 0.03, (16, 14))
    cells = _cells(16, 14, ratio_b_a=ratio, sigma_ratio_b_a=0.03,
                   a_pm=390.0 + rng.normal(0, 1.0, (16, 14)),
                   b_pm=390.0 + rng.normal(0, 1.0, (16, 14)))
    flags = RuleManager.from_settings(Settings.model_validate(
        {"rules": {"enabled": ["interfaces"]}})).evaluate(_view(cells),
                                                         SessionContext().readonly())
    assert [f.kind for f in flags] == ["interface"]
    f = flags[0]
    assert f.evidence["axis"] == "j" and f.evidence["descriptors"] == ["ratio_b_a"]
    assert f.evidence["y_px"] == pytest.approx(140.0, abs=0.25 * CELL_PX)
    assert f.region.angle_deg == pytest.approx(0.0, abs=1.0)
    assert f.region.width_px == pytest.approx(16 * CELL_PX, rel=0.01)
    assert f.evidence["step"] == pytest.approx(-1.0, abs=0.05)


# ---------------------------------------------------------------- anomalies


def _session(n_frames, rng, ni=20, nj=20):
    ctx = SessionContext()
    for k in range(n_frames):
        ctx.update(_view(_cells(ni, nj, a_pm=390.0 + rng.normal(0, 1.0, (ni, nj)),
                                sigma_a_pm=1.0), f"n{k}"), [])
    return ctx


def test_anomaly_cluster_against_the_session_statistics():
    rng = np.random.RandomState(9)
    mgr = RuleManager.from_settings(Settings.model_validate(
        {"rules": {"enabled": ["anomalies"], "anomalies": {"descriptors": ["a_pm"]}}}))
    a = 390.0 + rng.normal(0, 1.0, (20, 20))
    # The plain frames scatter by their sigma alone (1 pm), so the specimen's own spread is ~0
    # and a cell's score is its offset over its sigma.  A 2 x 2 cluster 5 pm high (each cell
    # ~5 sigma: alone below k_sigma = 6, together ~10) is flagged; one lone cell 4 pm low is not.
    a[10:12, 4:6] += 5.0
    a[3, 15] -= 4.0
    cells = _cells(20, 20, a_pm=a, sigma_a_pm=1.0)
    st = _session(1, rng).readonly().stats["a_pm"]
    assert st.n < 500
    assert mgr.evaluate(_view(cells), _session(1, rng).readonly()) == []   # too few cells yet
    ctx = _session(3, rng)
    flags = mgr.evaluate(_view(cells), ctx.readonly())
    assert [f.kind for f in flags] == ["anomaly"], [f.message for f in flags]
    f = flags[0]
    assert f.evidence["direction"] == "high" and f.evidence["n_cells"] >= 4
    # The box around cells i = 10..11, j = 4..5 (x 210..230, y 90..110) grown by one cell.
    assert (f.region.x_px, f.region.y_px) == pytest.approx((220.0, 100.0), abs=CELL_PX / 2)
    assert f.region.width_px == pytest.approx(3 * CELL_PX, abs=CELL_PX)
    # The session's statistics are those of the plain frames: median 390, scale ~1 pm.
    st = ctx.readonly().stats["a_pm"]
    assert st.median == pytest.approx(390.0, abs=0.1) and st.scale == pytest.approx(1.0, rel=0.1)
