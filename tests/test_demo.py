"""`livequant demo`: the simulated instrument and the daemon run the loop end to end."""

import json

import numpy as np
import pytest

from livequant.cli import main
from livequant.daemon import Ledger
from livequant.demo import DemoOptions, run_demo, tour_positions


def test_tour_frames_overlap_by_the_requested_amount_and_visit_the_features():
    tour = tour_positions(14, fov_nm=20.0, overlap_nm=6.0)
    steps = np.abs(np.diff(tour, axis=0)).max(axis=1)
    np.testing.assert_allclose(steps, 14.0)          # 20 nm frames, 6 nm overlap
    # The demo scenario's vortex pair (-100..-90, 60) and its wall at x = -40 nm
    # (sim_instrument/scenarios/demo.toml) lie inside the tour's frames.
    def covered(x, y):
        return np.any((np.abs(tour[:, 0] - x) < 10) & (np.abs(tour[:, 1] - y) < 10))
    assert covered(-100, 60) and covered(-90, 60) and covered(-40, 60) and covered(-40, -56)
    with pytest.raises(ValueError, match="overlap"):
        tour_positions(3, fov_nm=5.0, overlap_nm=6.0)


@pytest.mark.slow
def test_demo_runs_the_loop_and_ends_by_itself(tmp_path):
    """1. the demo surveys three small frames; 2. the daemon analyses each exactly once;
    3. it stops by itself and the summary matches the ledger."""
    opts = DemoOptions(session=str(tmp_path / "s"), duration_s=8.0, frames=3, shape_px=(384, 384),
                       cadence_s=1.0, workers=1, report=False)
    out = run_demo(opts)
    assert out.instrument_error is None
    assert out.n_survey_frames == 3
    with Ledger(tmp_path / "s" / "ledger.sqlite", readonly=True) as ledger:
        rows = ledger.rows()
        assert out.counts == ledger.counts()
    assert len(rows) == 3 and all(r.state == "done" and r.done_count == 1 for r in rows)
    for r in rows:
        summary = json.loads((tmp_path / "s" / "frames" / r.frame_id / "summary.json").read_text())
        assert summary["status"] == "ok"
        # The demo film is PbTiO3 on SrTiO3: the in-plane parameter is the substrate's
        # (coherent growth; CHECK-VALUES section 1, SrTiO3 a = 390.5 pm).
        assert summary["lattice"]["a_pm"] == pytest.approx(390.5, abs=3.0)


def test_demo_command_rejects_bad_arguments(capsys):
    assert main(["demo", "--frames", "0", "--no-console"]) == 2
    assert "--frames" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["demo", "--size", "12"])
    assert exc.value.code == 2
