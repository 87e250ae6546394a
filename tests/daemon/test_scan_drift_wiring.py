"""The daemon's measured drift reaches the workers, which undo it inside each frame."""

import json

import pytest

from livequant.config import load_settings
from livequant.daemon import worker
from livequant.daemon.decisions import DecisionLoop
from livequant.daemon.ledger import Ledger
from livequant.frames import write_frame
from tests.daemon.test_expiry import _NoRules, _Publisher


def test_drift_velocity_is_offered_once_enough_pairs_are_measured(tmp_path):
    ledger = Ledger(tmp_path / "ledger.sqlite")
    loop = DecisionLoop(load_settings(), ledger, _Publisher(), rules=_NoRules())
    assert loop.drift_velocity(min_pairs=2) is None
    # two frame pairs, each 10 s apart, both moved by (0.3, -0.1) nm: 0.03, -0.01 nm/s
    loop.model.add_pair(0.0, 10.0, (0.3, -0.1), 0.005)
    assert loop.drift_velocity(min_pairs=2) is None
    loop.model.add_pair(10.0, 20.0, (0.3, -0.1), 0.005)
    vx, vy = loop.drift_velocity(min_pairs=2)
    assert vx == pytest.approx(0.03, abs=2e-3) and vy == pytest.approx(-0.01, abs=2e-3)
    ledger.close()


def _one_frame(tmp_path, acq):
    folder = tmp_path / "watch"
    folder.mkdir()
    side = {k: acq.sidecar[k] for k in ("frame_id", "pixel_size_pm", "dwell_time_us",
                                        "scan_rotation_deg")}
    write_frame(folder, "f1", acq.pixels, side)
    return str(folder / "f1.tif")


def _stand_in(frame, settings):
    """A user analysis without the scan-drift argument (it must still be called)."""
    from livequant.pipeline import analyze_frame

    return analyze_frame(frame, settings)


@pytest.mark.parametrize("analyze, corrected", [("livequant.pipeline:analyze_frame", True),
                                                 (_stand_in, False)])
def test_the_worker_passes_the_velocity_to_an_analysis_that_takes_it(tmp_path, analyze,
                                                                     corrected):
    from sim_instrument.quick import perovskite_frame

    acq = perovskite_frame("SrTiO3", (256, 256), pixel_size_pm=16.0, dwell_time_us=4.0,
                           drift_nm_per_s=(0.06, 0.09), seed=2, frame_id="f1")
    path = _one_frame(tmp_path, acq)
    (tmp_path / "frames").mkdir()
    import signal

    previous = signal.getsignal(signal.SIGINT)  # init_worker ignores Ctrl+C, as a worker should
    try:
        worker.init_worker(load_settings(), analyze, str(tmp_path / "frames"))
        out = worker.process_path(path, (0.06, 0.09))
    finally:
        signal.signal(signal.SIGINT, previous)
    assert out.state == "done", out.message
    summary = json.loads((tmp_path / "frames" / "f1" / "summary.json").read_text())
    if corrected:
        assert summary["scan_drift_correction"]["applied"] is True
        assert summary["lattice"]["b_pm"] == pytest.approx(390.53, abs=0.5)
    else:
        assert "scan_drift_correction" not in summary
