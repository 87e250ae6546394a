"""Per-frame output files: ``columns.csv``, ``cells.csv``, ``summary.json``.

Each file is written to a temporary name in the same folder and renamed into
place, so a reader never sees half a file and a crash never leaves one.
"""

from __future__ import annotations

import csv
import io
import os
from pathlib import Path

import numpy as np

from livequant.frames import write_json_atomic

__all__ = ["COLUMN_FIELDS", "write_frame_outputs", "columns_rows", "write_text_atomic",
           "read_columns_csv"]

COLUMN_FIELDS = ("x_px", "y_px", "x_pm", "y_pm", "sigma_x_pm", "sigma_y_pm", "amplitude",
                 "width_pm", "sublattice", "i", "j")


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    path = Path(path)
    tmp = path.with_name(f".{path.name}.part")
    with open(tmp, "w", encoding="utf-8", newline="") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def columns_rows(result) -> list[dict]:
    """One dict per column with the DESIGN.md fields (x = column axis, y = row axis)."""
    cols = result.columns
    if cols is None or len(cols) == 0:
        return []
    px = result.pixel_size_pm
    pos, sig = cols.positions_px, cols.sigma_positions_px
    width_pm = np.sqrt(cols.width_px[:, 0] * cols.width_px[:, 1]) * px
    rows = []
    for k in range(len(cols)):
        rows.append({
            "x_px": f"{pos[k, 1]:.4f}", "y_px": f"{pos[k, 0]:.4f}",
            "x_pm": f"{pos[k, 1] * px:.3f}", "y_pm": f"{pos[k, 0] * px:.3f}",
            "sigma_x_pm": f"{sig[k, 1] * px:.4f}", "sigma_y_pm": f"{sig[k, 0] * px:.4f}",
            "amplitude": f"{cols.amplitude[k]:.6g}", "width_pm": f"{width_pm[k]:.3f}",
            "sublattice": str(cols.sublattice[k]), "i": int(cols.ij[k, 0]), "j": int(cols.ij[k, 1]),
        })
    return rows


def _csv_text(fieldnames, rows) -> str:
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(fieldnames), lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return buf.getvalue()


def write_frame_outputs(result, frames_dir: str | os.PathLike) -> Path:
    """Write one frame's files under ``frames_dir/FRAME_ID/`` and return that folder.

    ``summary.json`` is written last: its presence means the other files are complete.
    """
    folder = Path(frames_dir) / result.frame_id
    folder.mkdir(parents=True, exist_ok=True)
    write_text_atomic(folder / "columns.csv", _csv_text(COLUMN_FIELDS, columns_rows(result)))
    cells = result.cells
    if cells is not None:
        write_text_atomic(folder / "cells.csv", _csv_text(cells.csv_fields(), cells.csv_rows()))
    write_json_atomic(folder / "summary.json", result.summary())
    return folder


def read_columns_csv(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """Read a ``columns.csv`` back into arrays (for tests, the report and replays)."""
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    out: dict[str, np.ndarray] = {}
    for name in COLUMN_FIELDS:
        values = [r[name] for r in rows]
        if name == "sublattice":
            out[name] = np.array(values, dtype=str)
        elif name in ("i", "j"):
            out[name] = np.array(values, dtype=int)
        else:
            out[name] = np.array(values, dtype=float)
    return out
