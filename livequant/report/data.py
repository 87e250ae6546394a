"""Gather what the session report shows: ledger tables, per-frame files, the fit bound.

Nothing here draws.  :func:`load_session` reads ``SESSION/ledger.sqlite`` (read
only) and the events file; :func:`load_frame` reads one frame's
``columns.csv``, ``cells.csv``, ``summary.json`` and, when it is still on
disk, the image.  The decision-loop tables (flags, proposals, decisions,
drift) may be empty and their payloads may lack keys: every reader here
treats a missing piece as "not known" and never fails the report over it.
"""

from __future__ import annotations

import csv
import json
import logging
import math
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from livequant.daemon.ledger import LEDGER_NAME, STATES, Ledger
from livequant.outputs import read_columns_csv
from livequant.proposals.geometry import FrameGeometry, rect_corners

__all__ = ["SessionData", "FrameData", "FrameRecord", "load_session", "load_frame",
           "frames_of_interest", "read_cells_csv", "thompson_sigma_pm", "column_crlb_pm",
           "frame_to_stage", "frame_footprint_nm", "region_corners_px", "region_corners_nm", "stage_region_corners_nm",
           "SessionError", "fmt_time", "payload_get"]

log = logging.getLogger("livequant.report")


class SessionError(ValueError):
    """The folder is not a session the report can read (no ledger, unreadable ledger)."""


@dataclass(frozen=True)
class FrameRecord:
    """One row of the ledger's ``frames`` table, with the timings the report plots."""

    seq: int
    path: str
    frame_id: str | None
    state: str
    reason: str | None
    message: str | None
    complete_at: float
    queued_at: float
    started_at: float | None
    finished_at: float | None
    read_s: float | None
    analyze_s: float | None
    write_s: float | None

    @property
    def lag_s(self) -> float | None:
        """Seconds from "complete on disk" to "outputs written" (None when not finished)."""
        if self.finished_at is None:
            return None
        return self.finished_at - self.complete_at


@dataclass
class SessionData:
    """Everything the report needs from the ledger and the events file of one session."""

    root: Path
    frames: list[FrameRecord]
    counts: dict[str, int]
    flags: list[dict]
    proposals: list[dict]
    decisions: list[dict]
    drift: list[dict]
    event_counts: dict[str, int]
    problems: list[str] = field(default_factory=list)

    @property
    def t0(self) -> float | None:
        """Session start: the earliest time anything was recorded (unix seconds)."""
        times = [f.complete_at for f in self.frames]
        times += [f["created_at"] for f in self.flags if f.get("created_at") is not None]
        times += [p["created_at"] for p in self.proposals if p.get("created_at") is not None]
        return min(times) if times else None

    def frame_dir(self, frame_id: str) -> Path:
        return self.root / "frames" / frame_id

    def done_ids(self) -> list[str]:
        """Frame ids of done frames, in the order they became known."""
        return [f.frame_id for f in self.frames if f.state == "done" and f.frame_id]


_FRAME_SQL = ("SELECT seq, path, frame_id, state, reason, message, complete_at, queued_at, "
              "started_at, finished_at, read_s, analyze_s, write_s FROM frames ORDER BY seq")


def load_session(root: str | Path) -> SessionData:
    """Read a session folder's ledger (read only) and count its events by topic.

    Raises
    ------
    SessionError
        When `root` is not a folder or holds no readable ledger.
    """
    root = Path(root).expanduser().resolve()
    if not root.is_dir():
        raise SessionError(f"session {root} is not a folder; give the folder `livequant run "
                           "--session` wrote to")
    path = root / LEDGER_NAME
    if not path.exists():
        raise SessionError(f"{root} holds no {LEDGER_NAME}; is this a session folder? (the "
                           "daemon creates it when it starts)")
    problems: list[str] = []
    try:
        with Ledger(path, readonly=True) as led:
            counts = led.counts()
            frames = _frame_records(path)
            flags = _guarded(led.flags, "flags", problems)
            proposals = _guarded(lambda: list(led.proposals()), "proposals", problems)
            decisions = _guarded(led.decisions, "decisions", problems)
            drift = _guarded(led.drift, "drift", problems)
    except (sqlite3.Error, RuntimeError) as exc:
        raise SessionError(f"{path}: cannot read the ledger ({exc})") from exc
    return SessionData(root=root, frames=frames, counts={s: counts.get(s, 0) for s in STATES},
                       flags=flags, proposals=proposals, decisions=decisions, drift=drift,
                       event_counts=_event_counts(root / "events.jsonl", problems),
                       problems=problems)


