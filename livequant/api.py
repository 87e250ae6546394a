"""The Python interface for notebooks: :func:`analyze` one image, :func:`open_session`.

Both are reachable as ``livequant.analyze`` and ``livequant.open_session``;
this module is imported only when one of them is first used, so ``import
livequant`` stays light.

Tables come back as pandas DataFrames when pandas is installed, otherwise as
numpy record arrays (``table.x_pm``, ``table["sublattice"]``); pass
``as_pandas=False`` for record arrays always.

Example
-------
A synthetic SrTiO3 [001] HAADF frame (a = 390.53 pm, CHECK-VALUES section 1),
analysed in one call::

    import livequant
    from livequant.synthetic import perovskite_frame

    ex = perovskite_frame(shape=(256, 256), a_pm=390.53, pixel_size_pm=9.37,
                          rotation_deg=12.0, sigma_pm=42.0, peak_a=300.0, peak_b=120.0,
                          background=30.0, seed=7)
    res = livequant.analyze(ex.pixels, pixel_size_pm=9.37, detector="HAADF",
                            material="SrTiO3")
    print(res.lattice["a_pm"], len(res.columns), len(res.cells))
    res.columns[res.columns["sublattice"] == "B"]     # with pandas

    session = livequant.open_session("livequant-session")
    session.cells.groupby("frame_id")["dx_pm"].mean()  # with pandas

``examples/notebook_api.py`` runs this example (the test suite runs it too).
"""

from __future__ import annotations

import importlib.util
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["analyze", "open_session", "Analysis", "Session", "COLUMN_TABLE_FIELDS"]

#: Fields of :attr:`Analysis.columns`: those of ``columns.csv``, then ``converged``.
COLUMN_TABLE_FIELDS = ("x_px", "y_px", "x_pm", "y_pm", "sigma_x_pm", "sigma_y_pm", "amplitude",
                       "width_pm", "sublattice", "i", "j", "background", "reduced_chi2",
                       "converged")


def _has_pandas() -> bool:
    return importlib.util.find_spec("pandas") is not None


def _table(columns: dict[str, np.ndarray], as_pandas: bool | None):
    """A DataFrame (pandas installed, unless `as_pandas` is False) or a record array."""
    if as_pandas is None:
        as_pandas = _has_pandas()
    if as_pandas:
        import pandas as pd

        return pd.DataFrame(columns)
    if not columns:
        return np.rec.array(np.empty(0, dtype=[]))
    names = list(columns)
    return np.rec.fromarrays([np.asarray(columns[n]) for n in names], names=names)


@dataclass(frozen=True)
class Analysis:
    """The result of :func:`analyze`.

    Attributes
    ----------
    result : livequant.pipeline.FrameResult
        Everything the pipeline found (lattice, columns, cells objects).
    summary : dict
        The frame's ``summary.json`` content.
    lattice : dict or None
        Lattice parameters: ``a_pm``, ``sigma_a_pm``, ``b_pm``, ``sigma_b_pm``,
        ``angle_deg``, ``sigma_angle_deg``, ``orientation_deg``, ...
    columns : DataFrame or record array
        One row per atomic column; :data:`COLUMN_TABLE_FIELDS` (x = image column
        axis, y = row axis; ``sigma_`` one-sigma uncertainties), full precision.
    cells : DataFrame or record array
        One row per unit cell: ``i``, ``j``, ``x_pm``, ``y_pm`` and every
        descriptor of ``cells.csv`` with its ``sigma_`` (NaN where not available).
    """

    result: Any
    summary: dict
    lattice: dict | None
    columns: Any
    cells: Any

    @property
    def ok(self) -> bool:
        """True when a lattice was found and columns fitted."""
        return self.result.ok

    def write(self, folder: str | os.PathLike) -> Path:
        """Write ``columns.csv``, ``cells.csv``, ``summary.json`` (as the daemon does)
        under ``folder/FRAME_ID/`` and return that folder."""
        from livequant.outputs import write_frame_outputs

        return write_frame_outputs(self.result, folder)


