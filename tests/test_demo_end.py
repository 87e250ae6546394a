"""The demo ends when its work is done, not when its time is up."""

import pytest

from livequant.daemon.status import Snapshot
from livequant.demo import DemoOptions, run_demo, work_left


def _snap(**counts):
    base = {"queued": 0, "processing": 0, "done": 0, "quarantined": 0}
    base.update(counts)
    return Snapshot(state="running", session="/s", counts=base)


def test_work_left_names_what_the_demo_still_waits_for():
    done4 = _snap(done=4)
    kw = dict(acquired=4, revisits=0, survey_done=True, auto_accept=False)
    assert work_left(done4, {}, **{**kw, "survey_done": False}) == "the survey"
    assert work_left(_snap(done=3), {}, **kw) == "frames still being written"
    assert work_left(_snap(done=3, queued=1), {}, **kw) == "frames still being analysed"
    assert work_left(done4, {"accepted": 1}, **kw) == "accepted proposals not yet revisited"
    assert work_left(done4, {"open": 2}, **kw) == "open proposals waiting for the operator"
    assert work_left(done4, {"rejected": 2, "expired": 1}, **kw) is None
    # a revisit acquired and analysed: done
    assert work_left(_snap(done=5), {"accepted": 1}, **{**kw, "acquired": 5, "revisits": 1}) \
        is None
    assert work_left(done4, {}, **kw) is None


@pytest.mark.slow
def test_demo_with_nothing_left_to_do_ends_long_before_its_time(tmp_path):
    """Three survey frames, proposals off: once they are analysed the demo stops, far
    inside a generous --duration-s (it used to idle until the time was up)."""
    cfg = tmp_path / "c.toml"
    cfg.write_text("[proposals]\nenabled = false\n")
    opts = DemoOptions(session=str(tmp_path / "s"), duration_s=400.0, frames=3,
                       shape_px=(384, 384), cadence_s=1.0, workers=1, report=False,
                       config_file=str(cfg))
    out = run_demo(opts)
    assert out.instrument_error is None and out.n_survey_frames == 3
    assert out.counts["done"] == 3
    assert out.elapsed_s < 200.0, out.elapsed_s