def _frame_records(path: Path) -> list[FrameRecord]:
    """The frames table with its timings (``LedgerRow`` leaves out read/analyze/write)."""
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10)
    try:
        return [FrameRecord(*r) for r in db.execute(_FRAME_SQL).fetchall()]
    finally:
        db.close()


def _guarded(read, what: str, problems: list[str]) -> list:
    """A decision-loop table; a malformed one is reported in the page, not fatal."""
    try:
        return list(read())
    except (sqlite3.Error, json.JSONDecodeError, TypeError, ValueError) as exc:
        msg = f"the ledger's {what} table could not be read ({exc}); it is left out"
        log.warning(msg)
        problems.append(msg)
        return []


def _event_counts(path: Path, problems: list[str]) -> dict[str, int]:
    counts: dict[str, int] = {}
    if not path.exists():
        return counts
    bad = 0
    with open(path, encoding="utf-8", errors="replace") as fh:
        for line in fh:
            if not line.strip():
                continue
            try:
                topic = str(json.loads(line).get("topic", "?"))
            except (json.JSONDecodeError, AttributeError):
                bad += 1
                continue
            counts[topic] = counts.get(topic, 0) + 1
    if bad:
        problems.append(f"{path.name}: {bad} line(s) are not JSON events (a crash mid-write?)")
    return counts


# ------------------------------------------------------------------ frames


def read_cells_csv(path: str | Path) -> dict[str, np.ndarray]:
    """``cells.csv`` as columns: ``i``, ``j`` as int, every other field as float."""
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.reader(fh)
        header = next(reader, None)
        rows = list(reader)
    if not header:
        raise ValueError(f"{path}: empty cells.csv (no header)")
    for need in ("i", "j", "x_pm", "y_pm"):
        if need not in header:
            raise ValueError(f"{path}: not a livequant cells.csv, no {need!r} column")
    out: dict[str, np.ndarray] = {}
    table = np.array(rows, dtype=str).reshape(len(rows), len(header))
    for k, name in enumerate(header):
        if name in ("i", "j"):
            out[name] = table[:, k].astype(np.int64)
        else:
            out[name] = table[:, k].astype(float)
    return out


@dataclass
class FrameData:
    """One frame's outputs as arrays, ready for plotting."""

    frame_id: str
    summary: dict
    columns: dict[str, np.ndarray] | None
    cells: dict[str, np.ndarray] | None
    image: np.ndarray | None
    image_note: str
    record: FrameRecord | None = None

    @property
    def pixel_size_pm(self) -> float:
        return float(self.summary.get("pixel_size_pm") or
                     (self.summary.get("meta") or {}).get("pixel_size_pm") or float("nan"))

    @property
    def shape(self) -> tuple[int, int]:
        shape = self.summary.get("shape") or (self.image.shape if self.image is not None
                                              else (0, 0))
        return int(shape[0]), int(shape[1])

    @property
    def cells_info(self) -> dict:
        return self.summary.get("cells") or {}


