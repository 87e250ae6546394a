"""The live daemon: sources, ledger, worker pool, publisher and command socket.

See :mod:`livequant.daemon.core` for how the parts fit.
"""

from livequant.daemon.commands import CommandError, send_command
from livequant.daemon.core import Daemon, status_line
from livequant.daemon.ledger import Ledger
from livequant.daemon.session import SessionPaths, SetupError
from livequant.daemon.status import Snapshot

__all__ = ["Daemon", "Ledger", "SessionPaths", "SetupError", "Snapshot", "CommandError",
           "send_command", "status_line"]
