"""Score a session's decisions against the simulated instrument's truth.

``python -m livequant.tools.score_session SESSION [SESSION ...] [--json]``

A session made with the simulated instrument (``livequant demo`` or
``tests/score_decisions.py``) holds, beside its ledger, the truth of every
frame (``SESSION/truth/FRAME_ID.json`` + ``.npz``).  For each frame this
finds the features really in view and matches the ledger's flags to them:

* domain walls: a wall of the scenario crossing the frame's polar layers along
  at least ``WALL_MIN_NM`` (4 nm) of analysed cells is *in view*; a
  ``domain-wall`` flag whose centre lies within ``MATCH_NM`` (1.5 nm) of its
  line matches it;
* vortex cores: a core at least ``EDGE_NM`` (1.5 nm) inside the frame is in
  view; a ``vortex`` (``antivortex``) flag within ``MATCH_NM`` of a core of
  winding +1 (-1) matches it;
* interfaces: a layer boundary with at least 10 cell pairs across it
  (about 4 nm) is in view; an ``interface`` flag centred within ``MATCH_NM``
  of it matches;
* point defects (the scenario's ``defects``): in view at least ``EDGE_NM``
  inside the frame; an ``anomaly`` within ``DEFECT_NM`` (2 nm) matches; an
  anomaly within ``VACANCY_NM`` (1 nm) of a column with missing atoms (occupancy
  below 1: the scenario's vacancies, random ones included) matches too, but
  such columns neither count for recall nor make a frame featured.

Then per kind: precision (flags matching a feature present in the frame /
flags) and recall (features in view matched / features in view, summed over
frames); anomalies per frame; anomalies repeating a typed flag of the same
frame (centre inside that flag's region); false alarms per featureless frame
(any flag on a frame with no wall, core, interface or defect even partly in
view); proposals per distinct feature (proposals whose flags matched a
feature, over the features they matched); and the area imaged twice by
accepted proposals of one feature (with its dose when known).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from functools import lru_cache
from pathlib import Path

import numpy as np

__all__ = ["score_session", "format_table", "main"]

MATCH_NM = 1.5
EDGE_NM = 1.5
DEFECT_NM = 2.0
VACANCY_NM = 1.0
WALL_MIN_NM = 4.0
TYPED = ("domain-wall", "vortex", "antivortex", "interface")


@lru_cache(maxsize=8)
def _specimen(name: str):
    from sim_instrument.specimen import Specimen

    return Specimen.from_scenario(name)


def _load_truths(session: Path) -> dict:
    from sim_instrument.engine import FrameTruth

    out = {}
    for p in sorted((session / "truth").glob("*.json")):
        t = FrameTruth.load(p)
        out[t.meta["frame_id"]] = t
    if not out:
        raise FileNotFoundError(f"{session / 'truth'}: no truth files; score_session needs a "
                                "session made with the simulated instrument")
    return out


def _affine_nm_to_px(truth):
    """Least-squares affine map specimen nm -> image (x, y) px from the truth columns."""
    xy = np.asarray(truth.arrays["xy_nm"], float)
    rc = np.asarray(truth.arrays["positions_px"], float)
    if len(xy) < 3:
        return None
    A = np.column_stack([xy, np.ones(len(xy))])
    coef, *_ = np.linalg.lstsq(A, rc[:, ::-1], rcond=None)
    return lambda p: np.column_stack([np.atleast_2d(p), np.ones(np.atleast_2d(p).shape[0])]) @ coef


def _dist_to_line(pts, p0, d):
    d = np.asarray(d, float) / np.hypot(*d)
    r = np.atleast_2d(pts) - p0
    return np.abs(r[:, 0] * d[1] - r[:, 1] * d[0]), r @ d


def frame_features(truth) -> dict:
    """The features of one frame: ``present`` (even partly) and ``in_view`` (scorable).

    Each feature is a dict with ``id`` (session-wide), ``kind`` and its
    geometry in image pixels (x = column, y = row).
    """
    meta = truth.meta
    px_nm = meta["pixel_size_pm"] / 1000.0
    rows, cols = meta["shape_px"]
    spec = _specimen(meta["sidecar"]["scenario"])
    polar = {k for k, layer in enumerate(spec.layers) if layer.polar}
    cells = np.asarray(truth.arrays.get("cell_b_px", np.zeros((0, 2))), float)[:, ::-1]
    layer = np.asarray(truth.arrays.get("cell_layer", np.zeros(0)), int)
    present, in_view = [], []
    edge_px = EDGE_NM / px_nm
    for w in meta["walls"]:
        p0 = np.array(w["point_px"][::-1], float)
        d = np.array(w["direction_image_xy"], float)
        f = {"id": f"wall:{w['index']}", "kind": "domain-wall", "p0": p0, "d": d}
        if not w["crosses_frame"] or not len(cells):
            continue
        dist, along = _dist_to_line(cells, p0, d)
        inner = ((cells[:, 0] >= edge_px) & (cells[:, 0] <= cols - 1 - edge_px)
                 & (cells[:, 1] >= edge_px) & (cells[:, 1] <= rows - 1 - edge_px))
        near = (dist <= 0.6 / px_nm) & np.isin(layer, list(polar))
        if near.any():
            present.append(f)
            near &= inner
            if near.any() and (along[near].max() - along[near].min()) * px_nm >= WALL_MIN_NM:
                in_view.append(f)
    for v in meta["vortex_cores"]:
        pos = np.array(v["position_px"][::-1], float)
        kind = "vortex" if v["winding"] > 0 else "antivortex"
        f = {"id": f"core:{v['pair']}:{v['winding']:+d}", "kind": kind, "p": pos}
        if v["in_frame"]:
            present.append(f)
            if edge_px <= pos[0] <= cols - 1 - edge_px and edge_px <= pos[1] <= rows - 1 - edge_px:
                in_view.append(f)
    if len(cells):
        from scipy.spatial import cKDTree

        for k in range(len(spec.layers) - 1):
            lo, hi = cells[layer == k], cells[layer == k + 1]
            if len(lo) == 0 or len(hi) == 0:
                continue
            dist, idx = cKDTree(hi).query(lo)
            pair = dist <= 0.6 / px_nm
            if pair.sum() < 2:
                continue
            mid = 0.5 * (lo[pair] + hi[idx[pair]])
            c = mid.mean(axis=0)
            _, _, vt = np.linalg.svd(mid - c)
            f = {"id": f"interface:{k}", "kind": "interface", "p0": c, "d": vt[0],
                 "points": mid}
            present.append(f)
            if pair.sum() >= 10:
                in_view.append(f)
    to_px = _affine_nm_to_px(truth)
    if to_px is not None:
        for k, dspec in enumerate(spec.scenario.defects):
            p = np.asarray(dspec.point_nm, float)[None, :]
            p = p + spec.displacement_nm(p)
            pos = to_px(p)[0]
            f = {"id": f"defect:{k}", "kind": "defect", "p": pos}
            if -0.5 <= pos[0] <= cols - 0.5 and -0.5 <= pos[1] <= rows - 0.5:
                present.append(f)
                if edge_px <= pos[0] <= cols - 1 - edge_px and \
                        edge_px <= pos[1] <= rows - 1 - edge_px:
                    in_view.append(f)
    # Columns with missing atoms (the scenario's vacancies and random vacancies): an
    # anomaly on one is a finding, not a false alarm; they do not make a frame "featured".
    occ = np.asarray(truth.arrays.get("occupancy", np.zeros(0)), float)
    pos = np.asarray(truth.arrays.get("positions_px", np.zeros((0, 2))), float)[:, ::-1]
    vac = [{"id": f"vacancy:{k}", "kind": "defect", "p": pos[k], "weak": True}
           for k in np.flatnonzero(occ < 0.99)]
    return {"present": present, "in_view": in_view, "px_nm": px_nm, "vacancies": vac}


def _match(flag, features, px_nm) -> str | None:
    """Id of the feature a flag marks, or None."""
    r = flag["region"]
    c = np.array([r["x_px"], r["y_px"]], float)
    kind = flag["kind"]
    best, best_d = None, math.inf
    for f in features:
        if kind == "anomaly":
            if f["kind"] != "defect":
                continue
            d = np.hypot(*(c - f["p"])) * px_nm
            tol = VACANCY_NM if f.get("weak") else DEFECT_NM
        elif kind != f["kind"]:
            continue
        elif kind in ("vortex", "antivortex"):
            d, tol = np.hypot(*(c - f["p"])) * px_nm, MATCH_NM
        elif kind == "domain-wall":
            d, tol = _dist_to_line(c, f["p0"], f["d"])[0][0] * px_nm, MATCH_NM
        elif kind == "interface":
            d, tol = _dist_to_line(c, f["p0"], f["d"])[0][0] * px_nm, MATCH_NM
        else:
            continue
        if d <= tol and d < best_d:
            best, best_d = f["id"], d
    return best


def _inside(region, x, y) -> bool:
    t = math.radians(region.get("angle_deg", 0.0))
    dx, dy = x - region["x_px"], y - region["y_px"]
    u, v = dx * math.cos(t) + dy * math.sin(t), -dx * math.sin(t) + dy * math.cos(t)
    return abs(u) <= region["width_px"] / 2 and abs(v) <= region["height_px"] / 2


def score_session(session) -> dict:
    """Decision-quality figures of one session (see the module docstring)."""
    from livequant.daemon.ledger import Ledger
    from livequant.proposals.geometry import overlap_area, shift_region

    session = Path(session)
    truths = _load_truths(session)
    with Ledger(session / "ledger.sqlite", readonly=True) as led:
        flags = led.flags()
        proposals = list(led.proposals())
    by_frame: dict[str, list] = {}
    for f in flags:
        by_frame.setdefault(f["frame_id"], []).append(f)
    kinds = TYPED + ("anomaly",)
    n_flags = {k: 0 for k in kinds}
    n_true = {k: 0 for k in kinds}
    n_view = {k: 0 for k in TYPED + ("defect",)}
    n_found = {k: 0 for k in TYPED + ("defect",)}
    missed = []
    flag_feature: dict[int, str] = {}
    n_anomaly_repeat = n_featureless = n_false_alarm = 0
    n_survey = n_revisit = 0
    anomalies_survey = anomalies_revisit = 0
    for fid, truth in truths.items():
        feats = frame_features(truth)
        fl = by_frame.get(fid, [])
        revisit = bool(truth.meta["sidecar"].get("request_id"))
        n_revisit += revisit
        n_survey += not revisit
        n_anom = sum(f["kind"] == "anomaly" for f in fl)
        if revisit:
            anomalies_revisit += n_anom
        else:
            anomalies_survey += n_anom
        if not feats["present"]:
            n_featureless += 1
            n_false_alarm += sum(_match(f, feats["vacancies"], feats["px_nm"]) is None
                                 for f in fl)
        for f in fl:
            if f["kind"] not in n_flags:
                continue
            n_flags[f["kind"]] += 1
            m = _match(f, feats["present"] + feats["vacancies"], feats["px_nm"])
            if m is not None:
                n_true[f["kind"]] += 1
                flag_feature[f["id"]] = m
        typed = [f for f in fl if f["kind"] in TYPED]
        for a in (f for f in fl if f["kind"] == "anomaly"):
            if any(_inside(t["region"], a["region"]["x_px"], a["region"]["y_px"])
                   for t in typed):
                n_anomaly_repeat += 1
        matched = {flag_feature.get(f["id"]) for f in fl}
        for feat in feats["in_view"]:
            n_view[feat["kind"]] += 1
            if feat["id"] in matched:
                n_found[feat["kind"]] += 1
            elif feat["kind"] in TYPED:
                missed.append(f"{fid}: {feat['id']}")
    # Proposals: which features each one was made for; overlap of one feature's visits.
    per_feature: dict[str, list] = {}
    n_prop_unmatched = 0
    for p in proposals:
        pay = p.get("payload") or {}
        feats = {flag_feature[i] for i in pay.get("flag_ids", []) if i in flag_feature}
        if not feats:
            n_prop_unmatched += 1
        for feat in feats:
            per_feature.setdefault(feat, []).append(p)
    n_prop_matched = sum(1 for p in proposals if {flag_feature.get(i) for i in
                                                  (p.get("payload") or {}).get("flag_ids", [])}
                         - {None})
    overlap_nm2 = overlap_px = overlap_e = 0.0
    for feat, ps in per_feature.items():
        acc = [p for p in ps if p["state"] == "accepted"]
        for a in range(len(acc)):
            for b in range(a + 1, len(acc)):
                pa, pb = acc[a]["payload"], acc[b]["payload"]
                ra = shift_region(pa["region"], [-v for v in pa["drift_nm"]])
                rb = shift_region(pb["region"], [-v for v in pb["drift_nm"]])
                area = overlap_area(ra, rb)
                overlap_nm2 += area
                px_nm = pb.get("pixel_size_pm", 10.0) / 1000.0
                overlap_px += area / px_nm ** 2
                if pb.get("dose_e_per_a2"):
                    overlap_e += pb["dose_e_per_a2"] * area * 100.0
    n_frames = len(truths)
    out = {"session": str(session), "frames": n_frames, "survey_frames": n_survey,
           "revisit_frames": n_revisit, "flags": {k: n_flags[k] for k in kinds},
           "precision": {k: (n_true[k] / n_flags[k] if n_flags[k] else None) for k in kinds},
           "recall": {k: (n_found[k] / n_view[k] if n_view[k] else None) for k in n_view},
           "in_view": dict(n_view), "found": dict(n_found), "missed": missed,
           "anomalies_per_frame": (anomalies_survey + anomalies_revisit) / max(n_frames, 1),
           "anomalies_per_survey_frame": anomalies_survey / max(n_survey, 1),
           "anomalies_per_revisit_frame": (anomalies_revisit / n_revisit) if n_revisit else None,
           "anomalies_repeating_typed": n_anomaly_repeat,
           "featureless_frames": n_featureless,
           "false_alarms_per_featureless_frame": (n_false_alarm / n_featureless
                                                  if n_featureless else None),
           "proposals": len(proposals), "proposals_unmatched": n_prop_unmatched,
           "distinct_features_proposed": len(per_feature),
           "proposals_per_feature": (n_prop_matched / len(per_feature)) if per_feature else None,
           "overlap_nm2": overlap_nm2, "overlap_px": overlap_px, "overlap_electrons": overlap_e}
    return out


def _fmt(v, digits=2):
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.{digits}f}"
    return str(v)


def format_table(scores: list[dict], labels: list[str] | None = None) -> str:
    """A Markdown table, one row per session (and the pooled row when several)."""
    head = ("| run | frames (survey+revisit) | wall P/R | core P/R | interface P/R | "
            "anomalies / frame | anomaly P / defect R | anomalies repeating a typed flag | "
            "false alarms / featureless frame | proposals / feature | unmatched proposals | "
            "area imaged twice (nm²) |")
    lines = [head, "|" + "---|" * 12]
    labels = labels or [Path(s["session"]).name for s in scores]

    def pr(s, kinds):
        nf = sum(s["flags"][k] for k in kinds)
        nt = sum(round((s["precision"][k] or 0) * s["flags"][k]) for k in kinds)
        nv = sum(s["in_view"][k] for k in kinds)
        nfo = sum(s["found"][k] for k in kinds)
        return (nt, nf, nfo, nv)

    def row(label, s_list):
        def anomalies():
            nf = sum(s["flags"]["anomaly"] for s in s_list)
            nt = sum(round((s["precision"]["anomaly"] or 0) * s["flags"]["anomaly"])
                     for s in s_list)
            nv = sum(s["in_view"]["defect"] for s in s_list)
            nfo = sum(s["found"]["defect"] for s in s_list)
            return (f"{_fmt(nt / nf) if nf else '-'} / {_fmt(nfo / nv) if nv else '-'} "
                    f"({nfo}/{nv})")

        def both(kinds):
            t = [pr(s, kinds) for s in s_list]
            nt, nf, nfo, nv = (sum(x[i] for x in t) for i in range(4))
            p = _fmt(nt / nf) if nf else "-"
            r = _fmt(nfo / nv) if nv else "-"
            return f"{p} / {r} ({nfo}/{nv})"
        fr = sum(s["frames"] for s in s_list)
        sv = sum(s["survey_frames"] for s in s_list)
        an = sum(s["anomalies_per_frame"] * s["frames"] for s in s_list) / max(fr, 1)
        rep = sum(s["anomalies_repeating_typed"] for s in s_list)
        nfl = sum(s["featureless_frames"] for s in s_list)
        fa = sum((s["false_alarms_per_featureless_frame"] or 0) * s["featureless_frames"]
                 for s in s_list)
        props = sum(s["proposals"] - s["proposals_unmatched"] for s in s_list)
        feats = sum(s["distinct_features_proposed"] for s in s_list)
        unm = sum(s["proposals_unmatched"] for s in s_list)
        ov = sum(s["overlap_nm2"] for s in s_list)
        return (f"| {label} | {fr} ({sv}+{fr - sv}) | {both(('domain-wall',))} | "
                f"{both(('vortex', 'antivortex'))} | {both(('interface',))} | {an:.2f} | "
                f"{anomalies()} | {rep} | "
                f"{_fmt(fa / nfl) if nfl else '-'} ({nfl}) | "
                f"{_fmt(props / feats) if feats else '-'} | {unm} | {ov:.1f} |")

    for label, s in zip(labels, scores):
        lines.append(row(label, [s]))
    if len(scores) > 1:
        lines.append(row("**all**", scores))
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m livequant.tools.score_session",
                                 description="Score a simulated session's flags and proposals "
                                             "against the simulated instrument's truth.")
    ap.add_argument("sessions", nargs="+", metavar="SESSION")
    ap.add_argument("--json", action="store_true", help="one JSON object on stdout")
    args = ap.parse_args(argv)
    scores = []
    for s in args.sessions:
        try:
            scores.append(score_session(s))
        except FileNotFoundError as exc:
            print(f"score_session: {exc}", file=sys.stderr)
            return 2
    if args.json:
        print(json.dumps({"sessions": scores}, indent=1, default=float))
    else:
        print(format_table(scores))
        for s in scores:
            if s["missed"]:
                print(f"{Path(s['session']).name}: missed {', '.join(s['missed'])}",
                      file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