def load_frame(session: SessionData, frame_id: str, *, summary: dict | None = None) -> FrameData:
    """Read one frame's files; the image from the ledger's path when it still exists.

    `summary` is the frame's ``summary.json`` when the caller has read it already.

    Raises
    ------
    FileNotFoundError
        When the frame has no ``summary.json`` (not done, or outputs removed).
    """
    from livequant.containers import read_pixels, split_ref
    from livequant.frames import FrameError

    folder = session.frame_dir(frame_id)
    if summary is None:
        summary_path = folder / "summary.json"
        if not summary_path.exists():
            raise FileNotFoundError(f"{summary_path}: no outputs for frame {frame_id!r}")
        summary = json.loads(summary_path.read_text(encoding="utf-8"))
    columns = cells = None
    if (folder / "columns.csv").exists():
        columns = read_columns_csv(folder / "columns.csv")
        if len(columns["x_px"]) == 0:
            columns = None
    if (folder / "cells.csv").exists():
        cells = read_cells_csv(folder / "cells.csv")
        if len(cells["i"]) == 0:
            cells = None
    record = next((f for f in reversed(session.frames) if f.frame_id == frame_id), None)
    image, note = None, ""
    if record is None:
        note = "the ledger has no row for this frame, so its image file is unknown"
    elif not split_ref(record.path)[0].is_file():  # FILE#KEY: one image of a container
        note = f"the image file {record.path} is gone; maps are drawn without it"
    else:
        try:
            image = np.asarray(read_pixels(record.path), dtype=float)
        except (FrameError, OSError, ValueError) as exc:
            note = f"the image file {record.path} could not be read ({exc}); maps are drawn " \
                   "without it"
        if note:
            log.info("frame %s: %s", frame_id, note)
    return FrameData(frame_id=frame_id, summary=summary, columns=columns, cells=cells,
                     image=image, image_note=note, record=record)


def frames_of_interest(session: SessionData, *, max_frames: int,
                       requested: list[str] | None = None) -> tuple[list[str], list[str]]:
    """Which done frames get their own maps: ``(chosen, notes)``.

    With `requested` ids, those (in the given order; unknown or not-done ones
    are named in `notes`).  Otherwise one frame per kind of flag (rarest kind
    first, its best-scoring flag's frame), then the frames with the most flags
    (then the most recent flag), then the most recent frames, at most
    `max_frames` in all.
    """
    done = session.done_ids()
    done_set = set(done)
    notes: list[str] = []
    if requested:
        chosen = []
        for fid in requested:
            if fid in done_set and fid not in chosen:
                chosen.append(fid)
            elif fid not in done_set:
                notes.append(f"frame {fid!r} was asked for but is not a done frame of this "
                             "session")
        return chosen, notes
    flagged: dict[str, tuple[int, float]] = {}
    best_of_kind: dict[str, tuple[float, str]] = {}
    kind_count: dict[str, int] = {}
    for f in session.flags:
        fid = f.get("frame_id")
        if fid in done_set:
            n, last = flagged.get(fid, (0, 0.0))
            flagged[fid] = (n + 1, max(last, float(f.get("created_at") or 0.0)))
            kind = str(f.get("kind"))
            kind_count[kind] = kind_count.get(kind, 0) + 1
            score = float(f.get("score") or 0.0)
            if kind not in best_of_kind or score > best_of_kind[kind][0]:
                best_of_kind[kind] = (score, fid)
    # One frame for each kind of finding first (the rarest kinds first, each by its
    # best-scoring flag), so a vortex pair is not crowded out by a long wall
    # flagged on every frame; then the frames with the most flags.
    chosen: list[str] = []
    for kind in sorted(best_of_kind, key=lambda k: (kind_count[k], k)):
        fid = best_of_kind[kind][1]
        if fid not in chosen and len(chosen) < max_frames:
            chosen.append(fid)
    for fid in sorted(flagged, key=lambda k: (-flagged[k][0], -flagged[k][1])):
        if len(chosen) >= max_frames:
            break
        if fid not in chosen:
            chosen.append(fid)
    for fid in reversed(done):
        if len(chosen) >= max_frames:
            break
        if fid not in chosen:
            chosen.append(fid)
    left = len(done) - len(chosen)
    if left > 0:
        notes.append(f"{left} more done frame(s) are not drawn (raise --max-frames or name "
                     "them with --frames)")
    return chosen, notes


