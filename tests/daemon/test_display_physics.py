"""The wall-physics row of the display's latest-frame panel (livequant.display.status)."""

import dataclasses
import io

from rich.console import Console

from livequant.daemon.status import last_frame_from_summary
from livequant.display.status import physics_rows, render_status
from tests.daemon.test_display import _busy_snapshot


def _summary():
    return {"frame_id": "f1", "status": "ok", "n_columns": 10,
            "physics": {"wall": {"width": 516.7, "sigma_width": 19.9, "asymmetry": 0.1,
                                 "sigma_asymmetry": 0.2},
                        "gl": {"energy_J_per_m2": 0.1082, "sigma_energy_J_per_m2": 0.0042},
                        "roughness": {"zeta": 0.61, "sigma_zeta": 0.08}}}


def test_physics_row_reads_the_summary_and_the_track():
    last = last_frame_from_summary(_summary())
    tracks = {"latest_wall": {"track_id": "W1", "n": 7, "velocity_nm_per_s": -0.02016,
                              "sigma_velocity_nm_per_s": 0.00015}}
    rows = dict(physics_rows(last.physics, tracks))
    for part in ("w 517 ± 20 pm", "E 108 ± 4 mJ/m²", "ζ 0.61 ± 0.08"):
        assert part in rows["wall"], (part, rows)
    assert rows["track"] == "W1: v -20.2 ± 0.1 pm/s along its normal, 7 frames"
    assert physics_rows(None, None) == []
    tracks["latest_wall"]["means"] = {
        "width_nm": {"n": 7, "mean": 0.5172, "sigma": 0.0075, "sigma_scaled": 0.0075,
                     "consistent": True},
        "energy_J_per_m2": {"n": 7, "mean": 0.1081, "sigma": 0.0016, "sigma_scaled": 0.0016,
                            "consistent": True}}
    rows = physics_rows(last.physics, tracks)
    assert rows[-1] == ("", "mean w 517 ± 8 pm, E 108 ± 2 mJ/m²  (χ² consistent)")


def test_physics_row_fits_the_80_column_panel():
    last = dataclasses.replace(_busy_snapshot().last, physics=last_frame_from_summary(
        _summary()).physics)
    snap = dataclasses.replace(_busy_snapshot(), last=last, decisions={
        "frames": 3, "flags": 1, "errors": 0, "tracks": {"latest_wall": {
            "track_id": "W12", "n": 30, "velocity_nm_per_s": 0.0201,
            "sigma_velocity_nm_per_s": 0.0002}}})
    console = Console(file=io.StringIO(), width=80, height=30, color_system=None,
                      force_terminal=False, legacy_windows=False)
    console.print(render_status(snap))
    lines = console.file.getvalue().rstrip("\n").split("\n")
    assert max(len(line) for line in lines) <= 80
    assert any("E 108 ± 4 mJ/m²" in line for line in lines)
    assert any("W12: v 20.1 ± 0.2 pm/s along its normal, 30 frames" in line for line in lines)
