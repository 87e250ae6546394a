"""How long the rules take beside the analysis of the same frame (a ratio, same run).

    PYTHONPATH=. python tests/rules/bench_rules.py [--size 1024] [--fov-nm 16] [--repeat 5]

Renders one demo frame across a wall and the vortex pair region, analyses it, then runs the
built-in rules on its view `--repeat` times against a session context of that frame; prints
the median seconds of each and their ratio (the rules run in the daemon's main process, so
they must stay a small fraction of a frame's analysis).
"""

from __future__ import annotations

import argparse
import json
import statistics
import time

from livequant.config import load_settings
from livequant.frames import Sidecar, frame_from_array, resolve_meta
from livequant.pipeline import analyze_frame
from livequant.rules import FrameView, RuleManager, SessionContext
from sim_instrument import ScanEngine, Specimen


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--fov-nm", type=float, default=16.0)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)
    spec = Specimen.from_scenario("demo")
    settings = load_settings(environ={}, overrides={"analysis.material": "PbTiO3"})
    acq = ScanEngine(spec, seed=1).acquire(center_nm=(-95.0, 66.9), fov_nm=args.fov_nm,
                                           shape_px=(args.size, args.size))
    meta = resolve_meta(Sidecar.parse(acq.sidecar, where="bench"), default_id="b", where="bench")
    frame = frame_from_array(acq.pixels, meta)
    analyze_frame(frame, settings)                      # warm the compiled kernels
    t_an = []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        result = analyze_frame(frame, settings)
        t_an.append(time.perf_counter() - t0)
    view = FrameView.from_result(result)
    mgr = RuleManager.from_settings(settings)
    ctx = SessionContext.from_settings(settings)
    ctx.update(view, [])
    t_rules, flags = [], []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        flags = mgr.evaluate(view, ctx.readonly())
        t_rules.append(time.perf_counter() - t0)
    t_ctx = []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        ctx.update(view, flags)
        t_ctx.append(time.perf_counter() - t0)
    out = {"size_px": args.size, "n_cells": len(view.cells["i"]) if view.cells else 0,
           "analyze_s": statistics.median(t_an), "rules_s": statistics.median(t_rules),
           "context_update_s": statistics.median(t_ctx),
           "flags": sorted(f.kind for f in flags)}
    out["rules_over_analyze"] = out["rules_s"] / out["analyze_s"]
    out["context_over_analyze"] = out["context_update_s"] / out["analyze_s"]
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
