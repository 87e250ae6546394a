"""Proposal rows of the ledger as the operator sees them.

No numerics here: ``livequant proposals`` reads the ledger through this when no
daemon runs, and must answer in a fraction of a second.
"""

from __future__ import annotations

__all__ = ["proposal_brief"]


def proposal_brief(row: dict) -> dict:
    """A ledger proposal row as the operator's commands and the display show it (JSON-ready)."""
    p = row.get("payload") or {}
    r = row["region"]
    return {"id": row["id"], "state": row["state"], "score": row["score"],
            "frame_id": row["frame_id"],
            "center_nm": [r["center_x_nm"], r["center_y_nm"]],
            "size_nm": [r["width_nm"], r["height_nm"]], "rotation_deg": r["rotation_deg"],
            "reason": p.get("reason", ""), "kinds": p.get("kinds", []),
            "flag_ids": p.get("flag_ids", []), "pixel_size_pm": p.get("pixel_size_pm"),
            "dwell_time_us": p.get("dwell_time_us"), "shape_px": p.get("shape_px"),
            "dose_e_per_a2": p.get("dose_e_per_a2"),
            "dose_after_max_e_per_a2": p.get("dose_after_max_e_per_a2"),
            "dose_budget_exceeded": p.get("dose_budget_exceeded"),
            "priority": p.get("priority"), "auto_accept_blocked": p.get("auto_accept_blocked"),
            "created_at": row["created_at"]}
