"""The live daemon: sources, ledger, worker pool, publisher and command socket.

See :mod:`livequant.daemon.core` for how the parts fit.  The names below are
imported on first use (PEP 562): the operator's commands need the ledger and
the command client, not the analysis behind the worker pool.
"""

__all__ = ["Daemon", "Ledger", "SessionPaths", "SetupError", "Snapshot", "CommandError",
           "send_command", "status_line"]

_LAZY = {"CommandError": "livequant.daemon.client", "send_command": "livequant.daemon.client",
         "Daemon": "livequant.daemon.core", "status_line": "livequant.daemon.core",
         "Ledger": "livequant.daemon.ledger", "SessionPaths": "livequant.daemon.session",
         "SetupError": "livequant.daemon.session", "Snapshot": "livequant.daemon.status"}


from livequant._lazy import lazy_names  # noqa: E402

__getattr__, __dir__ = lazy_names(__name__, _LAZY, __all__)
