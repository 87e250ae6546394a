"""``livequant reprocess SOURCE... --session DIR``: an archive again, on a Dask cluster."""

from __future__ import annotations

import json
import sys

__all__ = ["register", "run"]


def register(sub) -> None:
    from livequant.commands._common import add_settings_arguments

    p = sub.add_parser(
        "reprocess", help="analyse an archive of frames again, on a Dask cluster",
        description="Analyse the frames of SOURCE files, folders or glob patterns (TIFF, NPY, "
                    "and containers: HDF5/EMD, MRC, TIFF stacks, each image a frame) into a "
                    "session folder with the daemon's own worker code, recorded in the "
                    "session's ledger: frames already done are skipped, bad ones quarantined "
                    "with their reason. Runs on a local Dask cluster unless --scheduler (or "
                    "daemon.scheduler) names one. Writes SESSION/cells.parquet and "
                    "columns.parquet at the end.")
    p.add_argument("sources", nargs="+", metavar="SOURCE",
                   help="frame or container files, folders (their frame files), glob patterns")
    p.add_argument("--session", metavar="DIR", required=True,
                   help="session folder for the ledger and outputs (created if missing; an "
                        "existing one resumes: done frames are skipped)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="a running Dask scheduler, e.g. tcp://10.0.0.5:8786 (default: "
                        "daemon.scheduler, else a LocalCluster on this machine)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="worker processes of the local cluster (default: `workers`, else one "
                        "per core)")
    p.add_argument("--force", action="store_true",
                   help="analyse frames already done or quarantined again")
    p.add_argument("--rules", action="store_true",
                   help="also run the decision rules over the frames analysed now, writing "
                        "their flags to the ledger (no proposals)")
    p.add_argument("--json", action="store_true", help="print one JSON summary on stdout")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    add_settings_arguments(p)
    p.set_defaults(func=run)


def run(args) -> int:
    from livequant.cli import EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_OK
    from livequant.commands._common import settings_from_args
    from livequant.config import ConfigError
    from livequant.daemon.session import SetupError
    from livequant.reprocess import reprocess

    if args.workers is not None and args.workers < 1:
        print(f"livequant reprocess: --workers must be at least 1, got {args.workers}",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    if not getattr(args, "verbose", 0):  # Dask's own INFO lines only with -v
        import logging

        import distributed  # noqa: F401 - it sets its loggers' levels when imported

        logging.getLogger("distributed").setLevel(logging.WARNING)
    try:
        settings = settings_from_args(args)
        summary = reprocess(args.sources, args.session, settings, scheduler=args.scheduler,
                            n_workers=args.workers, force=args.force, rules=args.rules,
                            progress=not args.no_progress and sys.stderr.isatty())
    except (ConfigError, ValueError, SetupError, ConnectionError) as exc:
        print(f"livequant reprocess: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    s = summary
    if s.queued == 0:
        print(f"livequant reprocess: nothing to do: {s.skipped_done} frame(s) already done, "
              f"{s.ledger_counts.get('quarantined', 0)} quarantined (--force analyses them "
              "again)", file=sys.stderr)
    else:
        print(f"livequant reprocess: {s.done} frame(s) done, {s.quarantined} quarantined, "
              f"{s.skipped_done} already done before, {s.failed} failed; "
              f"{s.frames_per_s:.2f} frames/s on {s.workers} worker thread(s) "
              f"({s.scheduler})", file=sys.stderr)
    for q in s.quarantine:
        print(f"  quarantined {q['ref']}: {q['reason']}: {q['message']}", file=sys.stderr)
    for e in s.errors:
        print(f"  error: {e}", file=sys.stderr)
    for name, t in s.tables.items():
        print(f"  {name}: {t['rows']} rows in {t['path']}", file=sys.stderr)
    if args.json:
        json.dump(s.to_json(), sys.stdout, indent=1, default=str)
        sys.stdout.write("\n")
    return EXIT_FAILURE if s.failed else EXIT_OK
