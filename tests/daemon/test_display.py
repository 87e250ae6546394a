"""The terminal display: readable in 80 x 24, pure function of the snapshot."""

import io

from rich.console import Console

from livequant.daemon.status import LastFrame, Snapshot, last_frame_from_summary
from livequant.display.status import format_duration, render_status, shorten_path


def _render(snap) -> list[str]:
    console = Console(file=io.StringIO(), width=80, height=24, color_system=None,
                      force_terminal=False, legacy_windows=False)
    console.print(render_status(snap))
    return console.file.getvalue().rstrip("\n").split("\n")


def _busy_snapshot():
    return Snapshot(
        state="running", session="/data/" + "deep/" * 30 + "session-2026-12-02",
        watch="/data/acq/today", counts={"queued": 12, "processing": 2, "done": 345,
                                         "quarantined": 3},
        uptime_s=3725, in_flight=2, settling=1, workers=2, frames_per_s=0.87, lag_s=14.2,
        last=LastFrame(frame_id="scan_0345", status="ok", n_columns=10112, a_pm=390.52,
                       b_pm=391.04, sigma_a_pm=0.21, angle_deg=90.02, mean_displacement_pm=12.3,
                       analyze_s=0.84, latency_s=1.31),
        warnings=tuple(f"10:0{k}:00 quarantined frame_{k}.tif: truncated " + "x" * 60
                       for k in range(8)),
        endpoints={"events": "tcp://127.0.0.1:5602", "commands": "tcp://127.0.0.1:5603",
                   "ingest": "tcp://127.0.0.1:5601"})


def test_busy_session_fits_80_by_24_and_shows_the_key_numbers():
    lines = _render(_busy_snapshot())
    assert len(lines) <= 24
    assert max(len(line) for line in lines) <= 80
    text = "\n".join(lines)
    for expected in ("running", "345 done", "12 queued", "2 in flight", "3 quarantined",
                     "0.87 frames/s", "lag 14.2 s", "10112 columns", "390.5 ± 0.2 pm",
                     "391.0 pm", "12.3 pm", "up 1:02:05", "session-2026-12-02"):
        assert expected in text, expected
    # only the five most recent warnings are shown
    assert "frame_7.tif" in text and "frame_3.tif" in text and "frame_2.tif" not in text


def test_empty_session_renders():
    snap = Snapshot(state="starting", session="/s", counts={})
    text = "\n".join(_render(snap))
    assert "no frame analysed yet" in text and "(socket only)" in text and "none" in text


def test_summary_to_last_frame():
    summary = {"frame_id": "f", "status": "ok", "n_columns": 7,
               "lattice": {"a_pm": 400.0, "b_pm": 401.0, "sigma_a_pm": 0.5, "angle_deg": 90.0},
               "cells": {"n_cells": 4, "descriptors": {
                   "d_pm": {"n": 4, "mean": 8.5, "median": 8.4, "median_sigma": 0.3},
                   "dx_pm": {"n": 4, "mean": -1.0}}},
               "timings_s": {"total": 0.5}}
    last = last_frame_from_summary(summary, latency_s=1.0)
    assert (last.a_pm, last.b_pm, last.mean_displacement_pm, last.analyze_s) == (
        400.0, 401.0, 8.5, 0.5)
    no_lattice = last_frame_from_summary({"frame_id": "g", "status": "no-lattice",
                                          "lattice": None, "n_columns": 0})
    assert no_lattice.a_pm is None and no_lattice.mean_displacement_pm is None


def test_helpers():
    assert format_duration(93.4) == "1:33" and format_duration(7384) == "2:03:04"
    assert shorten_path("/a/b/c", 80) == "/a/b/c"
    short = shorten_path("/x" * 100, 20)
    assert len(short) == 20 and short.startswith("...")


def test_status_line_for_logs():
    from livequant.daemon.core import status_line

    line = status_line(_busy_snapshot())
    assert line.startswith("[running] done 345, queued 12, processing 2, quarantined 3;")
    assert "0.87 frames/s" in line and "scan_0345: 10112 columns a=390.5pm" in line


def _decision_snapshot(n_proposals=6):
    base = _busy_snapshot()
    proposals = tuple({"id": f"p{k:04d}", "state": "open" if k < 4 else "accepted",
                       "score": 0.9 - 0.1 * k, "center_nm": [-98.25 + k, 66.5],
                       "size_nm": [6.0, 6.0], "reason": "vortex: winding +1 at the core of a "
                       "polar vortex seen in two frames " + "x" * 40}
                      for k in range(n_proposals))
    flags = tuple({"id": k, "frame_id": f"scan_{k:04d}", "rule": "topology", "kind": "vortex",
                   "score": 0.8, "message": f"flag message {k}"} for k in range(5))
    decisions = {"drift": {"velocity_nm_per_s": [0.012, -0.006], "sigma_v_nm_per_s": 0.001,
                           "pairs": 4}, "proposals": {"budget_left": 44}, "errors": 1,
                 "auto_accept": False}
    from dataclasses import replace

    return replace(base, proposals=proposals, flags=flags, decisions=decisions)


def test_proposals_table_and_flags_panel_fit_80_columns():
    lines = _render(_decision_snapshot())
    assert max(len(line) for line in lines) <= 80
    assert len(lines) <= 30
    text = "\n".join(lines)
    for expected in ("p0000", "p0003", "0.90", "-98.2, 66.5", "6.0 x 6.0", "vortex: winding",
                     "2 more: livequant proposals", "recent flags", "flag message 4",
                     "drift (+0.72, -0.36) nm/min", "44 proposals left", "1 errors"):
        assert expected in text, expected
    assert "p0004" not in text          # only four rows; the rest are counted
    assert "flag message 1" not in text  # the three newest flags
    flag_line = next(line for line in lines if "flag message 4" in line)
    assert "scan_0004" in flag_line and "vortex" in flag_line and "0.80" in flag_line
    assert "frame_3.tif" not in text and "frame_7.tif" in text  # two warnings only


def test_no_decisions_keeps_the_plain_panel():
    lines = _render(_busy_snapshot())
    assert "recent flags" not in "\n".join(lines)


def test_proposals_table_keeps_ids_and_scores_whole_beside_a_long_reason():
    from rich.console import Console

    from livequant.display.status import proposals_table

    rows = [{"id": "p0123", "state": "open", "score": 0.97, "center_nm": [-100.25, 67.1],
             "size_nm": [21.6, 4.0], "reason": "domain-wall: " + "long reason " * 20}]
    for width in (60, 80, 120):
        console = Console(width=width, color_system=None, record=True)
        console.print(proposals_table(rows, width=width))
        text = console.export_text()
        line = next(t for t in text.splitlines() if "p0123" in t)
        assert "0.97" in line and "21.6 x 4.0" in line
        # the centre gives way first below 80 columns, and the caption says so
        assert ("-100.2, 67.1" in line) == (width >= 80)
        assert ("not shown: centre nm" in text) == (width < 80)
        assert max(len(t) for t in text.splitlines()) <= width