# ------------------------------------------------------------ geometry


def frame_to_stage(meta: dict, shape, x_px, y_px) -> tuple[np.ndarray, np.ndarray]:
    """Frame pixel ``(x_px, y_px)`` -> stage ``(x_nm, y_nm)``.

    The scan geometry of :class:`livequant.proposals.geometry.FrameGeometry`,
    built from a ``summary.json`` meta block; NaN where the meta gives no usable
    pixel size (a report draws what it can).
    """
    try:
        geo = FrameGeometry(center_x_nm=float(meta.get("stage_x_nm") or 0.0),
                            center_y_nm=float(meta.get("stage_y_nm") or 0.0),
                            pixel_size_nm=float(meta.get("pixel_size_pm") or "nan") / 1000.0,
                            rotation_deg=float(meta.get("scan_rotation_deg") or 0.0),
                            shape=tuple(shape))
    except ValueError:
        nan = np.full(np.broadcast(np.asarray(x_px, float), np.asarray(y_px, float)).shape,
                      np.nan)
        return nan, nan.copy()
    xy = geo.px_to_stage(x_px, y_px)
    return xy[..., 0], xy[..., 1]


def frame_footprint_nm(meta: dict, shape) -> np.ndarray:
    """The four stage corners ``(4, 2)`` of a frame (pixel edges, not centres)."""
    rows, cols = shape
    x = np.array([-0.5, cols - 0.5, cols - 0.5, -0.5])
    y = np.array([-0.5, -0.5, rows - 0.5, rows - 0.5])
    sx, sy = frame_to_stage(meta, shape, x, y)
    return np.column_stack([sx, sy])


def region_corners_px(region_px: dict) -> np.ndarray | None:
    """Corners ``(4, 2)`` as ``(x_px, y_px)`` of a flag region ``{x_px, y_px, width_px,
    height_px, angle_deg}`` (the angle turns the width axis from +x towards +y);
    None when a key is missing or not a finite number."""
    try:
        cx, cy = float(region_px["x_px"]), float(region_px["y_px"])
        w, h = float(region_px["width_px"]), float(region_px["height_px"])
        ang = float(region_px.get("angle_deg", 0.0) or 0.0)
    except (KeyError, TypeError, ValueError, AttributeError):
        return None
    if not all(math.isfinite(v) for v in (cx, cy, w, h, ang)):
        return None
    return rect_corners(cx, cy, w, h, ang)


def region_corners_nm(meta: dict, shape, region_px: dict) -> np.ndarray | None:
    """Stage corners of a flag's region given in the frame's pixels (None if malformed)."""
    c = region_corners_px(region_px)
    if c is None:
        return None
    sx, sy = frame_to_stage(meta, shape, c[:, 0], c[:, 1])
    return np.column_stack([sx, sy])


def stage_region_corners_nm(region: dict) -> np.ndarray | None:
    """Corners of a stage region ``{center_x_nm, center_y_nm, width_nm, height_nm,
    rotation_deg}`` (None when a key is missing or not a number)."""
    try:
        cx, cy = float(region["center_x_nm"]), float(region["center_y_nm"])
        w, h = float(region["width_nm"]), float(region["height_nm"])
        ang = float(region.get("rotation_deg", 0.0) or 0.0)
    except (KeyError, TypeError, ValueError, AttributeError):
        return None
    if not all(math.isfinite(v) for v in (cx, cy, w, h, ang)):
        return None
    return rect_corners(cx, cy, w, h, ang)


# ------------------------------------------------------------ fit bound


