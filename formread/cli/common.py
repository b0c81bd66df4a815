"""What every command shares: exit codes, the one-line error edge, the progress bar."""

from __future__ import annotations

import functools
import sys
import time

import typer

from ..errors import FormreadError, one_line

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
        except KeyboardInterrupt:
            typer.echo("formread: interrupted; work saved so far is kept", err=True)
            raise typer.Exit(EXIT_INTERRUPTED)

    return wrapper


class ProgressBar:
    """A one-line progress bar on stderr, driven by a library progress callback.

    Call it as ``bar(done, total, **figures)``; figures are shown after the bar.
    """

    def __init__(self, label: str, *, width: int = 28, stream=None, enabled: bool = True):
        self.label, self.width = label, width
        self.stream = stream or sys.stderr
        self.enabled = enabled
        self.t0 = time.monotonic()
        self._last = 0.0

    def __call__(self, done: int, total: int, **figures) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if done < total and now - self._last < 0.1:
            return
        self._last = now
        frac = done / total if total else 1.0
        fill = int(round(frac * self.width))
        extra = "  ".join(f"{k} {v:.4g}" if isinstance(v, float) else f"{k} {v}" for k, v in figures.items())
        line = f"\r{self.label} [{'#' * fill}{'.' * (self.width - fill)}] {done}/{total} {extra}"
        self.stream.write(line)
        if done >= total:
            self.stream.write("\n")
        self.stream.flush()

    def newline(self) -> None:
        if self.enabled:
            self.stream.write("\n")
            self.stream.flush()
