"""One feature, one flag: anomalies on a typed flag are folded into it; statistics per
imaging condition."""

from __future__ import annotations

import numpy as np
import pytest

from livequant.config import Settings
from livequant.frames import FrameMeta
from livequant.rules import Flag, FrameView, Region, RuleManager, SessionContext, hookimpl
from livequant.rules.manager import attach_anomalies, imaging_condition


def _anomaly(x, y, descriptor="a_pm", size=40.0):
    return Flag("anomaly", 0.5, Region(x, y, size, size), f"{descriptor} high",
                {"descriptor": descriptor, "direction": "high"})


WALL = Flag("domain-wall", 0.9, Region(300.0, 256.0, 60.0, 500.0), "wall", {"x0_px": 300.0})


def test_anomalies_on_a_typed_flag_are_folded_into_it_and_others_kept():
    """A wall band 60 px wide at x = 300: an a_pm anomaly centred 50 px beside it (inside
    the band grown by 2 cells of 40 px) and a ratio anomaly on it are the wall; one 200 px
    away is a separate finding."""
    flags = [WALL, _anomaly(350.0, 100.0), _anomaly(300.0, 400.0, "ratio_b_a"),
             _anomaly(100.0, 100.0, "d_pm")]
    out = attach_anomalies(flags, margin_px=80.0)
    assert [f.kind for f in out] == ["domain-wall", "anomaly"]
    assert out[1].evidence["descriptor"] == "d_pm"
    assert out[0].evidence["n_attached_anomalies"] == 2
    assert out[0].evidence["attached_anomalies"] == ["a_pm high", "ratio_b_a high"]
    assert out[0].evidence["x0_px"] == 300.0
    # Without the margin, the one beside the band (centre outside, 1/4 covered) stays.
    assert [f.kind for f in attach_anomalies(flags, margin_px=0.0)] == \
        ["domain-wall", "anomaly", "anomaly"]
    # No typed flag: nothing changes.
    only = [_anomaly(10.0, 10.0)]
    assert attach_anomalies(only, margin_px=80.0) == only


def test_the_manager_folds_anomalies_of_a_rule_into_another_rules_typed_flag():
    class Both:
        @hookimpl
        def livequant_frame_rules(self, view):
            return [WALL, _anomaly(320.0, 200.0)]

    mgr = RuleManager(Settings.model_validate({"rules": {"enabled": []}}))
    mgr.register(Both(), name="both")
    view = FrameView(frame_id="f1", meta=FrameMeta(frame_id="f1", pixel_size_pm=10.0),
                     shape=(512, 512), status="ok", summary={})
    (flag,) = mgr.evaluate(view, SessionContext().readonly())
    assert flag.kind == "domain-wall" and flag.evidence["n_attached_anomalies"] == 1
    assert flag.rule == "both" and flag.frame_id == "f1"


def _view(fid, px, dwell, values):
    meta = FrameMeta(frame_id=fid, pixel_size_pm=px, dwell_time_us=dwell)
    return FrameView(frame_id=fid, meta=meta, shape=(64, 64), status="ok", summary={},
                     cells={"a_pm": values})


def test_statistics_are_kept_per_imaging_condition():
    """Survey frames (20 pm, 2 us: scatter 3 pm) and revisits (10 pm, 4 us: scatter 1 pm)
    each get their own median and scale; a new condition starts empty."""
    rng = np.random.default_rng(3)
    ctx = SessionContext(max_cells=5000)
    survey, revisit = _view("s", 20.0, 2.0, rng.normal(400, 3, 2000)), \
        _view("r", 10.0, 4.0, rng.normal(396, 1, 2000))
    ctx.update(survey, [])
    ctx.update(revisit, [])
    s = ctx.readonly(imaging_condition(survey.meta)).stats["a_pm"]
    r = ctx.readonly(imaging_condition(revisit.meta)).stats["a_pm"]
    assert s.median == pytest.approx(400, abs=0.3) and s.scale == pytest.approx(3, rel=0.1)
    assert r.median == pytest.approx(396, abs=0.1) and r.scale == pytest.approx(1, rel=0.1)
    assert ctx.readonly("HAADF 5 pm 1 us 0 deg").stats["a_pm"].n == 0
    assert ctx.readonly().stats["a_pm"].median == r.median   # the latest condition
    assert imaging_condition(survey.meta) == "HAADF 20 pm 2 us 0 deg"
    turned = FrameMeta(frame_id="t", pixel_size_pm=20.0, dwell_time_us=2.0,
                       scan_rotation_deg=89.8)
    assert imaging_condition(turned) == "HAADF 20 pm 2 us 90 deg"


