"""``livequant analyze FRAME... [--out DIR] [--json]``: one-shot analysis of files."""

from __future__ import annotations

import json
import logging
import sys
import tempfile
import traceback
from pathlib import Path

from livequant.cli import EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_OK
from livequant.commands._common import add_settings_arguments, settings_from_args
from livequant.config import ConfigError
from livequant.frames import FrameError, write_frame
from livequant.outputs import write_frame_outputs
from livequant.pipeline import analyze_frame

log = logging.getLogger("livequant.analyze")

#: The built-in example: SrTiO3 [001] (a = 390.53 pm, CHECK-VALUES section 1)
#: at a deliberately non-round pixel size and a rotated lattice.
EXAMPLE = dict(shape=(512, 512), a_pm=390.53, pixel_size_pm=9.37, rotation_deg=12.0,
               sigma_pm=42.0, peak_a=300.0, peak_b=120.0, background=30.0, seed=2026)


def register(sub) -> None:
    p = sub.add_parser(
        "analyze",
        help="analyse frame files once and write columns and summaries",
        description="Fit every atomic column of each frame (TIFF or NPY, optional JSON "
                    "sidecar) and write DIR/FRAME_ID/columns.csv, cells.csv and summary.json.",
    )
    p.add_argument("frames", nargs="*", metavar="FRAME",
                   help="image files (.tif, .tiff, .npy) or containers (.h5/.emd, .mrc, TIFF "
                        "stacks: each image a frame; FILE#KEY names one)")
    p.add_argument("--out", metavar="DIR", help="folder for the per-frame outputs "
                   "(default: no files are written, except with --example: ./livequant-example)")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
    p.add_argument("--example", action="store_true",
                   help="synthesise an SrTiO3 [001] HAADF frame (rotated lattice, shot noise) "
                        "and analyse it")
    add_settings_arguments(p)
    p.set_defaults(func=run)


def _example_frame(folder: Path) -> Path:
    from livequant.synthetic import perovskite_frame

    ex = perovskite_frame(**EXAMPLE)
    sidecar = {"frame_id": "example-srtio3", "pixel_size_pm": EXAMPLE["pixel_size_pm"],
               "dwell_time_us": 2.0, "detector": "HAADF", "stage_x_nm": 0.0, "stage_y_nm": 0.0,
               "scan_rotation_deg": 0.0, "specimen": "synthetic SrTiO3 [001]"}
    return write_frame(folder, "example-srtio3", ex.pixels.astype("uint16"), sidecar)


def run(args) -> int:
    try:
        settings = settings_from_args(args)
    except ConfigError as exc:
        print(f"livequant analyze: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    paths = [Path(p) for p in args.frames]
    out_dir = Path(args.out) if args.out else None
    tmp = None
    if args.example:
        if out_dir is None:
            out_dir = Path("livequant-example")
        tmp = tempfile.TemporaryDirectory(prefix="livequant-example-")
        paths.append(_example_frame(Path(tmp.name)))
    if not paths:
        print("livequant analyze: no frames given (name files, or use --example)",
              file=sys.stderr)
        return EXIT_BAD_INPUT

    reports, worst = [], EXIT_OK
    # a container (HDF5/EMD, MRC, TIFF stack) is one frame per image (FILE#KEY)
    from livequant.containers import container_members, read_any

    for path in [ref for p in paths for ref in container_members(p)]:
        report = {"path": str(path)}
        try:
            frame = read_any(path, defaults=settings.frame_defaults.as_dict())
            result = analyze_frame(frame, settings)
            report.update(_report(result))
            if out_dir is not None and result.ok:
                report["output_dir"] = str(write_frame_outputs(result, out_dir))
            if not result.ok:
                worst = max(worst, EXIT_BAD_INPUT)
                print(f"livequant analyze: {path}: {result.status}: {result.message}",
                      file=sys.stderr)
            else:
                _print_human(report)
        except FrameError as exc:
            report.update(status="bad-input", reason=exc.reason, error=str(exc))
            worst = max(worst, EXIT_BAD_INPUT)
            print(f"livequant analyze: {exc}", file=sys.stderr)
        except Exception as exc:  # an internal failure: say so loudly, keep the other frames
            report.update(status="internal-error", error=f"{type(exc).__name__}: {exc}")
            worst = EXIT_FAILURE
            traceback.print_exc(file=sys.stderr)
        reports.append(report)
    if tmp is not None:
        tmp.cleanup()
    if args.json:
        json.dump({"frames": reports,
                   "n_ok": sum(r.get("status") == "ok" for r in reports),
                   "n_failed": sum(r.get("status") != "ok" for r in reports)},
                  sys.stdout, indent=1, default=str)
        sys.stdout.write("\n")
    return worst


def _report(result) -> dict:
    s = result.summary()
    return {k: s[k] for k in ("frame_id", "status", "message", "n_columns", "n_converged",
                              "columns_per_sublattice", "median_sigma_position_pm", "lattice",
                              "calibration", "timings_s", "pixel_size_pm")} | (
        {"cells": s["cells"]} if "cells" in s else {})


def _print_human(report) -> None:
    lat = report["lattice"]
    per = ", ".join(f"{k} {v}" for k, v in report["columns_per_sublattice"].items())
    lines = [
        f"{report['frame_id']}: {report['n_columns']} columns ({per}), "
        f"{report['n_converged']} converged, median position sigma "
        f"{report['median_sigma_position_pm']:.2f} pm",
        f"  a = {lat['a_pm']:.2f} +- {lat['sigma_a_pm']:.2f} pm, b = {lat['b_pm']:.2f} +- "
        f"{lat['sigma_b_pm']:.2f} pm, angle = {lat['angle_deg']:.3f} +- "
        f"{lat['sigma_angle_deg']:.3f} deg",
        f"  {report['timings_s'].get('total', 0.0):.2f} s "
        + " ".join(f"{k}={v:.3f}" for k, v in report["timings_s"].items() if k != "total"),
    ]
    cal = report.get("calibration")
    if cal:
        lines.append(f"  calibration vs {cal['material']}: measured {cal['measured_pm']:.2f} pm, "
                     f"reference {cal['reference_pm']:.2f} pm, error "
                     f"{100 * cal['relative_error']:+.3f} %, implied pixel size "
                     f"{cal['implied_pixel_size_pm']:.4f} pm")
    if "output_dir" in report:
        lines.append(f"  wrote {report['output_dir']}")
    print("\n".join(lines), file=sys.stderr)
