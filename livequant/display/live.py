"""The Live wrapper: refresh the panel at a fixed low rate and keep logs above it."""

from __future__ import annotations

import logging
from typing import Callable

from livequant.daemon.status import Snapshot
from livequant.display.status import render_status

__all__ = ["LiveDisplay"]


class LiveDisplay:
    """Context manager showing ``render_status(get_snapshot())`` until exit.

    The display pulls: rich's refresh thread calls `get_snapshot` (the
    daemon's latest immutable snapshot) 2-4 times a second, whatever the frame
    rate.  While it runs, log records go through a rich handler on the same
    console, so they scroll above the panel instead of tearing it.  On exit the
    terminal and the previous log handlers are restored, also on errors.
    """

    def __init__(self, get_snapshot: Callable[[], Snapshot], *, refresh_per_second: float = 4.0,
                 console=None):
        from rich.console import Console

        self.get_snapshot = get_snapshot
        self.refresh_per_second = refresh_per_second
        self.console = console or Console(stderr=True)
        self._live = None
        self._saved_handlers: list[logging.Handler] = []

    def __enter__(self) -> "LiveDisplay":
        from rich.live import Live
        from rich.logging import RichHandler

        root = logging.getLogger()
        self._saved_handlers = list(root.handlers)
        handler = RichHandler(console=self.console, show_path=False, rich_tracebacks=False)
        handler.setFormatter(logging.Formatter("%(message)s"))
        root.handlers = [handler]
        self._live = Live(console=self.console, refresh_per_second=self.refresh_per_second,
                          get_renderable=lambda: render_status(self.get_snapshot()),
                          transient=False, redirect_stdout=False, redirect_stderr=True)
        self._live.__enter__()
        return self

    def __exit__(self, *exc) -> bool:
        try:
            if self._live is not None:
                self._live.__exit__(*exc)
        finally:
            logging.getLogger().handlers = self._saved_handlers
        return False
