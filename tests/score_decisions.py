"""Decision quality over seeds and scenarios: scripted sessions scored against the truth.

    PYTHONPATH=. python tests/score_decisions.py [--scenarios demo defects-walls]
        [--seeds 1 2 3 4 5] [--out DIR] [--markdown FILE]

Each run is a session of the decision loop exactly as the daemon runs it
(``DecisionLoop.on_frame`` on every analysed frame, a real ledger, auto-accept
on, drift clock from the frames) driven by the simulated instrument in one
thread without sockets: the instrument surveys a tour of overlapping frames
across the scenario's features and acquires every accepted proposal
(``scan-request``) before its next survey frame, advancing its own clock by
each frame's time and the survey cadence, so the specimen drifts as in the demo.
Nothing here depends on the machine's speed, so a run is reproducible from its
seed.  Each session (ledger, truth) is kept under ``--out`` and scored with
:mod:`livequant.tools.score_session`.

Tours (stage nm, 20 nm frames of 1024 x 1024 at 4 us, 6 nm overlap):
``demo`` -- the demo's own tour (``livequant.demo.tour_positions``: along the
vortex pair, across a wall, down the wall to the electrode and substrate);
``defects-walls`` -- along y = 75 across the upright wall, the vortex pair and
two defects, then down the inclined wall to the electrode past two more;
``tilted-substrate`` -- across its four walls at y = 20, then down to the
substrate.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

FOV_NM = 20.0
STEP_NM = 14.0
SHAPE = (1024, 1024)
DWELL_US = 4.0
CADENCE_S = 3.0


def tour(scenario: str) -> np.ndarray:
    from livequant.demo import tour_positions

    if scenario == "demo":
        return tour_positions(14, fov_nm=FOV_NM, overlap_nm=FOV_NM - STEP_NM)
    if scenario == "defects-walls":
        row = [(x, 75.0) for x in np.arange(-96.0, 20.0, STEP_NM)]
        # down the inclined wall (60 deg through (40, 3.4)), a little to its right
        col = [(40.0 + (y - 3.4) / np.tan(np.radians(60.0)) + 2.0, y)
               for y in np.arange(61.0, -62.0, -STEP_NM)]
        return np.array(row + col)
    if scenario == "tilted-substrate":
        row = [(x, 20.0) for x in np.arange(-100.0, 101.0, STEP_NM)]
        col = [(30.0, y) for y in np.arange(20.0 - STEP_NM, -45.0, -STEP_NM)]
        return np.array(row + col)
    raise ValueError(f"no tour for scenario {scenario!r}; known: demo, defects-walls, "
                     "tilted-substrate")


MATERIAL = {"demo": "PbTiO3", "defects-walls": "PbTiO3", "tilted-substrate": "BaTiO3"}


class _Publisher:
    def __init__(self, path: Path):
        self.requests: list[dict] = []
        self._f = open(path, "a", encoding="utf-8")

    def publish(self, topic: str, data: dict) -> None:
        self._f.write(json.dumps({"topic": topic, "data": data}, default=str) + "\n")
        if topic == "scan-request":
            self.requests.append(data)

    def close(self):
        self._f.close()


def run_session(scenario: str, seed: int, session: Path, *, overrides: dict | None = None,
                max_revisits: int = 12, keep_frames: bool = True) -> dict:
    """One scripted session; returns counts (frames, seconds)."""
    from livequant.config import load_settings
    from livequant.daemon.decisions import DecisionLoop
    from livequant.daemon.ledger import Ledger
    from livequant.frames import Sidecar, frame_from_array, resolve_meta
    from livequant.pipeline import analyze_frame
    from livequant.rules.types import FrameView
    from sim_instrument.engine import ScanEngine
    from sim_instrument.specimen import Specimen

    session.mkdir(parents=True, exist_ok=True)
    (session / "truth").mkdir(exist_ok=True)
    (session / "acquired").mkdir(exist_ok=True)
    settings = load_settings(None, overrides={
        "proposals.auto_accept": True, "drift.clock": "frames",
        "analysis.material": MATERIAL[scenario], **(overrides or {})})
    ledger = Ledger(session / "ledger.sqlite")
    pub = _Publisher(session / "events.jsonl")
    loop = DecisionLoop(settings, ledger, pub)
    engine = ScanEngine(Specimen.from_scenario(scenario), seed=seed, frame_prefix="survey")
    defaults = settings.frame_defaults.as_dict()
    t0 = time.perf_counter()
    n = {"survey": 0, "revisit": 0}

    def process(acq):
        acq.truth.save(session / "truth")
        if keep_frames:
            from livequant.frames import write_frame

            write_frame(session / "acquired", acq.frame_id, acq.pixels, acq.sidecar, fmt="npy")
        meta = resolve_meta(Sidecar.parse(acq.sidecar, where=acq.frame_id),
                            default_id=acq.frame_id, defaults=defaults, where=acq.frame_id)
        frame = frame_from_array(acq.pixels, meta)
        result = analyze_frame(frame, settings)
        loop.on_frame(FrameView.from_result(result, image=acq.pixels))
        engine.wait(0.3)   # analysis and decision time on the instrument's clock

    served = set()
    for x, y in tour(scenario):
        acq = engine.acquire((float(x), float(y)), FOV_NM, SHAPE, dwell_time_us=DWELL_US)
        n["survey"] += 1
        process(acq)
        while len(served) < len(pub.requests) and n["revisit"] < max_revisits:
            req = pub.requests[len(served)]
            served.add(req["id"])
            acq = engine.acquire((req["center_x_nm"], req["center_y_nm"]), req["fov_nm"],
                                 tuple(req["shape_px"]),
                                 scan_rotation_deg=req["scan_rotation_deg"],
                                 dwell_time_us=req["dwell_time_us"],
                                 frame_id=f"req_{req['id']}_{engine.frame_count + 1:05d}",
                                 extra={"request_id": req["id"]})
            n["revisit"] += 1
            process(acq)
        engine.wait(CADENCE_S)
    pub.close()
    ledger.close()
    return {**n, "seconds": time.perf_counter() - t0, "errors": loop.n_errors,
            "last_error": loop.last_error}


def main(argv=None) -> int:
    from livequant.tools.score_session import format_table, score_session

    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--scenarios", nargs="+", default=["demo", "defects-walls"])
    ap.add_argument("--seeds", nargs="+", type=int, default=[1, 2, 3, 4, 5])
    ap.add_argument("--out", default=None, help="folder for the sessions (default: temporary)")
    ap.add_argument("--markdown", default=None, help="also write the table to this file")
    ap.add_argument("--json", default=None, help="write every score to this JSON file")
    args = ap.parse_args(argv)
    out = Path(args.out or tempfile.mkdtemp(prefix="livequant-score-"))
    scores, labels, runs = [], [], []
    for scenario in args.scenarios:
        for seed in args.seeds:
            s_dir = out / f"{scenario}-seed{seed}"
            info = run_session(scenario, seed, s_dir)
            print(f"{scenario} seed {seed}: {info}", file=sys.stderr)
            runs.append(info)
            scores.append(score_session(s_dir))
            labels.append(f"{scenario} seed {seed}")
    tables = []
    for scenario in args.scenarios:
        idx = [k for k, lab in enumerate(labels) if lab.startswith(scenario + " ")]
        tables.append(f"### {scenario}\n\n" + format_table([scores[k] for k in idx],
                                                             [labels[k] for k in idx]))
    if len(args.scenarios) > 1:
        tables.append("### all scenarios\n\n" + format_table(scores, labels).split("\n", 2)[0]
                      + "\n" + "|" + "---|" * 12 + "\n" +
                      format_table(scores, labels).splitlines()[-1])
    text = "\n\n".join(tables)
    print(text)
    for s, lab in zip(scores, labels):
        if s["missed"]:
            print(f"{lab}: missed {', '.join(s['missed'])}", file=sys.stderr)
    if args.markdown:
        Path(args.markdown).write_text(text + "\n")
    if args.json:
        Path(args.json).write_text(json.dumps({"runs": runs, "scores": scores}, indent=1,
                                              default=float))
    print(f"sessions in {out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
