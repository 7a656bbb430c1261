"""Progress of long work (series fits, posterior sampling, the global fit) on stderr.

On a terminal a live bar (rich); when stderr goes to a file or a pipe, plain lines such as
``fitting spectra: 3 of 17 done (260.0 K), 12 s elapsed``; nothing when switched off (``--quiet``).
One object, :class:`ProgressReport`, serves every long task, so all of them look and behave alike.
"""
from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import TextIO

#: Tasks of many small steps (engine blocks, optimiser evaluations) write a plain line at most this often (s).
PLAIN_INTERVAL_S = 10.0
#: Simulations with at least this many coherences show a progress bar.
LARGE_SYSTEM_COHERENCES = 2000


def elapsed_text(seconds: float) -> str:
    """Elapsed time as people write it: ``12 s``, ``3 min 05 s``, ``1 h 02 min``."""
    s = int(round(seconds))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s // 3600} h {s % 3600 // 60:02d} min"


@dataclass
class _Task:
    label: str
    total: int | None
    unit: str
    interval_s: float
    started: float = field(default_factory=time.perf_counter)
    done: int = 0
    last_line: float = 0.0


class ProgressReport:
    """Progress of one or more counted tasks on stderr: a bar on a terminal, plain lines elsewhere.

    Parameters
    ----------
    show : bool, optional
        False: report nothing.  None or True: a live bar when `stream` is a terminal, else plain lines.
    stream : file, optional
        Where to write (default ``sys.stderr``).

    Use as a context manager; ``add_task(label, total)`` returns a task to ``advance(task, detail)``.
    """

    def __init__(self, show: bool | None = None, stream: TextIO | None = None):
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = show is not False
        self.bar = None
        if self.enabled and _is_terminal(self.stream):
            from rich.console import Console
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

            self.bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                TimeElapsedColumn(), console=Console(file=self.stream), auto_refresh=False)
        self._tasks: dict[int, _Task] = {}

    @property
    def plain(self) -> bool:
        """True when progress goes out as plain lines (stderr is a file or a pipe)."""
        return self.enabled and self.bar is None

    def __enter__(self) -> "ProgressReport":
        if self.bar is not None:
            self.bar.__enter__()
        return self

    def __exit__(self, *exc) -> None:
        if self.bar is not None:
            self.bar.__exit__(*exc)

    def add_task(self, label: str, total: int | None = None, unit: str = "done", interval_s: float = 0.0) -> int:
        """Start a task of `total` steps (None: open-ended), counted in plain lines as ``i of n <unit>``,
        one line per step or at most one per `interval_s` seconds (and the last); returns its handle.
        A counted task of a label already in use (work done in batches) continues that task, its total
        grown by `total`."""
        earlier = next((k for k, t in self._tasks.items() if t.label == label and t.total is not None), None)
        if earlier is not None and total is not None:
            self._tasks[earlier].total += total
            if self.bar is not None:
                self.bar.update(earlier, total=self._tasks[earlier].total)
            return earlier
        key = self.bar.add_task(label, total=total) if self.bar is not None else len(self._tasks)
        self._tasks[key] = _Task(label, total, unit, interval_s)
        return key

    def advance(self, task: int, detail: str = "", steps: int = 1) -> None:
        """`steps` more steps of `task` done; `detail` (e.g. ``"260 K"``) goes into the plain line."""
        t = self._tasks[task]
        t.done += steps
        if self.bar is not None:
            self.bar.advance(task, steps)
        elif self.plain:
            now = time.perf_counter()
            if t.done == t.total or now - t.last_line >= t.interval_s:
                t.last_line = now
                count = f"{t.done} of {t.total}" if t.total is not None else f"{t.done}"
                self.line(task, f"{count} {t.unit}", detail)

    def refresh(self) -> None:
        """Redraw the bar (plain lines are written as they come)."""
        if self.bar is not None:
            self.bar.refresh()

    def line(self, task: int, what: str, detail: str = "") -> None:
        """A plain line ``label: what (detail), N s elapsed`` (only when reporting in plain lines)."""
        if not self.plain:
            return
        t = self._tasks[task]
        detail = f" ({detail})" if detail else ""
        print(f"{t.label}: {what}{detail}, {elapsed_text(time.perf_counter() - t.started)} elapsed",
              file=self.stream, flush=True)

    def finish(self, task: int) -> None:
        """Close an open-ended task: a last plain line with the steps done and the time taken."""
        t = self._tasks[task]
        self.line(task, f"finished after {t.done} {t.unit}")
        if self.bar is not None:
            self.bar.update(task, total=self._tasks[task].done)
        self.refresh()


@contextmanager
def block_progress(enabled: bool) -> Iterator[Callable[[int, int], None]]:
    """Progress over the engine's blocks on stderr, for systems of at least :data:`LARGE_SYSTEM_COHERENCES`
    coherences: a bar on a terminal, else plain lines; yields the ``progress(done, total)`` that
    :func:`dnmr.engine.spectrum.simulate` calls after each block."""
    with ProgressReport(enabled) as report:
        task, shown = None, 0

        def advance(done: int, total: int) -> None:
            nonlocal task, shown
            if total < LARGE_SYSTEM_COHERENCES:
                return
            if task is None:
                task = report.add_task("simulating", total, unit="coherences", interval_s=PLAIN_INTERVAL_S)
            report.advance(task, steps=done - shown)
            report.refresh()
            shown = done

        yield advance


def _is_terminal(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False
