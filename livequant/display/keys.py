"""Keys on the live display: choose a proposal and accept or reject it, no second terminal.

Two parts:

* :func:`handle_key` -- pure: ``(PanelState, key, proposals) -> (PanelState,
  action)``.  It never touches the daemon; the caller carries out the action
  (``("accept", id)`` or ``("reject", id)``) and stores the outcome in
  ``PanelState.message``.
* :class:`KeyReader` -- a thread reading single keys from a terminal in
  cbreak mode (no echo, no line buffering; Ctrl+C still interrupts), parsed by
  :func:`parse_keys`, handed to a callback.  The terminal's settings are
  restored on :meth:`KeyReader.stop`, also after errors.

Accepting takes two keys: ``a`` shows the proposal, its dose and the safety
caution in the panel, and only ``y`` then accepts it; any other key cancels.
Rejecting asks the same way.  Proposals are suggestions to the operator: dose
budgets of beam-sensitive specimens, facility procedures and the instrument's
interlocks come first.
"""

from __future__ import annotations

import logging
import os
import threading
from dataclasses import dataclass, replace
from typing import Callable, Sequence

__all__ = ["PanelState", "handle_key", "parse_keys", "KeyReader", "KEY_HELP"]

log = logging.getLogger("livequant.display")

#: One line on the panel: every key the display answers to.
KEY_HELP = "keys: ↑/↓ or j/k choose a proposal · a accept · r reject · y confirm · Esc cancel"

_NEXT = {"down", "j"}
_PREVIOUS = {"up", "k"}
_VERBS = {"a": "accept", "r": "reject"}


@dataclass(frozen=True)
class PanelState:
    """What the operator has chosen on the display.

    Attributes
    ----------
    selected : str or None
        Id of the chosen open proposal (kept by id, so the choice stays on the
        same proposal when the list is re-sorted).
    pending : tuple of (verb, id) or None
        A decision waiting for ``y``.
    message : str
        The outcome of the last key (shown under the table).
    """

    selected: str | None = None
    pending: tuple[str, str] | None = None
    message: str = ""


def _open_ids(proposals: Sequence[dict]) -> list[str]:
    return [str(p.get("id")) for p in proposals if p.get("state") == "open"]


def current(state: PanelState, proposals: Sequence[dict]) -> str | None:
    """The chosen open proposal: the stored id while it is open, else the first open one."""
    ids = _open_ids(proposals)
    if state.selected in ids:
        return state.selected
    return ids[0] if ids else None


def handle_key(state: PanelState, key: str, proposals: Sequence[dict]
               ) -> tuple[PanelState, tuple[str, str] | None]:
    """Apply one key to the panel state.

    Parameters
    ----------
    state : PanelState
    key : str
        A name from :func:`parse_keys` (``"up"``, ``"down"``, ``"escape"``,
        ``"enter"``) or one character.
    proposals : sequence of dict
        The snapshot's proposals (``id``, ``state``, ...), in display order.

    Returns
    -------
    (PanelState, action)
        ``action`` is ``(verb, id)`` to carry out now, or None.
    """
    ids = _open_ids(proposals)
    sel = current(state, proposals)
    if state.pending is not None:
        verb, pid = state.pending
        if key == "y":
            if pid not in ids:
                return PanelState(sel, None, f"{pid} is no longer open: nothing done"), None
            return PanelState(pid, None, f"{verb} {pid}: sent"), (verb, pid)
        return PanelState(sel, None, f"{verb} {pid}: cancelled"), None
    if key in _NEXT or key in _PREVIOUS:
        if not ids:
            return PanelState(None, None, "no open proposal to choose"), None
        k = ids.index(sel) if sel in ids else 0
        k = (k + (1 if key in _NEXT else -1)) % len(ids)
        return PanelState(ids[k], None, ""), None
    if key in _VERBS:
        if sel is None:
            return PanelState(None, None, "no open proposal to decide"), None
        return PanelState(sel, (_VERBS[key], sel), ""), None
    if key == "escape":
        return replace(state, selected=sel, message=""), None
    return state, None


_SEQUENCES = {b"\x1b[A": "up", b"\x1b[B": "down", b"\x1bOA": "up", b"\x1bOB": "down",
              b"\x1b[C": "right", b"\x1b[D": "left", b"\x1bOC": "right", b"\x1bOD": "left"}


def parse_keys(data: bytes) -> list[str]:
    """Split bytes read from a terminal into key names.

    Arrow keys arrive as escape sequences (``ESC [ A`` and the application-mode
    ``ESC O A``); a lone ESC is ``"escape"``; Enter is ``"enter"``; anything
    else is one character per key (undecodable bytes are dropped).
    """
    keys: list[str] = []
    k = 0
    while k < len(data):
        seq = data[k:k + 3]
        if seq in _SEQUENCES:
            keys.append(_SEQUENCES[seq])
            k += 3
            continue
        b = data[k:k + 1]
        k += 1
        if b == b"\x1b":
            keys.append("escape")
        elif b in (b"\r", b"\n"):
            keys.append("enter")
        else:
            try:
                keys.append(b.decode("ascii").lower())
            except UnicodeDecodeError:
                continue
    return keys


class KeyReader:
    """Read keys from terminal `fd` on a thread and pass each to `on_key`.

    Parameters
    ----------
    on_key : callable
        Called with each key name, on the reader's thread.
    fd : int
        A terminal's file descriptor (``sys.stdin.fileno()`` at the display).

    Raises
    ------
    OSError
        From :meth:`start` when `fd` is not a terminal.
    """

    def __init__(self, on_key: Callable[[str], None], fd: int):
        self.on_key = on_key
        self.fd = fd
        self._saved = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self) -> "KeyReader":
        import termios
        import tty

        if not os.isatty(self.fd):
            raise OSError(f"file descriptor {self.fd} is not a terminal: no keys to read")
        self._saved = termios.tcgetattr(self.fd)
        tty.setcbreak(self.fd)   # no echo, no line buffering; Ctrl+C still signals
        self._thread = threading.Thread(target=self._run, name="display-keys", daemon=True)
        self._thread.start()
        return self

    def _run(self) -> None:
        import select

        while not self._stop.is_set():
            try:
                ready, _, _ = select.select([self.fd], [], [], 0.1)
                if not ready:
                    continue
                data = os.read(self.fd, 64)
            except OSError as exc:   # the terminal went away: stop reading, say so once
                log.warning("the display stopped reading keys: %s", exc)
                return
            if not data:
                return
            for key in parse_keys(data):
                try:
                    self.on_key(key)
                except Exception:  # noqa: BLE001 - a key must never kill the reader
                    log.exception("the display could not handle key %r", key)

    def stop(self) -> None:
        import termios

        self._stop.set()
        if self._thread is not None:
            self._thread.join(1.0)
        if self._saved is not None:
            try:
                termios.tcsetattr(self.fd, termios.TCSADRAIN, self._saved)
            finally:
                self._saved = None
