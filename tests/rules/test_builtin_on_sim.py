"""The built-in rules on simulated frames, checked against the simulator's ground truth.

Frames of the invented "demo" specimen (sim_instrument/scenarios/demo.toml: a PbTiO3 film on
SrRuO3/SrTiO3 with 180-degree walls, a vortex-antivortex pair, expanded point defects), each
centred on a feature the truth places there (positions after the specimen's elastic
displacement, as the truth reports them).  "Within one unit cell" uses the PbTiO3 in-plane
parameter a = 389.87 pm (config/materials.toml; CHECK-VALUES.md section 1).

Doses: walls, interfaces and anomalies at the demo's default 2 us dwell (250 electrons per
pixel); the cores at 4 us, because at 2 us the cells next to a core (where the displacement
falls towards zero) carry no direction and the core is found only to about one cell (measured
while writing this rule, three seeds each: 0.1-0.9 cells at 2 us, 0.2-0.4 cells at 4 us).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from livequant.config import load_materials, load_settings
from livequant.frames import Sidecar, frame_from_array, resolve_meta
from livequant.pipeline import analyze_frame
from livequant.rules import FrameView, RuleManager, SessionContext
from sim_instrument import ScanEngine, Specimen

FOV_NM, SHAPE = 6.0, (384, 384)
A_PM = load_materials()["PbTiO3"].a_pm


@pytest.fixture(scope="module")
def demo():
    return Specimen.from_scenario("demo")


@pytest.fixture(scope="module")
def settings():
    return load_settings(environ={}, overrides={"analysis.material": "PbTiO3"})


@pytest.fixture(scope="module")
def manager(settings):
    return RuleManager.from_settings(settings)


def _acquire(spec, settings, center_nm, *, seed, dwell_time_us=2.0, scan_rotation_deg=0.0):
    acq = ScanEngine(spec, seed=seed).acquire(center_nm=center_nm, fov_nm=FOV_NM,
                                               shape_px=SHAPE, dwell_time_us=dwell_time_us,
                                               scan_rotation_deg=scan_rotation_deg)
    meta = resolve_meta(Sidecar.parse(acq.sidecar, where="sim"), default_id="sim", where="sim")
    result = analyze_frame(frame_from_array(acq.pixels, meta), settings)
    assert result.ok and result.cells is not None, result.message
    return acq, FrameView.from_result(result, image=acq.pixels)


def _cell_px(acq):
    return A_PM / acq.sidecar["pixel_size_pm"]


def _by_kind(flags, kind):
    return [f for f in flags if f.kind == kind]


@pytest.mark.parametrize("center_nm, seed, rotation_deg", [((-40.0, 0.0), 1, 0.0),
                                                           ((70.0, 20.0), 2, 0.0),
                                                           ((-40.0, 10.0), 7, 25.0)])
def test_flagged_wall_lies_on_the_true_wall(demo, settings, manager, center_nm, seed,
                                            rotation_deg):
    # The last case scans rotated by 25 degrees: the wall crosses the image obliquely.
    acq, view = _acquire(demo, settings, center_nm, seed=seed, scan_rotation_deg=rotation_deg)
    walls = [w for w in acq.truth.meta["walls"] if w["crosses_frame"]]
    assert len(walls) == 1
    row, col = walls[0]["point_px"]
    d = np.asarray(walls[0]["direction_image_xy"], float)
    flags = manager.evaluate(view, SessionContext().readonly())
    wall_flags = _by_kind(flags, "domain-wall")
    assert len(wall_flags) == 1, [f.message for f in flags]
    f = wall_flags[0]
    assert (f.rule, f.frame_id) == ("domain_walls", view.frame_id)
    # Distance of the flagged point from the true wall line, and the band's direction.
    p = np.array([f.evidence["x_px"], f.evidence["y_px"]]) - np.array([col, row])
    assert abs(p[0] * d[1] - p[1] * d[0]) < _cell_px(acq)
    along = np.array([math.cos(math.radians(f.region.angle_deg)),
                      math.sin(math.radians(f.region.angle_deg))])
    assert abs(along @ d) > math.cos(math.radians(10.0))
    assert 0 < f.score <= 1 and f.region.height_px >= 2 * _cell_px(acq) * 0.9
    # No core is claimed on a straight wall: not by the rules, not by the analysis's own
    # winding output (summary.json), which uses the rule's loop search (one topology).
    assert not _by_kind(flags, "vortex") and not _by_kind(flags, "antivortex")
    topo = view.summary["cells"]["topology"]
    assert topo["cores"] == [] and topo["by_kind"] == {}
    assert topo["n_positive"] == topo["n_negative"] == topo["total_winding"] == 0


@pytest.mark.parametrize("which, seed", [(0, 3), (1, 4)])
def test_flagged_cores_coincide_with_the_true_cores(demo, settings, manager, which, seed):
    truth = demo.vortex_truth()[which]
    acq, view = _acquire(demo, settings, truth["xy_nm"], seed=seed, dwell_time_us=4.0)
    cores = [c for c in acq.truth.meta["vortex_cores"] if c["in_frame"]]
    assert len(cores) == 1 and cores[0]["winding"] == truth["winding"]
    kind = "vortex" if truth["winding"] == 1 else "antivortex"
    other = "antivortex" if kind == "vortex" else "vortex"
    flags = manager.evaluate(view, SessionContext().readonly())
    found = _by_kind(flags, kind)
    assert len(found) == 1, [f.message for f in flags]
    assert not _by_kind(flags, other)
    row, col = cores[0]["position_px"]
    f = found[0]
    assert math.hypot(f.region.x_px - col, f.region.y_px - row) < _cell_px(acq)
    assert f.evidence["winding"] == truth["winding"]
    # The region is a few cells around the core, as configured.
    assert f.region.width_px == pytest.approx(settings.rules.vortex_cores.region_cells
                                              * _cell_px(acq), rel=0.1)


def test_interface_is_flagged_at_the_true_height(demo, settings, manager):
    acq, view = _acquire(demo, settings, (0.0, -56.0), seed=5)
    meta = acq.truth.meta
    # The SrRuO3/PbTiO3 plane (y_nm_at_x0, displaced) in image rows: rows run along +y of the
    # specimen at zero scan rotation, from the frame centre the truth reports.
    pixel_nm = meta["pixel_size_pm"] / 1000.0
    (itf,) = [i for i in meta["interfaces"] if i["above"] == "PbTiO3"]
    true_row = (SHAPE[0] - 1) / 2 + (itf["y_nm_at_x0"] - meta["specimen_center_nm"][1]) / pixel_nm
    flags = _by_kind(manager.evaluate(view, SessionContext().readonly()), "interface")
    assert len(flags) == 1, [f.message for f in flags]
    f = flags[0]
    assert abs(f.evidence["y_px"] - true_row) < _cell_px(acq)
    assert abs(math.sin(math.radians(f.region.angle_deg))) < 0.1      # runs along x
    assert f.region.width_px > 0.8 * SHAPE[1] * 0.7                    # across the frame
    assert "ratio_b_a" in f.evidence["descriptors"]                    # Ru/Sr -> Ti/Pb contrast


def test_uniform_domain_gets_no_wall_core_or_interface_flag(demo, settings, manager):
    # Between the walls at x = -40 and 70 nm, far above the interfaces: one polar domain.
    acq, view = _acquire(demo, settings, (10.0, 30.0), seed=6)
    assert not [w for w in acq.truth.meta["walls"] if w["crosses_frame"]]
    flags = manager.evaluate(view, SessionContext().readonly())
    assert flags == [], [f.message for f in flags]


def test_anomaly_at_an_expanded_defect_against_a_session_of_normal_frames(demo, settings,
                                                                          manager):
    # Three frames of plain film set the session's statistics; the frame on the 2 %
    # expansion centre (demo defect 1) is then flagged there, and a fourth plain frame is not.
    ctx = SessionContext.from_settings(settings)
    for k, c in enumerate([(10.0, 30.0), (-10.0, 40.0), (30.0, 100.0)]):
        _, view = _acquire(demo, settings, c, seed=10 + k)
        ctx.update(view, manager.evaluate(view, ctx.readonly()))
    assert ctx.readonly().stats["a_pm"].n >= settings.rules.anomalies.min_session_cells
    p = np.array([20.0, -20.0])
    p_disp = p + demo.displacement_nm(p[None, :])[0]
    acq, view = _acquire(demo, settings, p_disp, seed=20)
    tr = acq.truth
    k = np.argmin(np.hypot(*(tr.xy_nm - p_disp).T))
    row, col = tr.positions_px[k]
    found = _by_kind(manager.evaluate(view, ctx.readonly()), "anomaly")
    assert found
    lattice = [f for f in found if f.evidence["descriptor"] in ("a_pm", "b_pm")]
    assert lattice and all(f.evidence["direction"] == "high" for f in lattice)   # expansion
    best = max(lattice, key=lambda f: f.score)
    r = best.region
    assert abs(r.x_px - col) <= r.width_px / 2 and abs(r.y_px - row) <= r.height_px / 2
    assert math.hypot(r.x_px - col, r.y_px - row) < 2 * _cell_px(acq)
    _, plain = _acquire(demo, settings, (-20.0, 20.0), seed=21)
    assert _by_kind(manager.evaluate(plain, ctx.readonly()), "anomaly") == []
