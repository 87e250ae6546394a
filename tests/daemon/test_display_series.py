"""The display's series line: depth, frames left out, precision gain, within 80 columns."""

from rich.console import Console

from livequant.daemon.status import Snapshot
from livequant.display.status import render_status, series_line


def _render(renderable) -> str:
    console = Console(width=80, record=True, color_system=None)
    console.print(renderable)
    return console.export_text()


def test_series_line_shows_depth_exclusions_and_gain():
    rows = ({"series_id": "run-a", "kind": "average", "depth": 16, "n_excluded": 1,
             "precision_gain": 3.96},
            {"series_id": "pair-b", "kind": "orthogonal", "depth": 2, "n_excluded": 0})
    text = series_line(rows).plain
    assert text == "run-a 16 frames, 1 out, precision x4.0  |  pair-b pair"


def test_status_panel_has_a_series_row_within_80_columns():
    snap = Snapshot(state="running", session="/s", counts={"done": 3}, series=(
        {"series_id": "a-very-long-series-name-from-the-acquisition-software-0001",
         "kind": "average", "depth": 12, "n_excluded": 2, "precision_gain": 3.4},
        {"series_id": "b", "kind": "average", "depth": 3}))
    out = _render(render_status(snap))
    lines = out.splitlines()
    assert any(line.strip("│ ").startswith("series") for line in lines)
    assert max(len(line) for line in lines) <= 80
    # without series, no row
    assert "series" not in _render(render_status(Snapshot(state="running", session="/s",
                                                          counts={})))
