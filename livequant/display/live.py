"""The Live wrapper: refresh the panel at a fixed low rate and keep logs above it."""

from __future__ import annotations

import logging
import sys
import threading
from typing import Callable

from livequant.daemon.status import Snapshot
from livequant.display.keys import KeyReader, PanelState, handle_key
from livequant.display.status import render_status

__all__ = ["LiveDisplay", "daemon_decider"]

log = logging.getLogger("livequant.display")


def daemon_decider(daemon) -> Callable[[str, str], str]:
    """``decide(verb, id) -> message``: carry out a key's decision on an in-process daemon.

    The same decision loop methods the command socket calls (`livequant accept`
    and `reject`), recorded as the operator's, with a note that the display was used.
    """

    def decide(verb: str, pid: str) -> str:
        loop = daemon.decisions
        if loop is None:
            return f"{verb} {pid}: the decision loop is not running yet"
        try:
            if verb == "accept":
                out = loop.accept(pid, note="accepted at the live display")
                req = out.get("scan_request") or {}
                return (f"{pid} accepted: scan-request sent ({req.get('fov_nm', 0):.1f} nm, "
                        f"rotation {req.get('scan_rotation_deg', 0):.0f}°)")
            loop.reject(pid, why="rejected at the live display")
            return f"{pid} rejected"
        except (KeyError, ValueError) as exc:
            return f"{verb} {pid}: {exc.args[0] if exc.args else exc}"

    return decide


class LiveDisplay:
    """Context manager showing ``render_status(get_snapshot())`` until exit.

    The display pulls: rich's refresh thread calls `get_snapshot` (the
    daemon's latest immutable snapshot) 2-4 times a second, whatever the frame
    rate, and draws it at the terminal's current width.  While it runs, log
    records go through a rich handler on the same console, so they scroll
    above the panel instead of tearing it.  With `decide` given and a terminal
    on standard input, keys choose, accept and reject proposals
    (:mod:`livequant.display.keys`).  On exit the terminal and the previous
    log handlers are restored, also on errors.

    Parameters
    ----------
    get_snapshot : callable
    refresh_per_second : float
    console : rich.console.Console, optional
        Default: standard error.
    decide : callable, optional
        ``decide(verb, id) -> message`` (see :func:`daemon_decider`).
    key_fd : int, optional
        The terminal to read keys from (default standard input, when it is one).
    """

    def __init__(self, get_snapshot: Callable[[], Snapshot], *, refresh_per_second: float = 4.0,
                 console=None, decide: Callable[[str, str], str] | None = None,
                 key_fd: int | None = None):
        from rich.console import Console

        self.get_snapshot = get_snapshot
        self.refresh_per_second = refresh_per_second
        self.console = console or Console(stderr=True)
        self.decide = decide
        self.key_fd = key_fd
        self.ui: PanelState | None = None
        self._ui_lock = threading.Lock()
        self._keys: KeyReader | None = None
        self._live = None
        self._saved_handlers: list[logging.Handler] = []

    def render(self):
        """The panel as it is now, at the console's width."""
        return render_status(self.get_snapshot(), width=self.console.width, ui=self.ui)

    def on_key(self, key: str) -> None:
        """Apply one key (called on the key reader's thread)."""
        with self._ui_lock:
            state, action = handle_key(self.ui or PanelState(), key,
                                       self.get_snapshot().proposals)
            if action is not None and self.decide is not None:
                try:
                    msg = self.decide(*action)
                except Exception as exc:  # noqa: BLE001 - shown on the panel and logged
                    log.exception("%s %s from the display failed", *action)
                    msg = f"{action[0]} {action[1]} failed: {type(exc).__name__}: {exc}"
                state = PanelState(state.selected, None, msg)
            self.ui = state
        if self._live is not None:
            self._live.refresh()

    def _start_keys(self) -> None:
        if self.decide is None:
            return
        fd = self.key_fd
        if fd is None:
            try:
                fd = sys.stdin.fileno()
            except (AttributeError, OSError, ValueError):
                return
        try:
            self._keys = KeyReader(self.on_key, fd).start()
        except OSError as exc:
            log.info("no keys on the display (%s): use livequant accept / reject", exc)
            return
        self.ui = PanelState()

    def __enter__(self) -> "LiveDisplay":
        from rich.live import Live
        from rich.logging import RichHandler

        root = logging.getLogger()
        self._saved_handlers = list(root.handlers)
        handler = RichHandler(console=self.console, show_path=False, rich_tracebacks=False)
        handler.setFormatter(logging.Formatter("%(message)s"))
        root.handlers = [handler]
        self._live = Live(console=self.console, refresh_per_second=self.refresh_per_second,
                          get_renderable=self.render,
                          transient=False, redirect_stdout=False, redirect_stderr=True)
        self._live.__enter__()
        try:
            self._start_keys()
        except BaseException:
            self.__exit__(*sys.exc_info())
            raise
        return self

    def __exit__(self, *exc) -> bool:
        try:
            if self._keys is not None:
                self._keys.stop()
                self._keys = None
            if self._live is not None:
                self._live.__exit__(*exc)
        finally:
            logging.getLogger().handlers = self._saved_handlers
        return False