def test_one_interface_is_one_flag_when_descriptors_step_at_different_rows():
    """An electrode-like interface: the column ratio steps sharply between rows j = 6 and 7,
    the lattice parameter b relaxes over a few cells (tanh of 2 cells half-width, centred
    2.5 rows further up) -- the two descriptors place the same interface 2-3 rows apart.
    One flag, naming both; a second interface 12 rows away stays its own flag."""
    from tests.rules.test_builtin_units import _cells, _view

    rng = np.random.default_rng(8)
    j = np.arange(30)[None, :]
    ratio = np.where(j >= 7, 0.3, 1.3) + rng.normal(0, 0.03, (16, 30))
    b = 390.0 + 8.0 * (np.tanh((j - 9.0) / 2.0) + 1) / 2 + rng.normal(0, 0.4, (16, 30))
    ratio = np.where(j >= 21, 1.3, ratio) + 0 * b      # the layer ends 14 rows up
    b = np.where(j >= 21, 390.0 + rng.normal(0, 0.4, (16, 30)), b)
    cells = _cells(16, 30, ratio_b_a=ratio, sigma_ratio_b_a=0.03, b_pm=b,
                   a_pm=390.0 + rng.normal(0, 0.4, (16, 30)))
    mgr = RuleManager.from_settings(Settings.model_validate({"rules": {"enabled": ["interfaces"]}}))
    flags = mgr.evaluate(_view(cells), SessionContext().readonly())
    rows = sorted(f.evidence["row"] for f in flags)
    assert len(flags) == 2, [(f.evidence["row"], f.evidence["descriptors"]) for f in flags]
    assert rows[0] == pytest.approx(6.5, abs=1.0) and rows[1] == pytest.approx(20.5, abs=1.0)
    low = min(flags, key=lambda f: f.evidence["row"])
    assert set(low.evidence["descriptors"]) == {"ratio_b_a", "b_pm"}


def test_an_anomaly_between_two_interfaces_is_theirs():
    """The non-polar electrode between two interface bands (d_pm low over the layer): each
    band covers a third of the anomaly, together two thirds -- folded into the first."""
    top = Flag("interface", 0.9, Region(500.0, 340.0, 980.0, 40.0), "top", {})
    bottom = Flag("interface", 0.9, Region(500.0, 120.0, 980.0, 40.0), "bottom", {})
    layer = _anomaly(500.0, 230.0, "d_pm", size=200.0)
    out = attach_anomalies([top, bottom, layer], margin_px=40.0)
    assert [f.kind for f in out] == ["interface", "interface"]
    assert sum(f.evidence.get("n_attached_anomalies", 0) for f in out) == 1


def test_cluster_scores_count_the_correlation_of_neighbouring_cells():
    """Cells sharing an edge share two corner columns (correlation 0.5), a corner one (0.25):
    a chain of 3 has variance 3 + 2 x 0.5 x 2 = 5, a 2 x 2 block 4 + 2 (4 x 0.5 + 2 x 0.25)
    = 9, a lone cell 1 (derived here from the cell construction)."""
    from scipy import ndimage

    from livequant.rules.builtin.anomalies import _sum_variance

    m = np.zeros((7, 7), bool)
    m[1, 1:4] = True
    m[4:6, 4:6] = True
    m[0, 6] = True
    lab, n = ndimage.label(m, structure=np.ones((3, 3)))
    size = np.bincount(lab.ravel(), minlength=n + 1)[1:]
    var = dict(zip(size.tolist(), _sum_variance(lab, n, size).tolist()))
    assert var == {3: 5.0, 4: 9.0, 1: 1.0}
