"""Progress of a long command on standard error: tasks done of all, tasks per second, time left.

On a terminal it is a live bar (rich, removed when done); otherwise (a log file, a batch job,
a pipe) one plain line at most every :data:`EVERY` seconds and a last one when done, e.g.
``verifying: 12/40 tasks, 3.1 tasks/s, about 9 s left``.  Standard output stays for the
command's result.
"""

from __future__ import annotations

import sys
import time

__all__ = ["TaskProgress", "EVERY", "line"]

#: seconds between two plain progress lines off a terminal
EVERY = 2.0


def _duration(s: float) -> str:
    s = max(0, int(round(s)))
    if s < 90:
        return f"{s} s"
    if s < 5400:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s // 3600} h {s % 3600 // 60:02d} min"


def line(what: str, done: int, total: int, elapsed: float) -> str:
    """One plain progress line (tasks, throughput and time left once a task has finished)."""
    text = f"{what}: {done}/{total} tasks"
    if done and elapsed > 0:
        rate = done / elapsed
        text += f", {rate:.3g} tasks/s"
        if done < total:
            text += f", about {_duration((total - done) / rate)} left"
        else:
            text += f", {_duration(elapsed)} in all"
    return text


class TaskProgress:
    """``update(done, total, what)`` is the ``progress=`` callback of ``Ledger.verify``."""

    def __init__(self, what: str, *, stream=None):
        self.what = what
        self.stream = stream if stream is not None else sys.stderr
        self.t0: float | None = None
        self._last = 0.0
        self._bar = None
        self._task = None
        self._printed_end = False

    def __enter__(self):
        if getattr(self.stream, "isatty", lambda: False)():
            from rich.console import Console
            from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn,
                                       TimeRemainingColumn)

            self._bar = Progress(TextColumn("{task.description}"), BarColumn(),
                                 MofNCompleteColumn(), TextColumn("tasks"),
                                 TextColumn("{task.fields[rate]}"), TimeRemainingColumn(),
                                 console=Console(file=self.stream), transient=True)
            self._bar.__enter__()
            self._task = self._bar.add_task(self.what, total=None, rate="")
        return self

    def update(self, done: int, total: int, where: str = "") -> None:
        now = time.monotonic()
        if self.t0 is None or done == 0:
            self.t0 = now
        elapsed = now - self.t0
        if self._bar is not None:
            rate = f"{done / elapsed:.3g}/s" if done and elapsed > 0 else ""
            self._bar.update(self._task, total=total, completed=done, rate=rate,
                             description=f"{self.what} {where}".strip())
            return
        end = done >= total and total > 0
        if end and self._printed_end:
            return
        if end or done == 0 or now - self._last >= EVERY:
            self._last = now
            self._printed_end = end
            print(line(self.what, done, total, elapsed), file=self.stream, flush=True)

    def __exit__(self, *exc) -> None:
        if self._bar is not None:
            self._bar.__exit__(*exc)
