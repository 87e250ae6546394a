"""analyze_frame puts the wall physics in the summary (livequant.pipeline._wall_physics).

Truth: a rendered frame of the simulator's ``moving-wall`` scenario (half-width 0.5 nm);
the G-L numbers must be those of livequant.analysis.landau for the frame's own width and
the PbTiO3 coefficients of config/materials.toml at the configured temperature.
"""

import json

import pytest

from livequant.analysis.landau import LandauPotential, wall_gl_parameters
from livequant.config import get_material, load_settings
from livequant.frames import Sidecar, frame_from_array, resolve_meta
from livequant.pipeline import analyze_frame
from sim_instrument.engine import DriftModel, ScanEngine
from sim_instrument.specimen import Specimen


def test_summary_carries_the_physics_block():
    eng = ScanEngine(Specimen.from_scenario("moving-wall"), seed=2, drift=DriftModel.none())
    acq = eng.acquire((0.0, 0.0), 6.0, (512, 512))
    meta = resolve_meta(Sidecar.parse(acq.sidecar, where="sim"), default_id="sim", where="sim")
    settings = load_settings(overrides={"analysis.material": "PbTiO3",
                                        "analysis.physics.temperature_K": 300.0})
    summary = analyze_frame(frame_from_array(acq.pixels, meta), settings).summary()
    json.dumps(summary, allow_nan=False)               # strict JSON, as summary.json
    phys = summary["physics"]
    wall = phys["wall"]
    assert wall["width"] == pytest.approx(500.0, abs=4 * wall["sigma_width"] + 25.0)
    c = get_material("PbTiO3").landau
    pot = LandauPotential.from_haun(c.alpha1_slope_m_per_F_K * (300.0 - c.t0_K), c.alpha11,
                                    c.alpha111)
    ref = wall_gl_parameters(wall["width"] * 1e-12, wall["sigma_width"] * 1e-12, pot)
    assert phys["gl"]["energy_J_per_m2"] == pytest.approx(ref.energy_J_per_m2, rel=1e-9)
    assert phys["gl"]["sigma_g_m3_per_F"] == pytest.approx(ref.sigma_g_m3_per_F, rel=1e-9)
    assert "Haun" in phys["gl"]["coefficients"] and "300 K" in phys["gl"]["coefficients"]
    assert len(phys["line"]["rows"]) >= 10
    # A straight simulated wall: no roughness exponent is claimed, and the reason says why.
    assert phys["roughness"] is None and phys["roughness_reason"]
    # Without Landau coefficients (SrTiO3 has none) the block says so instead.
    settings = load_settings(overrides={"analysis.material": "SrTiO3"})
    summary = analyze_frame(frame_from_array(acq.pixels, meta), settings).summary()
    phys = summary["physics"]
    assert phys["wall"] is not None     # the wall fit does not need the material
    assert phys["gl"] is None and "Landau coefficients" in phys["gl_reason"]
