"""``livequant run``: the daemon beside an acquisition session."""

from __future__ import annotations

import logging
import sys
from pathlib import Path

__all__ = ["register", "run_command"]

log = logging.getLogger("livequant.run")

DEFAULT_SESSION = "livequant-session"


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "run", help="analyse frames live from a folder and/or a socket",
        description="Run the daemon: analyse every frame that lands in the watched folder or "
                    "arrives on the ingest socket, exactly once, and publish the results. "
                    "Ctrl+C (or SIGTERM) drains and stops; a second Ctrl+C stops at once.")
    p.add_argument("--watch", metavar="DIR", help="folder the acquisition writes frames to "
                   "(omit for socket ingest only)")
    p.add_argument("--session", metavar="DIR", default=DEFAULT_SESSION,
                   help=f"session folder for the ledger, events and outputs "
                        f"(default ./{DEFAULT_SESSION}; created if missing; reusing one resumes)")
    p.add_argument("--config", metavar="FILE", help="user TOML configuration")
    p.add_argument("--workers", type=int, metavar="N",
                   help="analysis processes (default: one per core)")
    p.add_argument("--pixel-size-pm", "--pixel-size", type=float, metavar="PM",
                   dest="pixel_size_pm",
                   help="pixel size for frames whose sidecar gives none, picometres "
                        "(--pixel-size: the old spelling, kept for one release)")
    p.add_argument("--material", metavar="NAME",
                   help="material of the specimen (config/materials.toml or --materials "
                        "FILE); without it there is no polarization (pol_*)")
    p.add_argument("--materials", metavar="FILE",
                   help="your own material table (TOML; every entry needs a `source`)")
    p.add_argument("--settle-time", type=float, metavar="S", dest="settle_time_s",
                   help="a frame without sidecar is complete once unchanged this long, seconds")
    p.add_argument("--ingest-port", type=int, metavar="PORT",
                   help="ZeroMQ PULL port for frames (0 = any free port)")
    p.add_argument("--events-port", type=int, metavar="PORT",
                   help="ZeroMQ PUB port for events (0 = any free port)")
    p.add_argument("--commands-port", type=int, metavar="PORT",
                   help="ZeroMQ REP port for commands (0 = any free port)")
    p.add_argument("--no-ingest", action="store_true", help="do not open the ingest socket")
    p.add_argument("--no-console", action="store_true",
                   help="no live display: log one status line per heartbeat instead")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="analyse on the Dask cluster of this scheduler (tcp://HOST:PORT) "
                        "instead of local processes; ledger, rules, sockets and display stay "
                        "here and the frames' pixels travel to the workers "
                        "(default: daemon.scheduler)")
    p.add_argument("--analyze", metavar="MODULE:FUNCTION", default=None,
                   help="advanced: the per-frame analysis to run "
                        "(default livequant.pipeline:analyze_frame)")
    p.set_defaults(func=run_command)


def run_command(args) -> int:
    from livequant.cli import EXIT_BAD_INPUT
    from livequant.config import NO_MATERIAL_NOTE, ConfigError, check_materials, load_settings
    from livequant.daemon import Daemon, SetupError
    from livequant.daemon.worker import DEFAULT_ANALYZE, resolve_callable

    overrides = {
        "workers": args.workers,
        "frame_defaults.pixel_size_pm": args.pixel_size_pm,
        "analysis.material": args.material,
        "analysis.materials_file": args.materials,
        "daemon.settle_time_s": args.settle_time_s,
        "daemon.ingest_port": args.ingest_port,
        "daemon.events_port": args.events_port,
        "daemon.commands_port": args.commands_port,
        "daemon.ingest_socket": False if args.no_ingest else None,
        "daemon.scheduler": getattr(args, "scheduler", None),
    }
    try:
        settings = load_settings(args.config, overrides=overrides)
        check_materials(settings)
    except ConfigError as exc:
        print(f"livequant run: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if not settings.analysis.material:
        print(f"livequant run: note: {NO_MATERIAL_NOTE}", file=sys.stderr)
    if args.watch is None and not settings.daemon.ingest_socket:
        print("livequant run: nothing to listen to: give --watch DIR or enable the ingest "
              "socket", file=sys.stderr)
        return EXIT_BAD_INPUT
    analyze = args.analyze or DEFAULT_ANALYZE
    try:
        resolve_callable(analyze)  # fail now, not in every worker
    except ValueError as exc:
        print(f"livequant run: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT

    use_console = not args.no_console and sys.stderr.isatty()
    if not use_console:
        logging.getLogger("livequant").setLevel(min(logging.getLogger().level, logging.INFO))
    daemon = Daemon(settings, session=Path(args.session), watch=args.watch, analyze=analyze,
                    log_heartbeat=not use_console)
    display = None
    if use_console:
        from livequant.display import LiveDisplay
        from livequant.display.live import daemon_decider

        display = LiveDisplay(lambda: daemon.snapshot,
                              refresh_per_second=settings.daemon.refresh_per_second,
                              decide=daemon_decider(daemon))
    try:
        code = daemon.run(display=display)
    except SetupError as exc:
        print(f"livequant run: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    _write_tables(Path(args.session))
    # Hand a captured signal back to the default behaviour (the exit status a
    # supervisor expects from a process stopped by SIGTERM or Ctrl+C).
    for sig in daemon.captured_signals[:1]:
        import signal

        signal.raise_signal(sig)
    return code


def _write_tables(session: Path) -> None:
    """Session-wide cells.parquet / columns.parquet once the daemon has stopped."""
    from livequant.tables import write_session_tables

    try:
        info = write_session_tables(session)
    except Exception as exc:  # noqa: BLE001 - the session itself is complete; say what failed
        log.error("could not write the session tables (cells/columns.parquet): %s: %s",
                  type(exc).__name__, exc)
        print(f"livequant run: the session is complete, but its Parquet tables could not be "
              f"written ({type(exc).__name__}: {exc}); `livequant reprocess` writes them",
              file=sys.stderr)
        return
    log.info("session tables: %s", ", ".join(f"{k} {v['rows']} rows" for k, v in info.items()))

