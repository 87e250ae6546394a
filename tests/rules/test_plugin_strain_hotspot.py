"""The example plugin plugins/strain_hotspot.py, loaded from its folder as a user would.

Truth: the demo specimen's first point defect, a centre of dilatation with a central strain
of 2 % over a radius of 0.8 nm (sim_instrument/scenarios/demo.toml, sim_instrument/README.md),
so its cells carry a principal strain of about 1-2 % against the frame's median cell.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from livequant.config import ConfigError, Settings
from livequant.rules import RuleManager, SessionContext
from sim_instrument import Specimen
from tests.rules.test_builtin_on_sim import _acquire, _cell_px

PLUGINS = Path(__file__).resolve().parents[2] / "plugins"


def _manager(**options):
    return RuleManager.from_settings(Settings.model_validate({
        "analysis": {"material": "PbTiO3"},
        "rules": {"enabled": [], "plugin_dirs": [str(PLUGINS)],
                  "options": {"strain_hotspot": options} if options else {}}}))


def test_hotspot_flagged_on_the_expanded_defect_and_not_on_plain_film():
    mgr = _manager()
    assert mgr.names == ["strain_hotspot"]
    settings = mgr.settings
    spec = Specimen.from_scenario("demo")
    p = np.array([20.0, -20.0])
    p_disp = p + spec.displacement_nm(p[None, :])[0]
    acq, view = _acquire(spec, settings, p_disp, seed=30)
    k = np.argmin(np.hypot(*(acq.truth.xy_nm - p_disp).T))
    row, col = acq.truth.positions_px[k]
    flags = mgr.evaluate(view, SessionContext().readonly())
    assert flags and {f.kind for f in flags} == {"strain-hotspot"}
    assert all(f.rule == "strain_hotspot" and f.frame_id == view.frame_id for f in flags)
    best = max(flags, key=lambda f: f.evidence["peak_strain_pct"])
    assert math.hypot(best.region.x_px - col, best.region.y_px - row) < 2 * _cell_px(acq)
    assert best.evidence["peak_strain_pct"] == pytest.approx(2.0, abs=0.6)   # the 2 % centre
    _, plain = _acquire(spec, settings, (10.0, 30.0), seed=31)
    assert mgr.evaluate(plain, SessionContext().readonly()) == []


def test_options_reach_the_plugin_and_typos_stop_start_up():
    mgr = _manager(min_strain_pct=50.0)
    assert mgr.get_plugin("strain_hotspot").options["min_strain_pct"] == 50.0
    with pytest.raises(ConfigError, match="strain_hotspot.*min_strain_pc"):
        _manager(min_strain_pc=2.0)
