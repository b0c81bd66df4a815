"""What every command shares: exit codes, the one-line error edge, the progress bar."""

from __future__ import annotations

import functools
import sys
import time
from typing import TYPE_CHECKING

import typer

from ..errors import FormreadError, one_line

if TYPE_CHECKING:  # rich is imported only when a bar is drawn on a terminal
    from rich.progress import Progress, TaskID

__all__ = ["EXIT_OK", "EXIT_ERROR", "EXIT_USAGE", "EXIT_PAGES_FAILED", "EXIT_INTERRUPTED",
           "edge", "fail", "ProgressBar"]

EXIT_OK = 0            # done
EXIT_ERROR = 1         # an error stopped the command (one line on stderr)
EXIT_USAGE = 2         # bad command line (typer/click's own code)
EXIT_PAGES_FAILED = 3  # done, but some pages failed (each recorded with its reason)
EXIT_INTERRUPTED = 130 # stopped by Ctrl-C; work saved so far is kept


def fail(message: str, code: int = EXIT_ERROR):
    """Print one line on stderr and exit with ``code``."""
    typer.echo(f"formread: error: {message}", err=True)
    raise typer.Exit(code)


def edge(fn):
    """Turn the project's errors into one-line messages and exit codes."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except FormreadError as e:
            fail(one_line(e))
        except KeyboardInterrupt as err:
            typer.echo("formread: interrupted; work saved so far is kept", err=True)
            raise typer.Exit(EXIT_INTERRUPTED) from err

    return wrapper


_PLAIN_EVERY = 5.0
"""Seconds between two progress lines when the output is not a terminal (a log file)."""


def _figure(v) -> str:
    return f"{v:,.1f}" if isinstance(v, float) else str(v)


class ProgressBar:
    """Progress of long work on stderr, driven by a library progress callback ``bar(done, total, **figures)``.

    On a terminal: a rich bar with the count, the rate in ``unit`` per second, the time left and the
    figures.  Elsewhere (a log, a pipe): one plain line at most every :data:`_PLAIN_EVERY` seconds and
    one at the end, never a carriage return.  ``enabled=False`` (``--quiet``) shows nothing.
    """

    def __init__(self, label: str, *, unit: str = "items", enabled: bool = True, stream=None):
        self.label, self.unit, self.enabled = label, unit, enabled
        self.stream = stream or sys.stderr
        self.t0 = time.monotonic()
        self._last = -1e9
        self._rich: Progress | None = None
        self._task: TaskID | None = None
        if enabled and getattr(self.stream, "isatty", lambda: False)():
            # here: rich only for a bar on a terminal, not at every command's start
            from rich.console import Console
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

            self._rich = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                  TextColumn("{task.fields[rate]}"), TimeRemainingColumn(),
                                  TextColumn("{task.fields[extra]}"), console=Console(file=self.stream),
                                  transient=False)

    def _rate(self, done: int) -> str:
        el = time.monotonic() - self.t0
        return f"{done / el:,.1f} {self.unit}/s" if el > 0 and done else ""

    def __call__(self, done: int, total: int, **figures) -> None:
        if not self.enabled:
            return
        extra = "  ".join(f"{k.replace('_', ' ')} {_figure(v)}" for k, v in figures.items())
        if self._rich is not None:
            if self._task is None:
                self._rich.start()
                self._task = self._rich.add_task(self.label, total=total, rate="", extra="")
            self._rich.update(self._task, completed=done, total=total, rate=self._rate(done), extra=extra)
            if done >= total:
                self._rich.stop()
            return
        now = time.monotonic()
        if done < total and now - self._last < _PLAIN_EVERY:
            return
        self._last = now
        rate = self._rate(done)
        self.stream.write(f"{self.label}: {done}/{total}" + (f", {rate}" if rate else "")
                          + (f", {extra}" if extra else "") + "\n")
        self.stream.flush()
