"""Per-frame output files: ``columns.csv``, ``cells.csv``, ``summary.json``.

Each file is written to a temporary name in the same folder and renamed into
place, so a reader never sees half a file and a crash never leaves one.
"""

from __future__ import annotations

import csv
import os
from pathlib import Path

import numpy as np

from livequant.frames import write_json_atomic, write_text_atomic
from livequant.schema import schema_json

__all__ = ["COLUMN_FIELDS", "COLUMN_EXTRA_FIELDS", "write_frame_outputs", "columns_rows",
           "write_text_atomic", "read_columns_csv"]

#: The columns of ``columns.csv`` that DESIGN.md lists, first and in this order.
COLUMN_FIELDS = ("x_px", "y_px", "x_pm", "y_pm", "sigma_x_pm", "sigma_y_pm", "amplitude",
                 "width_pm", "sublattice", "i", "j")
#: Extra columns after them (fit quality, for the report): the fitted local background
#: under the column (counts per pixel), the reduced chi-square of its fit window, and the
#: column's significance |amplitude| / sigma(amplitude) (a weak column at low dose is
#: kept and fitted where the lattice puts it; this says how weak).  Files written before
#: these existed lack them; :func:`read_columns_csv` gives NaN then.
COLUMN_EXTRA_FIELDS = ("background", "reduced_chi2", "significance")


def _column_table(result) -> list[list[str]]:
    """The columns of ``columns.csv`` as lists of text, one list per field.

    The DESIGN.md fields first (:data:`COLUMN_FIELDS`), then :data:`COLUMN_EXTRA_FIELDS`.
    """
    cols = result.columns
    if cols is None or len(cols) == 0:
        return [[] for _ in COLUMN_FIELDS + COLUMN_EXTRA_FIELDS]
    px = result.pixel_size_pm
    pos, sig = cols.positions_px, cols.sigma_positions_px
    width_pm = np.sqrt(cols.width_px[:, 0] * cols.width_px[:, 1]) * px

    def fmt(spec, values):
        return [spec % v for v in values.tolist()]

    # x is the column axis, y the row axis (DESIGN.md); %-formatting over lists is
    # several times faster than csv.DictWriter over one dict per column
    return [fmt("%.4f", pos[:, 1]), fmt("%.4f", pos[:, 0]),
            fmt("%.3f", pos[:, 1] * px), fmt("%.3f", pos[:, 0] * px),
            fmt("%.4f", sig[:, 1] * px), fmt("%.4f", sig[:, 0] * px),
            fmt("%.6g", cols.amplitude), fmt("%.3f", width_pm),
            [str(v) for v in cols.sublattice.tolist()],
            [str(v) for v in cols.ij[:, 0].tolist()], [str(v) for v in cols.ij[:, 1].tolist()],
            fmt("%.6g", cols.background), fmt("%.6g", cols.reduced_chi2),
            fmt("%.4g", _significance(cols))]


def _significance(cols) -> np.ndarray:
    """|amplitude| / sigma(amplitude); NaN where the fit failed."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.abs(cols.amplitude) / cols.sigma_amplitude


def columns_rows(result) -> list[dict]:
    """One dict per column with the DESIGN.md fields and the extra ones (x = column axis,
    y = row axis)."""
    return [dict(zip(COLUMN_FIELDS + COLUMN_EXTRA_FIELDS, row))
            for row in zip(*_column_table(result))]


def _csv_text(fieldnames, table_columns) -> str:
    """CSV text from a header and one list of already formatted text per field."""
    lines = [",".join(fieldnames)]
    lines += [",".join(row) for row in zip(*table_columns)]
    return "\n".join(lines) + "\n"


def write_frame_outputs(result, frames_dir: str | os.PathLike) -> Path:
    """Write one frame's files under ``frames_dir/FRAME_ID/`` and return that folder.

    ``columns.csv``, ``cells.csv`` (when there are cells), ``schema.json`` (the unit and
    definition of every field, :mod:`livequant.schema`) and ``summary.json``.

    ``summary.json`` is written last: its presence means the other files are complete.
    """
    folder = Path(frames_dir) / result.frame_id
    folder.mkdir(parents=True, exist_ok=True)
    write_text_atomic(folder / "columns.csv",
                      _csv_text(COLUMN_FIELDS + COLUMN_EXTRA_FIELDS, _column_table(result)))
    cells = result.cells
    if cells is not None:
        fields = cells.csv_fields()
        rows = cells.csv_rows()
        table = [[str(r[f]) for r in rows] for f in fields]
        write_text_atomic(folder / "cells.csv", _csv_text(fields, table))
    write_text_atomic(folder / "schema.json", schema_json())  # every field: unit, definition
    write_json_atomic(folder / "summary.json", result.summary())
    return folder


def read_columns_csv(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """Read a ``columns.csv`` back into arrays (for tests, the report and replays).

    Every field of :data:`COLUMN_FIELDS` must be there (a clear error otherwise);
    an extra field missing from an older file comes back as NaN.
    """
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        rows = list(reader)
        header = reader.fieldnames or []
    missing = [f for f in COLUMN_FIELDS if f not in header]
    if missing:
        raise ValueError(f"{path}: not a livequant columns.csv, it lacks the column(s) "
                         f"{', '.join(missing)} (header: {', '.join(header) or 'empty'})")
    out: dict[str, np.ndarray] = {}
    for name in COLUMN_FIELDS + COLUMN_EXTRA_FIELDS:
        if name not in header:
            out[name] = np.full(len(rows), np.nan)
            continue
        values = [r[name] for r in rows]
        if name == "sublattice":
            out[name] = np.array(values, dtype=str)
        elif name in ("i", "j"):
            out[name] = np.array(values, dtype=int)
        else:
            out[name] = np.array(values, dtype=float)
    return out