def analyze(image, pixel_size_pm: float | None = None, *, detector: str | None = None,
            material: str | None = None, settings=None, frame_id: str = "notebook",
            as_pandas: bool | None = None, **metadata) -> Analysis:
    """Analyse one image: lattice, every atomic column with its uncertainty, unit cells.

    The same analysis as ``livequant analyze`` and the daemon
    (:func:`livequant.pipeline.analyze_frame`).

    Parameters
    ----------
    image : array_like or path
        A 2D image (integer or float counts), or the path of a frame file (or
        ``FILE#KEY`` of one image of a container); a file's sidecar metadata
        is used, and the arguments given here override it.
    pixel_size_pm : float, optional
        Calibrated pixel size, picometres (required unless a sidecar,
        container or the configuration gives one).
    detector : str, optional
        ``"HAADF"`` (default), ``"ABF"``, ``"BF"``...: bright-field images have
        dark columns.
    material : str, optional
        A material of ``config/materials.toml`` (e.g. ``"SrTiO3"``): turns
        displacements into polarization and checks the calibration.
    settings : livequant.config.Settings, optional
        Full settings (default: the configuration files and ``LIVEQUANT_*``
        variables, as the command line reads them).
    frame_id : str
        Name of the frame in the summary and in :meth:`Analysis.write`.
    as_pandas : bool, optional
        Tables as pandas DataFrames (default: when pandas is installed) or
        numpy record arrays (False).
    **metadata
        Other sidecar keys: ``dwell_time_us``, ``stage_x_nm``, ``stage_y_nm``,
        ``scan_rotation_deg``, ``acquired_at``, ...

    Returns
    -------
    Analysis

    Raises
    ------
    livequant.FrameError
        For an unusable image (not 2D, NaN, constant, too small) or no pixel
        size, with the reason in ``.reason``.
    livequant.config.ConfigError
        For an unknown material or detector setting.

    Examples
    --------
    >>> import livequant
    >>> from livequant.synthetic import perovskite_frame
    >>> ex = perovskite_frame(shape=(256, 256), a_pm=390.53, pixel_size_pm=9.37,
    ...                       rotation_deg=12.0, sigma_pm=42.0, peak_a=300.0, peak_b=120.0,
    ...                       background=30.0, seed=7)
    >>> res = livequant.analyze(ex.pixels, pixel_size_pm=9.37, material="SrTiO3",
    ...                         as_pandas=False)
    >>> abs(res.lattice["a_pm"] - 390.53) < 2.0
    True
    """
    from livequant.config import load_settings
    from livequant.frames import Sidecar, frame_from_array, resolve_meta
    from livequant.pipeline import analyze_frame

    if settings is None:
        settings = load_settings(overrides={"analysis.material": material})
    elif material is not None:
        settings = settings.model_copy(update={"analysis": settings.analysis.model_copy(
            update={"material": material})})
    given = {k: v for k, v in dict(metadata, pixel_size_pm=pixel_size_pm,
                                   detector=detector).items() if v is not None}
    defaults = settings.frame_defaults.as_dict()
    if isinstance(image, (str, os.PathLike)):
        from livequant.containers import read_any

        frame = read_any(image, defaults={**defaults, **given})
        if given:  # arguments override the file's own metadata
            from dataclasses import replace

            meta = replace(frame.meta, **{k: v for k, v in given.items()
                                          if k in frame.meta.__dataclass_fields__})
            frame = frame_from_array(frame.pixels, meta, path=frame.path)
    else:
        sidecar = Sidecar.parse({"frame_id": frame_id, **given}, where="livequant.analyze")
        meta = resolve_meta(sidecar, default_id=frame_id, defaults=defaults,
                            where="livequant.analyze")
        frame = frame_from_array(np.asarray(image), meta)
    result = analyze_frame(frame, settings)
    return Analysis(result=result, summary=result.summary(), lattice=result.lattice_summary(),
                    columns=_table(_column_arrays(result), as_pandas),
                    cells=_table(_cell_arrays(result), as_pandas))


