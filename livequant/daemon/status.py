"""The status snapshot: what the display, the ``status`` command and heartbeats show.

The main loop builds a new frozen :class:`Snapshot` every tick; readers on
other threads (the display's refresh thread, the command server) only ever
read the latest one, so no lock is needed and nobody sees a half-updated state.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass, field

from livequant.daemon.ledger import Ledger

__all__ = ["Snapshot", "LastFrame", "last_frame_from_summary", "snapshot_from_ledger",
           "series_from_ledger"]


@dataclass(frozen=True)
class LastFrame:
    """Key numbers of the most recent frame done."""

    frame_id: str
    status: str
    n_columns: int
    a_pm: float | None = None
    b_pm: float | None = None
    sigma_a_pm: float | None = None
    angle_deg: float | None = None
    mean_displacement_pm: float | None = None
    median_sigma_position_pm: float | None = None
    analyze_s: float | None = None
    latency_s: float | None = None
    physics: dict | None = None   # wall_physics_brief(summary): wall width, energy, zeta


@dataclass(frozen=True)
class Snapshot:
    """One consistent view of the daemon.

    Attributes
    ----------
    state : str
        ``starting``, ``running``, ``paused``, ``draining``, ``stopped`` or
        ``offline`` (built from the ledger alone, no daemon running).
    counts : dict
        Frames per ledger state (``queued``, ``processing``, ``done``,
        ``quarantined``).
    frames_per_s : float
        Frames done per second over the recent window.
    lag_s : float
        Age of the oldest frame not yet done (0 when caught up): how far the
        analysis runs behind the microscope.
    settling : int
        Files seen in the watched folder but not yet complete.
    proposals : tuple of dict
        Open proposals (best first) and the latest decided ones: ``id``,
        ``state``, ``score``, ``center_nm``, ``size_nm``, ``reason``, ...
    flags : tuple of dict
        The most recent flags: ``id``, ``frame_id``, ``rule``, ``kind``,
        ``score``, ``message``.
    decisions : dict
        Status of the decision loop: rules, drift, proposal budget, errors.
    """

    state: str
    session: str
    counts: dict
    watch: str | None = None
    uptime_s: float = 0.0
    in_flight: int = 0
    settling: int = 0
    workers: int = 0
    frames_per_s: float = 0.0
    lag_s: float = 0.0
    last: LastFrame | None = None
    warnings: tuple[str, ...] = ()
    endpoints: dict = field(default_factory=dict)
    rejected_messages: int = 0
    proposals: tuple = ()
    flags: tuple = ()
    series: tuple = ()
    decisions: dict = field(default_factory=dict)
    taken_at: float = field(default_factory=time.time)

    @property
    def total(self) -> int:
        return sum(self.counts.values())

    def as_dict(self) -> dict:
        d = asdict(self)
        d["total"] = self.total
        return d


def _num(value) -> float | None:
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        return float(value)
    return None


def _mean_displacement(cells: dict | None) -> float | None:
    """Mean B-site displacement magnitude, ``cells.descriptors.d_pm.mean`` of the summary."""
    if not isinstance(cells, dict):
        return None
    d_pm = (cells.get("descriptors") or {}).get("d_pm") or {}
    return _num(d_pm.get("mean")) if isinstance(d_pm, dict) else None


def last_frame_from_summary(summary: dict, *, latency_s: float | None = None) -> LastFrame:
    lattice = summary.get("lattice") or {}
    return LastFrame(
        frame_id=str(summary.get("frame_id")),
        status=str(summary.get("status")),
        n_columns=int(summary.get("n_columns") or 0),
        a_pm=_num(lattice.get("a_pm")),
        b_pm=_num(lattice.get("b_pm")),
        sigma_a_pm=_num(lattice.get("sigma_a_pm")),
        angle_deg=_num(lattice.get("angle_deg")),
        mean_displacement_pm=_mean_displacement(summary.get("cells")),
        median_sigma_position_pm=_num(summary.get("median_sigma_position_pm")),
        analyze_s=_num((summary.get("timings_s") or {}).get("total")),
        latency_s=latency_s,
        physics=wall_physics_brief(summary),
    )


def wall_physics_brief(summary: dict) -> dict | None:
    """The wall numbers of a frame's ``physics`` block for the display (None: no wall)."""
    phys = summary.get("physics") or {}
    wall = phys.get("wall")
    if not wall:
        return None
    gl = phys.get("gl") or {}
    rough = phys.get("roughness") or {}
    mj = (lambda v: None if v is None else 1000.0 * float(v))
    return {"width_pm": _num(wall.get("width")), "sigma_width_pm": _num(wall.get("sigma_width")),
            "energy_mJ_per_m2": mj(gl.get("energy_J_per_m2")),
            "sigma_energy_mJ_per_m2": mj(gl.get("sigma_energy_J_per_m2")),
            "asymmetry_pm": _num(wall.get("asymmetry")),
            "sigma_asymmetry_pm": _num(wall.get("sigma_asymmetry")),
            "zeta": _num(rough.get("zeta")), "sigma_zeta": _num(rough.get("sigma_zeta"))}


def snapshot_from_ledger(ledger: Ledger, *, session: str) -> Snapshot:
    """What can be said about a session with no daemon running: the ledger's counts."""
    counts = ledger.counts()
    warnings = tuple(f"{reason}: {message}" for _path, reason, message
                     in ledger.recent_quarantined(5))
    return Snapshot(state="offline", session=session, counts=counts, warnings=warnings,
                    frames_per_s=0.0, lag_s=0.0, last=_last_done(ledger, session),
                    series=series_from_ledger(ledger))


def series_from_ledger(ledger: Ledger) -> tuple:
    """Per series (as the live daemon shows them): depth, frames left out, latest
    aggregate and its precision gain, from the ledger's series tables."""
    out: dict[str, dict] = {}
    for m in ledger.series_members():
        st = out.setdefault(m["series_id"], {"series_id": m["series_id"], "depth": 0,
                                             "n_excluded": 0, "kind": "average"})
        st["depth" if m["accepted"] else "n_excluded"] += 1
        st["last_member"] = m["frame_id"]
    for a in ledger.series_aggregates():
        st = out.setdefault(a["series_id"], {"series_id": a["series_id"]})
        st.update({"kind": a["kind"], "aggregate_id": a["aggregate_id"],
                   "n_members": a["n_members"],
                   "median_sigma_position_pm": a["median_sigma_position_pm"],
                   "precision_gain": a["precision_gain"]})
    return tuple(out.values())


def _last_done(ledger: Ledger, session: str) -> LastFrame | None:
    """The newest done frame, from its ``summary.json`` (None when there is none to read)."""
    import json
    from pathlib import Path

    done = [r for r in ledger.rows(state="done") if r.frame_id and r.finished_at]
    if not done:
        return None
    newest = max(done, key=lambda r: r.finished_at)
    try:
        summary = json.loads((Path(session) / "frames" / newest.frame_id / "summary.json")
                             .read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None  # outputs moved or unreadable: the counts still stand
    return last_frame_from_summary(summary)

