"""Progress of the report's steps: a bar at a terminal, a line per step otherwise.

:func:`build_report` calls ``progress(step, k, n)`` before each of its ``n``
steps (``k`` counts from 0) and ``progress("done", n, n)`` at the end, so a
person sees what it is doing during the half minute or more it can take.
"""

from __future__ import annotations

import sys
import time
from contextlib import contextmanager
from typing import Callable, Iterator

__all__ = ["Progress", "console_progress", "line_progress"]

#: ``progress(step, k, n)``: step k of n (0-based) is starting; ``("done", n, n)`` at the end.
Progress = Callable[[str, int, int], None]


def line_progress(label: str, file=None) -> Progress:
    """One line per step, with the seconds since the first (for logs and pipes)."""
    t0 = time.monotonic()

    def progress(step: str, k: int, n: int) -> None:
        out = file or sys.stderr
        print(f"{label}: [{min(k + 1, n)}/{n}] {step} ({time.monotonic() - t0:.0f} s)",
              file=out, flush=True)

    return progress


@contextmanager
def console_progress(label: str, *, file=None) -> Iterator[Progress]:
    """A progress reporter for the console: a rich bar at a terminal, else lines.

    Parameters
    ----------
    label : str
        What is in progress (``"report"``).
    file : file, optional
        Default standard error.
    """
    out = file or sys.stderr
    if not (hasattr(out, "isatty") and out.isatty()):
        yield line_progress(label, out)
        return
    from rich.console import Console
    from rich.progress import (BarColumn, MofNCompleteColumn, Progress as Bar, SpinnerColumn,
                               TextColumn, TimeElapsedColumn)

    bar = Bar(SpinnerColumn(), TextColumn(f"{label}: {{task.description}}"), BarColumn(),
              MofNCompleteColumn(), TimeElapsedColumn(), console=Console(file=out),
              transient=False)
    task = None
    with bar:
        def progress(step: str, k: int, n: int) -> None:
            nonlocal task
            if task is None:
                task = bar.add_task(step, total=n)
            bar.update(task, description=step, completed=k, total=n)

        yield progress