def thompson_sigma_pm(*, s_pm, pixel_pm, n_electrons, background_electrons):
    """Localisation bound per coordinate, Thompson, Larson & Webb, Biophys. J. 82, 2775
    (2002), DOI 10.1016/S0006-3495(02)75618-X (CHECK-VALUES section 4)::

        <dx^2> = s_a^2 / N + 8 pi s^4 b^2 / (a^2 N^2),   s_a^2 = s^2 + a^2 / 12

    ``s`` the Gaussian spot's standard deviation, ``a`` the pixel size, ``N``
    the electrons in the spot and ``b^2`` the background variance per pixel
    (Poisson background: ``b^2`` = background electrons per pixel).  At
    ``b = 0`` it is the Fisher bound ``s_a / sqrt(N)``.  Arrays broadcast;
    NaN where ``N <= 0``.
    """
    s = np.asarray(s_pm, float)
    a = np.asarray(pixel_pm, float)
    n = np.asarray(n_electrons, float)
    b2 = np.clip(np.asarray(background_electrons, float), 0.0, None)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = (s**2 + a**2 / 12.0) / n + 8.0 * np.pi * s**4 * b2 / (a**2 * n**2)
        return np.where(n > 0, np.sqrt(var), np.nan)


def column_crlb_pm(columns: dict[str, np.ndarray], *, pixel_size_pm: float,
                   gain: float = 1.0) -> tuple[np.ndarray, float]:
    """The Thompson bound of every column of a ``columns.csv`` and the effective gain used.

    Electrons in a column: the integral of its fitted Gaussian, ``2 pi A s^2`` in
    counts (``s`` = the geometric-mean width in pixels), divided by the
    effective gain.  The fitter scales its covariances by the frame's median
    reduced chi-square (which estimates true gain / configured gain), so the
    bound uses the same effective gain ``gain * median(chi2)``: the ratio of
    fitted sigma to this bound then does not depend on the gain setting.
    Without ``reduced_chi2`` (older files) the configured gain is used.

    This closed form is for an isolated round spot with a known background;
    the fitter also frees the widths and the background in a finite window, so
    for an ideal fit its sigma sits a little above it (about 1 to 1.35 times in
    the refinement tests).
    """
    px = float(pixel_size_pm)
    amp = np.asarray(columns["amplitude"], float)
    s_pm = np.asarray(columns["width_pm"], float)
    bg = np.asarray(columns.get("background", np.full(amp.shape, np.nan)), float)
    chi2 = np.asarray(columns.get("reduced_chi2", np.full(amp.shape, np.nan)), float)
    conv = np.isfinite(np.asarray(columns["sigma_x_pm"], float))
    good = conv & np.isfinite(chi2) & (chi2 > 0)
    g_eff = float(gain) * (float(np.median(chi2[good])) if good.any() else 1.0)
    s_px = s_pm / px
    n_e = 2.0 * np.pi * amp * s_px**2 / g_eff
    b_e = np.where(np.isfinite(bg), bg, 0.0) / g_eff
    return thompson_sigma_pm(s_pm=s_pm, pixel_pm=px, n_electrons=n_e,
                             background_electrons=b_e), g_eff


def fmt_time(t: float | None, t0: float | None = None) -> str:
    """``YYYY-MM-DD HH:MM:SS`` UTC (and ``+seconds`` since `t0` when given)."""
    if t is None or not isinstance(t, (int, float)) or not math.isfinite(t):
        return ""
    import datetime as _dt

    s = _dt.datetime.fromtimestamp(float(t), _dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S")
    if t0 is not None:
        s += f" (+{float(t) - t0:.1f} s)"
    return s


def payload_get(d: dict | None, *keys: str, default: Any = None) -> Any:
    """``d["payload"][k]`` for the first key present (payloads vary between rules)."""
    payload = (d or {}).get("payload") or {}
    if not isinstance(payload, dict):
        return default
    for k in keys:
        if k in payload and payload[k] is not None:
            return payload[k]
    return default
