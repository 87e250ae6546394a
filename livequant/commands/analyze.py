"""``livequant analyze FRAME... [--out DIR] [--json]``: one-shot analysis of files."""

from __future__ import annotations

import argparse
import json
import logging
import sys
import tempfile
import traceback
from pathlib import Path

from livequant.cli import EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_OK
from livequant.commands._common import add_settings_arguments, settings_from_args

log = logging.getLogger("livequant.analyze")

#: The built-in example: SrTiO3 [001] (a = 390.53 pm, CHECK-VALUES section 1)
#: at a deliberately non-round pixel size and a rotated lattice.
EXAMPLE = dict(shape=(512, 512), a_pm=390.53, pixel_size_pm=9.37, rotation_deg=12.0,
               sigma_pm=42.0, peak_a=300.0, peak_b=120.0, background=30.0, seed=2026)


#: Exit codes of ``livequant analyze`` (also in its --help and the README).
EXIT_CODES_HELP = """\
exit codes:
  0  every frame was handled: analysed (status ok) or found to hold no lattice
     (status no-lattice: blank, noise, amorphous; its summary.json says so)
  2  bad input or usage: a file missing or unreadable, a bad sidecar, no pixel size,
     a bad option (the other frames are still analysed)
  1  internal failure: an error inside livequant (with a traceback; please report it)
"""


