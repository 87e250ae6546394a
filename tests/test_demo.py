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


@pytest.mark.slow
def test_demo_flags_the_vortex_revisits_it_and_reports(tmp_path):
    """End to end on the simulated instrument, as the README's first command runs it:
    1. two survey frames over the demo film's vortex-antivortex pair (invented scenario,
       sim_instrument/scenarios/demo.toml; its truth: cores at x = -100 and -90 nm);
    2. the rules flag the vortex core where the truth has it (within 0.5 nm, about one
       PbTiO3 cell, after the specimen's drift at that frame);
    3. with auto-accept the proposal goes out as a scan-request, the simulated instrument
       acquires it, and the revisit frame's truth has the core inside it;
    4. the session report is written from the demo session: every figure a valid PNG."""
    from matplotlib.image import imread

    cfg = tmp_path / "demo.toml"
    # the operator's threshold for proposing, lowered so that one weak-dose frame suffices;
    # two frames measure no drift pair, so a core would wait for the drift model before
    # auto-accept (tests/daemon/test_decision_quality_units.py): this test is about placement
    cfg.write_text("[proposals]\nmin_score = 0.1\nauto_accept_min_drift_pairs = 0\n")
    session = tmp_path / "s"
    opts = DemoOptions(session=str(session), duration_s=25.0, frames=2, shape_px=(768, 768),
                       cadence_s=2.0, auto_accept=True, workers=2, config_file=str(cfg))
    out = run_demo(opts)
    assert out.instrument_error is None and out.report_error is None
    with Ledger(session / "ledger.sqlite", readonly=True) as ledger:
        flags = ledger.flags()
        proposals = list(ledger.proposals())
        decisions = ledger.decisions()

    def truth(frame_id):
        return json.loads((session / "truth" / f"{frame_id}.json").read_text())

    hits = []
    for f in flags:
        if f["kind"] != "vortex" or not f["frame_id"].startswith("survey"):
            continue
        t = truth(f["frame_id"])
        core = next(c for c in t["vortex_cores"] if c["winding"] == 1)
        drift = np.mean([t["drift"]["offset_start_nm"], t["drift"]["offset_end_nm"]], axis=0)
        stage = f["payload"]["region_stage"]
        hits.append(np.hypot(stage["center_x_nm"] - (core["xy_nm"][0] + drift[0]),
                             stage["center_y_nm"] - (core["xy_nm"][1] + drift[1])))
    assert hits and min(hits) < 0.5, hits

    accepted = [p for p in proposals if p["state"] == "accepted"]
    assert accepted and all(d["decided_by"] == "auto" for d in decisions)
    assert out.n_revisit_frames >= 1
    revisits = sorted((session / "truth").glob("req_*.json"))
    assert revisits
    first = json.loads(revisits[0].read_text())
    assert any(c["in_frame"] for c in first["vortex_cores"])

    index = session / "report" / "index.html"
    assert out.report == str(index) and index.exists()
    html = index.read_text(encoding="utf-8")
    import re
    srcs = re.findall(r'src="([^"]+)"', html)
    assert srcs
    for src in srcs:
        png = session / "report" / src
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", src
        assert imread(png).ndim == 3
