"""The session's cumulative dose map for the report: rebuilt from the frames and the drift.

Every done frame adds ``I t / (e p^2)`` (:func:`livequant.proposals.dose.dose_e_per_a2`;
``beam_current_pa`` from its sidecar) over its footprint, moved into specimen
coordinates by the drift the ledger recorded for it (the nearest drift record in
time when the frame has none; none at all: stage coordinates).  Frames without a
beam current or dwell are counted and left out.  The map is a lower bound near
frame edges (probe tails and scan overshoot are not counted) and an estimate from
nominal values: dose limits are the operator's and the facility's to set.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from livequant.proposals.dose import DoseMap, dose_e_per_a2
from livequant.proposals.geometry import region_corners, shift_region

__all__ = ["session_dose_map", "dose_map_figure"]


def _drift_at(drift_rows: list[dict], frame_id: str, t: float | None):
    for row in drift_rows:
        if row.get("frame_id") == frame_id:
            return float(row["dx_nm"]), float(row["dy_nm"])
    if drift_rows and t is not None:
        row = min(drift_rows, key=lambda r: abs(float(r["t"]) - t))
        return float(row["dx_nm"]), float(row["dy_nm"])
    return 0.0, 0.0


def session_dose_map(summaries: dict[str, dict], drift_rows: list[dict], *,
                     complete_at: dict[str, float] | None = None,
                     cell_nm: float = 0.25) -> tuple[DoseMap, dict]:
    """The cumulative dose map of a session and what went into it.

    Parameters
    ----------
    summaries : dict of frame id to ``summary.json`` content
    drift_rows : the ledger's drift records
    complete_at : frame id to unix time, for frames without a drift record

    Returns
    -------
    DoseMap, dict
        The map and ``{"frames": n counted, "without_dose": n, "max_frame_e_per_a2": ...}``.
    """
    dm = DoseMap(cell_nm=cell_nm)
    n_without, frame_max = 0, 0.0
    for fid, summary in summaries.items():
        meta = summary.get("meta") or {}
        shape = summary.get("shape")
        px = meta.get("pixel_size_pm") or summary.get("pixel_size_pm")
        current, dwell = meta.get("beam_current_pa"), meta.get("dwell_time_us")
        if not (shape and px and current and dwell):
            n_without += 1
            continue
        rows, cols = int(shape[0]), int(shape[1])
        foot = {"center_x_nm": float(meta.get("stage_x_nm") or 0.0),
                "center_y_nm": float(meta.get("stage_y_nm") or 0.0),
                "width_nm": cols * px / 1000.0, "height_nm": rows * px / 1000.0,
                "rotation_deg": float(meta.get("scan_rotation_deg") or 0.0)}
        d = _drift_at(drift_rows, fid, (complete_at or {}).get(fid))
        dose = dose_e_per_a2(float(current), float(dwell), float(px))
        frame_max = max(frame_max, dose)
        dm.add(shift_region(foot, (-d[0], -d[1])), dose)
    return dm, {"frames": dm.n_frames, "without_dose": n_without,
                "max_frame_e_per_a2": frame_max}


def dose_map_figure(dm: DoseMap, proposals: list[dict], *, budget_e_per_a2: float | None = None,
                    title: str = "Cumulative electron dose") -> Figure:
    """The dose map (log colour scale) with the proposed regions in specimen coordinates.

    `proposals` are ledger rows (``payload.region`` and ``payload.drift_nm`` give
    the specimen region as placed); with a budget, cells at or over it are
    outlined.
    """
    from matplotlib.colors import LogNorm

    fig = Figure(figsize=(7.0, 5.2), layout="constrained")
    ax = fig.add_subplot()
    got = dm.image()
    if got is None:
        ax.text(0.5, 0.5, "no frame with a beam current and dwell: no dose map",
                ha="center", va="center", transform=ax.transAxes)
        ax.set_axis_off()
        return fig
    img, (x0, x1, y0, y1) = got
    shown = np.where(img > 0, img, np.nan)
    vmax = float(np.nanmax(shown))
    vmin = max(float(np.nanmin(shown)), vmax / 1e3)
    im = ax.imshow(shown, origin="lower", extent=(x0, x1, y0, y1), cmap="magma",
                   norm=LogNorm(vmin=vmin, vmax=max(vmax, vmin * 1.01)), interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, shrink=0.85)
    cb.set_label("cumulative dose (e/Å²)")
    if budget_e_per_a2:
        ys = np.linspace(y0, y1, img.shape[0])
        xs = np.linspace(x0, x1, img.shape[1])
        if np.nanmax(img) >= budget_e_per_a2:
            ax.contour(xs, ys, img, levels=[budget_e_per_a2], colors=["#56B4E9"],
                       linewidths=1.2)
        ax.plot([], [], color="#56B4E9", label=f"budget {budget_e_per_a2:.3g} e/Å²")
    styles = {"accepted": "-", "open": "--"}
    for p in proposals:
        pay = p.get("payload") or {}
        region, drift = pay.get("region"), pay.get("drift_nm")
        if not isinstance(region, dict) or drift is None:
            continue
        spec = shift_region(region, (-drift[0], -drift[1]))
        c = np.vstack([region_corners(spec), region_corners(spec)[:1]])
        over = pay.get("dose_budget_exceeded") is True
        ax.plot(c[:, 0], c[:, 1], styles.get(p.get("state"), ":"),
                color="#D55E00" if over else "#009E73", lw=1.0)
        ax.text(spec["center_x_nm"], spec["center_y_nm"], str(p.get("id", "")), fontsize=7,
                color="#D55E00" if over else "#009E73", ha="center", va="center")
    ax.plot([], [], "-", color="#009E73", label="proposal (accepted: solid, open: dashed)")
    ax.plot([], [], "-", color="#D55E00", label="proposal over the dose budget")
    ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncol=2)
    ax.set_xlabel("specimen x (nm, stage at the session's drift origin)")
    ax.set_ylabel("specimen y (nm)")
    ax.set_aspect("equal")
    ax.set_title(title, fontsize=10)
    return fig
