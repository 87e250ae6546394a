"""``livequant report SESSION``: maps and plots of a session as one HTML page with PNGs
(and SVG or PDF copies), with a progress bar (a line per step when not at a terminal)."""

from __future__ import annotations

import json
import sys
from pathlib import Path

__all__ = ["register", "report_command"]


def register(subparsers) -> None:
    from livequant.commands._common import positive_float
    from livequant.report.defaults import (DEFAULT_DPI, DEFAULT_HISTOGRAM_FRAMES,
                                           DEFAULT_MAX_FRAMES, DEFAULT_SMOOTH_CELLS,
                                           DEFAULT_VECTOR, VECTOR_FORMATS)

    p = subparsers.add_parser(
        "report", help="write an HTML report (maps, plots, tables) of a session",
        description="Write SESSION/report/index.html with PNG figures (and an SVG or PDF copy "
                    "of each, for slides and print): frame footprints on the "
                    "specimen, drift, per-frame maps of the frames of interest (columns, "
                    "displacement, polarization, strain, walls, winding numbers), descriptor "
                    "histograms, fit quality against the Cramér-Rao bound, throughput, and "
                    "tables of flags, proposals and decisions. Works on a finished session and "
                    "on one a daemon is still writing (it only reads).")
    p.add_argument("session", metavar="SESSION", help="the session folder (holds ledger.sqlite)")
    p.add_argument("--out", metavar="DIR",
                   help="output folder (default SESSION/report); its figures/ folder is replaced")
    p.add_argument("--frames", nargs="+", metavar="ID",
                   help="draw these frames in full (default: flagged frames first, then the "
                        "most recent)")
    p.add_argument("--max-frames", type=int, default=DEFAULT_MAX_FRAMES, metavar="N",
                   help=f"at most N frames drawn in full (default {DEFAULT_MAX_FRAMES})")
    p.add_argument("--histogram-frames", type=int, default=DEFAULT_HISTOGRAM_FRAMES, metavar="N",
                   help="at most N done frames, evenly spread, feed the descriptor histograms "
                        f"(default {DEFAULT_HISTOGRAM_FRAMES})")
    p.add_argument("--config", metavar="FILE",
                   help="the settings file the session ran with (for the detector gain of the "
                        "Cramér-Rao bound; default: the configured settings)")
    p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="a setting by its dotted key, e.g. "
                        "analysis.refine.gain_counts_per_electron=2.5")
    p.add_argument("--dpi", type=positive_float, default=DEFAULT_DPI, metavar="DPI",
                   help=f"resolution of the PNG figures, 20..1200 (default {DEFAULT_DPI:g})")
    p.add_argument("--vector", choices=VECTOR_FORMATS, default=DEFAULT_VECTOR,
                   help=f"a vector copy of every figure beside its PNG (default {DEFAULT_VECTOR})")
    p.add_argument("--smooth-cells", type=float, default=DEFAULT_SMOOTH_CELLS, metavar="N",
                   help="draw the |P| and strain maps also smoothed by a Gaussian of σ = N cells, "
                        f"beside the raw maps; 0 for raw maps only (default {DEFAULT_SMOOTH_CELLS:g})")
    p.add_argument("--json", action="store_true", help="one JSON object on stdout")
    p.set_defaults(func=report_command)


def report_command(args) -> int:
    from livequant.cli import EXIT_BAD_INPUT, EXIT_OK
    from livequant.commands._common import settings_from_args
    from livequant.config import ConfigError
    from livequant.report import SessionError, build_report

    try:
        settings = settings_from_args(args)
    except ConfigError as exc:
        print(f"livequant report: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    for name in ("max_frames", "histogram_frames"):
        if getattr(args, name) < 1:
            print(f"livequant report: --{name.replace('_', '-')} must be at least 1, got "
                  f"{getattr(args, name)}", file=sys.stderr)
            return EXIT_BAD_INPUT
    if not 0 <= args.smooth_cells <= 10:
        print(f"livequant report: --smooth-cells must lie within 0..10 cells, got "
              f"{args.smooth_cells:g}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if not 20 <= args.dpi <= 1200:
        print(f"livequant report: --dpi must lie within 20..1200, got {args.dpi:g}",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    from livequant.report.progress import console_progress

    try:
        with console_progress("report") as progress:
            result = build_report(Path(args.session), out_dir=args.out, frames=args.frames,
                                  max_frames=args.max_frames,
                                  gain=settings.analysis.refine.gain_counts_per_electron,
                                  histogram_frames=args.histogram_frames, dpi=args.dpi,
                                  vector=args.vector, smooth_cells=args.smooth_cells,
                                  progress=progress)
    except SessionError as exc:
        print(f"livequant report: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.json:
        print(json.dumps(result))
    for note in result["notes"]:
        print(f"note: {note}", file=sys.stderr)
    print(f"report written: {result['index']} ({len(result['figures'])} figures"
          f"{' with ' + args.vector.upper() + ' copies' if args.vector != 'none' else ''}, "
          f"{result['n_frames']} frames, {result['n_flags']} flags, "
          f"{result['n_proposals']} proposals)", file=sys.stderr)
    return EXIT_OK