def register(sub) -> None:
    p = sub.add_parser(
        "analyze",
        help="analyse frame files once and write columns and summaries",
        description="Fit every atomic column of each frame (TIFF or NPY, optional JSON "
                    "sidecar) and write DIR/FRAME_ID/columns.csv, cells.csv and summary.json.",
        epilog=EXIT_CODES_HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter,
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
    from livequant.frames import write_frame
    from livequant.synthetic import perovskite_frame

    ex = perovskite_frame(**EXAMPLE)
    sidecar = {"frame_id": "example-srtio3", "pixel_size_pm": EXAMPLE["pixel_size_pm"],
               "dwell_time_us": 2.0, "detector": "HAADF", "stage_x_nm": 0.0, "stage_y_nm": 0.0,
               "scan_rotation_deg": 0.0, "specimen": "synthetic SrTiO3 [001]"}
    return write_frame(folder, "example-srtio3", ex.pixels.astype("uint16"), sidecar)


def run(args) -> int:
    from livequant.config import NO_MATERIAL_NOTE, ConfigError
    from livequant.frames import FrameError
    from livequant.outputs import write_frame_outputs
    from livequant.pipeline import analyze_frame

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

    if not settings.analysis.material:
        print(f"livequant analyze: note: {NO_MATERIAL_NOTE}", file=sys.stderr)
    reports, worst = [], EXIT_OK
    written: dict[str, str] = {}  # frame id -> input file, in this run
    # a container (HDF5/EMD, MRC, TIFF stack) is one frame per image (FILE#KEY)
    from livequant.containers import container_members, read_any

    refs = []  # (reference to read, the file it is in)
    for given in paths:
        if not given.exists() and not given.is_symlink():
            refs.append((str(given), None))  # reported as "no such file" below
        elif given.is_dir():
            refs.append((str(given), "folder"))  # reported below
        else:
            refs.extend((r, given) for r in container_members(given))
    for ref, given in refs:
        path = Path(ref)
        report = {"path": ref}
        try:
            if given is None:
                raise FrameError(f"{ref}: no such file", reason="not-found", path=ref)
            if given == "folder":
                raise FrameError(f"{ref}: is a folder, not a frame file; name the frames in it "
                                 f"(e.g. {Path(ref) / '*.tif'}) or analyse the whole folder "
                                 "with `livequant reprocess FOLDER --session DIR`",
                                 reason="not-a-file", path=ref)
            frame = read_any(ref, defaults=settings.frame_defaults.as_dict())
            frame = _unique_id(frame, path, written)
            result = analyze_frame(frame, settings)
            report.update(_report(result))
            if frame.meta.extra.get("frame_id_in_sidecar"):
                report["frame_id_in_sidecar"] = frame.meta.extra["frame_id_in_sidecar"]
            if out_dir is not None:
                report["output_dir"] = str(write_frame_outputs(result, out_dir))
            written[result.frame_id] = str(path)
            if result.ok:
                _print_human(report)
            else:  # handled: the frame holds no lattice; its summary.json says so
                where = f" (wrote {report['output_dir']})" if "output_dir" in report else ""
                print(f"{result.frame_id} ({path.name}): {result.status}: {result.message}"
                      f"{where}", file=sys.stderr)
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
        handled = ("ok", "no-lattice")
        json.dump({"frames": reports,
                   "n_ok": sum(r.get("status") == "ok" for r in reports),
                   "n_no_lattice": sum(r.get("status") == "no-lattice" for r in reports),
                   "n_failed": sum(r.get("status") not in handled for r in reports),
                   "exit_code": worst},
                  sys.stdout, indent=1, default=str)
        sys.stdout.write("\n")
    return worst


def _unique_id(frame, path: Path, written: dict[str, str]):
    """`frame`, or a copy with a frame id not yet used in this run (and say so).

    Two files whose sidecars give one ``frame_id`` would otherwise write the same
    folder, the second silently replacing the first.  The second gets the first
    free ``ID~N`` (N = 2, 3, ...); the sidecar's id is kept in its metadata
    (``extra.frame_id_in_sidecar``).
    """
    import dataclasses

    fid = frame.frame_id
    if fid not in written:
        return frame
    n = 2
    while f"{fid}~{n}" in written:
        n += 1
    new = f"{fid}~{n}"
    print(f"livequant analyze: {path}: frame id {fid!r} is already used by {written[fid]} in "
          f"this run; writing this frame as {new!r} (give each frame its own \"frame_id\" in "
          "its sidecar)", file=sys.stderr)
    meta = dataclasses.replace(frame.meta, frame_id=new,
                               extra={**frame.meta.extra, "frame_id_in_sidecar": fid})
    return dataclasses.replace(frame, meta=meta)


def _report(result) -> dict:
    s = result.summary()
    return {k: s[k] for k in ("frame_id", "status", "message", "n_columns", "n_converged",
                              "columns_per_sublattice", "median_sigma_position_pm", "lattice",
                              "calibration", "timings_s", "pixel_size_pm", "meta")} | (
        {"cells": s["cells"]} if "cells" in s else {})


def _print_human(report) -> None:
    from livequant.textfmt import plus_minus

    lat = report["lattice"]
    per = ", ".join(f"{k} {v}" for k, v in report["columns_per_sublattice"].items())
    lines = [
        f"{report['frame_id']} ({Path(report['path']).name}): {report['n_columns']} columns "
        f"({per}), "
        f"{report['n_converged']} converged, median position sigma "
        f"{report['median_sigma_position_pm']:.2f} pm",
        f"  a = {plus_minus(lat['a_pm'], lat['sigma_a_pm'], 'pm')}, "
        f"b = {plus_minus(lat['b_pm'], lat['sigma_b_pm'], 'pm')}, "
        f"angle = {plus_minus(lat['angle_deg'], lat['sigma_angle_deg'], 'deg')}",
        f"  {report['timings_s'].get('total', 0.0):.2f} s "
        + " ".join(f"{k}={v:.3f}" for k, v in report["timings_s"].items() if k != "total"),
    ]
    cal = report.get("calibration")
    if cal:
        lines.append(f"  calibration vs {cal['material']}: measured "
                     f"{plus_minus(cal['measured_pm'], cal.get('sigma_measured_pm'), 'pm')}, "
                     f"reference {cal['reference_pm']:.2f} pm, error "
                     f"{100 * cal['relative_error']:+.3f} %, implied pixel size "
                     + plus_minus(cal["implied_pixel_size_pm"],
                                  cal.get("sigma_implied_pixel_size_pm"), "pm"))
        if cal.get("apply"):
            lines.append(f"  to apply the corrected pixel size: {cal['apply']}")
    if "output_dir" in report:
        lines.append(f"  wrote {report['output_dir']}")
    source = (report.get("meta") or {}).get("extra", {}).get("pixel_size_source")
    if source:
        lines.insert(1, f"  pixel size {report['pixel_size_pm']:.6g} pm from {source}")
    print("\n".join(lines), file=sys.stderr)
