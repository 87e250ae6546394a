"""Session-wide tables: every done frame's ``cells.csv`` / ``columns.csv`` in one Parquet file.

``SESSION/cells.parquet`` and ``SESSION/columns.parquet`` hold one row per cell
(per column) of every frame the ledger records as done, with ``frame_id`` as
the first field and then the per-frame file's fields, in its units and with
the same numbers (the per-frame CSV files are the source).  A notebook opens
one in one line::

    import pyarrow.parquet as pq
    cells = pq.read_table("SESSION/cells.parquet").to_pandas()

(or :func:`livequant.open_session`).  Both files are written atomically.
"""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["TABLES", "session_tables", "write_session_tables"]

#: table name -> the per-frame file it gathers
TABLES = {"cells": "cells.csv", "columns": "columns.csv"}

_INT_FIELDS = ("i", "j")
_TEXT_FIELDS = ("sublattice",)


def _read_csv(path: Path, frame_id: str):
    import pyarrow as pa
    import pyarrow.csv as pacsv

    with open(path, encoding="utf-8") as fh:
        header = fh.readline().strip().split(",")
    types = {name: (pa.int64() if name in _INT_FIELDS else pa.string() if name in _TEXT_FIELDS
                    else pa.float64()) for name in header if name}
    try:
        table = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(column_types=types))
    except pa.ArrowInvalid:
        # a field that is not a number (a newer descriptor): let Arrow infer this file
        table = pacsv.read_csv(path)
    ids = pa.array([frame_id] * table.num_rows, pa.string())
    return table.add_column(0, "frame_id", ids)


def session_tables(session: str | os.PathLike, frame_ids=None) -> dict:
    """``{"cells": pyarrow.Table, "columns": pyarrow.Table}`` of a session's done frames.

    Parameters
    ----------
    session : path-like
        The session folder.
    frame_ids : iterable of str, optional
        The frames to gather (default: every frame the ledger records as done,
        in the order they were found).  A frame with no such file (no cells in
        it) adds no rows.
    """
    import pyarrow as pa

    session = Path(session)
    if frame_ids is None:
        from livequant.daemon.ledger import Ledger

        with Ledger(session / "ledger.sqlite", readonly=True) as ledger:
            frame_ids = [r.frame_id for r in ledger.rows(state="done") if r.frame_id]
    frame_ids = list(dict.fromkeys(frame_ids))
    out = {}
    for name, filename in TABLES.items():
        parts = []
        for fid in frame_ids:
            path = session / "frames" / fid / filename
            if path.is_file():
                parts.append(_read_csv(path, fid))
        if parts:
            out[name] = pa.concat_tables(parts, promote_options="permissive")
        else:
            out[name] = pa.table({"frame_id": pa.array([], pa.string())})
    return out


def write_session_tables(session: str | os.PathLike, frame_ids=None) -> dict:
    """Write ``cells.parquet`` and ``columns.parquet`` into the session; return their rows.

    Returns ``{"cells": {"path": ..., "rows": n}, "columns": {...}}``.
    """
    import pyarrow.parquet as pq

    session = Path(session)
    info = {}
    for name, table in session_tables(session, frame_ids).items():
        final = session / f"{name}.parquet"
        tmp = session / f".{name}.parquet.part"
        try:
            pq.write_table(table, tmp)
            os.replace(tmp, final)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        info[name] = {"path": str(final), "rows": table.num_rows}
    return info