def _column_arrays(result) -> dict[str, np.ndarray]:
    cols = result.columns
    if cols is None or len(cols) == 0:
        return {n: np.empty(0) for n in COLUMN_TABLE_FIELDS}
    px = result.pixel_size_pm
    pos, sig = cols.positions_px, cols.sigma_positions_px
    return {"x_px": pos[:, 1], "y_px": pos[:, 0], "x_pm": pos[:, 1] * px, "y_pm": pos[:, 0] * px,
            "sigma_x_pm": sig[:, 1] * px, "sigma_y_pm": sig[:, 0] * px,
            "amplitude": np.asarray(cols.amplitude, float),
            "width_pm": np.sqrt(cols.width_px[:, 0] * cols.width_px[:, 1]) * px,
            "sublattice": np.asarray(cols.sublattice).astype(str),
            "i": cols.ij[:, 0].astype(np.int64), "j": cols.ij[:, 1].astype(np.int64),
            "background": np.asarray(cols.background, float),
            "reduced_chi2": np.asarray(cols.reduced_chi2, float),
            "converged": np.asarray(cols.converged, bool)}


def _cell_arrays(result) -> dict[str, np.ndarray]:
    c = result.cells
    if c is None or len(c) == 0:
        return {n: np.empty(0) for n in ("i", "j", "x_pm", "y_pm")}
    out = {"i": np.asarray(c.i, np.int64), "j": np.asarray(c.j, np.int64),
           "x_pm": np.asarray(c.x_pm, float), "y_pm": np.asarray(c.y_pm, float)}
    for name in c.csv_fields()[4:]:
        out[name] = np.asarray(c.values[name], float)
    return out


@dataclass(frozen=True)
class Session:
    """A session folder read for a notebook (:func:`open_session`).

    Attributes
    ----------
    path : Path
    cells, columns : DataFrame or record array
        One row per cell / atomic column of every done frame, ``frame_id``
        first (``cells.parquet`` / ``columns.parquet``; gathered from the
        per-frame files when the session has no Parquet tables yet).
    frames : DataFrame or record array
        The ledger: one row per frame seen (path, frame_id, state, reason,
        message, attempts, done_count, times).
    flags : DataFrame or record array
        Every rule finding (frame_id, rule, kind, score, region, payload).
    """

    path: Path
    cells: Any
    columns: Any
    frames: Any
    flags: Any


def open_session(path: str | os.PathLike, *, as_pandas: bool | None = None) -> Session:
    """Read a session's tables and its ledger (read-only; a running daemon is not disturbed).

    Parameters
    ----------
    path : path-like
        The session folder (``livequant run --session`` or ``reprocess --session``).
    as_pandas : bool, optional
        DataFrames (default: when pandas is installed) or numpy record arrays.

    Returns
    -------
    Session

    Raises
    ------
    FileNotFoundError
        When the folder holds no ``ledger.sqlite``.
    """
    import pyarrow.parquet as pq

    from livequant.daemon.ledger import Ledger
    from livequant.tables import TABLES, session_tables

    root = Path(path)
    with Ledger(root / "ledger.sqlite", readonly=True) as ledger:
        rows = ledger.rows()
        flags = ledger.flags()
    have = all((root / f"{name}.parquet").is_file() for name in TABLES)
    tables = ({name: pq.read_table(root / f"{name}.parquet") for name in TABLES} if have
              else session_tables(root, [r.frame_id for r in rows
                                         if r.state == "done" and r.frame_id]))
    frame_fields = ("seq", "path", "frame_id", "state", "reason", "message", "attempts",
                    "done_count", "version", "complete_at", "started_at", "finished_at")
    frames = {f: np.array([getattr(r, f) for r in rows], dtype=object if f in
                          ("path", "frame_id", "state", "reason", "message", "started_at",
                           "finished_at") else None) for f in frame_fields}
    flag_fields = ("id", "frame_id", "rule", "kind", "score", "region", "payload", "created_at")
    flag_cols = {f: np.array([fl[f] for fl in flags], dtype=object) for f in flag_fields}
    return Session(path=root,
                   cells=_table(_arrow_columns(tables["cells"]), as_pandas),
                   columns=_table(_arrow_columns(tables["columns"]), as_pandas),
                   frames=_table(frames, as_pandas), flags=_table(flag_cols, as_pandas))


def _arrow_columns(table) -> dict[str, np.ndarray]:
    return {name: table.column(name).to_numpy(zero_copy_only=False)
            for name in table.column_names}
