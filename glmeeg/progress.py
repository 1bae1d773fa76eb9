"""Progress as the command line shows it, and glmeeg's logging set-up.

On a terminal each task (fitting subjects, one test's resamplings, a simulated sample size) is a
rich progress bar with its count, elapsed time and estimate of the time left. Elsewhere (a log
file, a pipe, a batch job) each task prints one line when it is finished. Underneath, glmeeg
logs through the standard :mod:`logging` module, logger ``"glmeeg"``: ``--verbose`` shows its
INFO records (each subject fitted or taken from the cache), ``--quiet`` leaves errors only.
"""

from __future__ import annotations

import logging
import time
from typing import TextIO

__all__ = ["ProgressBars", "configure_logging"]

_HANDLER_MARK = "_glmeeg_cli_handler"


class ProgressBars:
    """A ``progress(task, done, total)`` callable for the CLI.

    Parameters
    ----------
    stream : file
        Where to draw (standard error).
    live : bool
        Draw bars (a terminal); otherwise print one line per finished task.
    """

    def __init__(self, stream: TextIO, *, live: bool):
        self.stream, self.live = stream, live
        self._bars = None
        self._ids: dict[str, int] = {}
        self._started: dict[str, float] = {}
        self._console = None

    @property
    def console(self):
        if self._console is None:
            from rich.console import Console

            self._console = Console(file=self.stream, force_terminal=self.live,
                                    no_color=not self.live, highlight=False)
        return self._console

    def __call__(self, task: str, done: int, total: int) -> None:
        if task not in self._started:
            self._started[task] = time.monotonic()
        if self.live:
            if self._bars is None:
                from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TextColumn,
                                           TimeElapsedColumn, TimeRemainingColumn)

                self._bars = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                      TextColumn("elapsed"), TimeElapsedColumn(), TextColumn("left"),
                                      TimeRemainingColumn(), console=self.console)
                self._bars.start()
            if task not in self._ids:
                self._ids[task] = self._bars.add_task(task, total=total)
            self._bars.update(self._ids[task], completed=done, total=total)
        elif done >= total:
            seconds = time.monotonic() - self._started.pop(task)
            self.stream.write(f"{task}: {total}/{total} done in {seconds:.1f} s\n")
            self.stream.flush()

    def close(self) -> None:
        """Stop drawing; the bars drawn so far stay on screen, the cursor below them."""
        if self._bars is not None:
            self._bars.stop()
            self._bars = None
            self._ids.clear()


class _ConsoleLines(logging.Handler):
    """Log records printed above the live progress bars, each as one line: the terminal may
    fold a long line, but no line break is added (rich's own log handler wraps and adds
    columns)."""

    def __init__(self, console) -> None:
        super().__init__()
        self.console = console

    def emit(self, record: logging.LogRecord) -> None:
        try:
            self.console.print(self.format(record), soft_wrap=True, markup=False, highlight=False)
        except Exception:  # noqa: BLE001 - logging must never break the run
            self.handleError(record)


def configure_logging(stream: TextIO, *, verbose: bool = False, quiet: bool = False,
                      console=None) -> None:
    """Send the ``glmeeg`` logger to ``stream``: INFO with ``verbose``, ERROR with ``quiet``,
    WARNING otherwise. Replaces the handler an earlier call installed."""
    logger = logging.getLogger("glmeeg")
    for h in list(logger.handlers):
        if getattr(h, _HANDLER_MARK, False):
            logger.removeHandler(h)
    handler: logging.Handler
    if console is not None:
        handler = _ConsoleLines(console)
    else:
        handler = logging.StreamHandler(stream)
    handler.setFormatter(logging.Formatter("glmeeg: %(message)s"))
    setattr(handler, _HANDLER_MARK, True)
    logger.addHandler(handler)
    logger.setLevel(logging.ERROR if quiet else logging.INFO if verbose else logging.WARNING)
