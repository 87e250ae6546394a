"""Overload, quick version of tests/bench_overload.py (which measures the real pipeline).

1. A real daemon process gets a burst of 200 frames of 256 x 256, written far
   faster than its one worker analyses them (a stand-in analysis taking 50 ms a
   frame, so the test is about the plumbing, not the fit).
2. Every frame is done exactly once; the lag the daemon reports rises while the
   backlog builds and drains back to 0, and the display shows it.
3. Memory is bounded: the daemon's peak resident memory (VmHWM) grows by far less
   than the burst it holds in its queue, because it queues paths, never pixels.
"""

import pytest

from tests.bench_overload import run_overload


@pytest.mark.slow
def test_a_burst_faster_than_analysis_is_all_done_and_the_lag_drains(tmp_path):
    r = run_overload(200, 256, workers=1, workdir=tmp_path,
                     analyze="tests.daemon._helpers:plain_analyze",
                     sidecar_extra={"sleep_s": 0.05})
    assert r["ledger_rows"] == r["done_exactly_once"] == 201  # + the warm-up frame
    assert r["arrival_over_analysis"] > 2  # it really was an overload
    assert r["max_queued"] >= 50 and r["max_lag_s"] > 1.0
    assert r["final_lag_s"] == 0.0
    lags = [lag for _, lag, _ in r["lag_series"]]
    assert max(lags) > lags[-1] == 0.0  # rose, then drained
    panel = r["display_mid_backlog"]
    assert "queued" in panel and "lag " in panel and " 0 queued" not in panel, panel
    burst_bytes = r["frames"] * r["frame_bytes"]  # 25 MiB
    # the daemon process holds paths, not pixels: its peak grows by well under the burst
    assert r["daemon_growth_frames"] * r["frame_bytes"] < 0.25 * burst_bytes, r
    assert r["growth_frames"] * r["frame_bytes"] < 0.5 * burst_bytes, r
