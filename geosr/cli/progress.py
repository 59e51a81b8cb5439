"""What the command line shows of a library run: progress bars and log lines.

The library reports progress through a callback ``progress(done, total)``
and its steps through :mod:`logging`; this module renders both on stderr.
:class:`ProgressBars` is such a callback: it draws a :class:`Progress` bar
(blocks done / total, rate and time left) from the main process as each
block's result arrives, so it works the same with local threads or
processes and with a dask.distributed cluster. On a terminal a bar drawn by
tqdm redraws one line in place (tqdm rather than rich: measured with
``python -X importtime``, it adds about 4 ms to a run against rich's 27 to
58 ms); when stderr is not a terminal (a file, a pipe) it writes a plain
line at every tenth of the work (and at least every 30 seconds), so logs
stay short.
:func:`library_output` prints the library's log records as
``<step>: <message>`` lines (``train: fitting the model ...``).
"""

from __future__ import annotations

import contextlib
import io
import logging
import os
import sys
import time
from collections.abc import Iterator

import click

__all__ = ["Progress", "ProgressBars", "format_duration", "library_output", "progress_bars"]

#: The step named in front of a library log line, by logger (longest prefix wins).
STEP_NAMES = {
    "geosr.pipeline.magnify": "magnify",
    "geosr.pipeline.train": "train",
    "geosr.assess": "geosr assess",
    "geosr": "geosr",
}


def format_duration(seconds):
    """Format a duration as ``"42 s"``, ``"3 min 05 s"`` or ``"2 h 07 min"``.

    Parameters
    ----------
    seconds : float

    Returns
    -------
    str
    """
    if seconds != seconds or seconds == float("inf"):  # NaN or infinite
        return "?"
    seconds = max(0, int(round(seconds)))
    if seconds < 60:
        return f"{seconds} s"
    minutes, sec = divmod(seconds, 60)
    if minutes < 60:
        return f"{minutes} min {sec:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def _columns(stream):
    """Width of the terminal behind ``stream`` in columns (0 when unknown)."""
    try:
        return os.get_terminal_size(stream.fileno()).columns
    except (AttributeError, ValueError, OSError, io.UnsupportedOperation):
        return 0


class Progress:
    """Progress of a run of ``total`` units (blocks), printed to a stream.

    Parameters
    ----------
    total : int
        Number of units the run will complete.
    label : str
        What is running, printed in front (e.g. ``"magnify"``).
    unit : str
        Name of a unit, plural (``"blocks"``).
    quiet : bool
        Print nothing at all.
    stream : file-like, optional
        Defaults to ``sys.stderr`` (looked up when the bar is made).
    min_interval : float
        Seconds between two redraws on a terminal.

    Examples
    --------
    >>> with Progress(4, "magnify", quiet=True) as bar:
    ...     for _ in range(4):
    ...         bar.update()
    >>> bar.done
    4
    """

    def __init__(self, total, label="geosr", unit="blocks", *, quiet=False, stream=None,
                 min_interval=0.2):
        self.total = max(0, int(total))
        self.label = str(label)
        self.unit = str(unit)
        self.quiet = bool(quiet)
        self.stream = sys.stderr if stream is None else stream
        self.min_interval = float(min_interval)
        self.done = 0
        self.start = time.monotonic()
        self._last_draw = 0.0
        self._last_tenth = -1
        self._closed = False
        self._tqdm = None
        isatty = getattr(self.stream, "isatty", None)
        try:
            self._tty = bool(isatty()) if isatty else False
        except (ValueError, OSError):
            self._tty = False

    # ---------------------------------------------------------------- text
    def text(self, now=None):
        """The status line: ``"magnify: 3/12 blocks (25%), 1.5 blocks/s, 6 s left"``."""
        now = time.monotonic() if now is None else now
        elapsed = max(now - self.start, 1e-9)
        pct = 100.0 * self.done / self.total if self.total else 100.0
        rate = self.done / elapsed
        parts = [f"{self.label}: {self.done}/{self.total} {self.unit} ({pct:.0f}%)"]
        if self.done:
            parts.append(f"{rate:.2f} {self.unit}/s" if rate < 10 else f"{rate:.0f} {self.unit}/s")
            if self.done < self.total:
                parts.append(f"{format_duration((self.total - self.done) / rate)} left")
            else:
                parts.append(f"{format_duration(elapsed)} in all")
        return ", ".join(parts)

    def _write(self, text, end):
        try:
            self.stream.write(text + end)
            self.stream.flush()
        except (ValueError, OSError):  # a closed or broken stream must not fail the run
            self.quiet = True

    def _terminal_bar(self):
        """The tqdm bar of a terminal, made on first use (it draws itself at once)."""
        if self._tqdm is None:
            from tqdm import tqdm

            # A terminal that reports no size (0 x 0) would hide the bar: 80 x 20 then.
            sized = _columns(self.stream) > 0
            self._tqdm = tqdm(total=self.total, desc=self.label, unit=f" {self.unit}", file=self.stream,
                              mininterval=self.min_interval, dynamic_ncols=sized,
                              ncols=None if sized else 80, nrows=None if sized else 20, leave=True)
        return self._tqdm

    def _draw_terminal(self, step=0, close=False):
        try:
            bar = self._terminal_bar()
            if step:
                bar.update(step)
            if close:
                bar.close()
        except (ValueError, OSError):  # a closed or broken stream must not fail the run
            self.quiet = True

    def _draw(self, force=False):
        if self.quiet:
            return
        now = time.monotonic()
        if self._tty:
            self._draw_terminal()
            return
        tenth = (10 * self.done) // self.total if self.total else 10
        if force or tenth > self._last_tenth or now - self._last_draw >= 30.0:
            self._write(self.text(now), "\n")
            self._last_tenth = tenth
            self._last_draw = now

    # -------------------------------------------------------------- update
    def update(self, n=1):
        """Record ``n`` more finished units and redraw when due."""
        before = self.done
        self.done = min(self.total, self.done + int(n)) if self.total else self.done + int(n)
        if self._tty:
            if not self.quiet:
                self._draw_terminal(self.done - before)
            return
        self._draw()

    def close(self):
        """Finish the line (on a terminal) and stop drawing."""
        if self._closed:
            return
        self._closed = True
        if self.quiet:
            return
        if self._tty:
            self._draw_terminal(close=True)
        elif self._last_tenth < 10 or self.done < self.total:
            self._write(self.text(), "\n")

    def __enter__(self):
        self._draw(force=True)
        return self

    def __exit__(self, *exc):
        self.close()
        return False


class ProgressBars:
    """A progress callback ``(done, total)`` drawing a :class:`Progress` bar on stderr.

    ``(0, total)`` starts a bar (a new one for each run the library reports);
    the bar finishes when ``done`` reaches ``total`` or at :meth:`close`.

    Parameters
    ----------
    label : str
        Printed in front of the bar (``"magnify"``, ``"train: collect"``).
    unit : str
        What is counted, plural (``"blocks"``, ``"files"``).
    """

    def __init__(self, label: str, unit: str = "blocks") -> None:
        self.label = label
        self.unit = unit
        self.bar: Progress | None = None

    def __call__(self, done: int, total: int) -> None:
        if self.bar is None or done == 0:
            self.close()
            self.bar = Progress(total, self.label, self.unit).__enter__()
        else:
            self.bar.update(done - self.bar.done)
        if done >= total:
            self.close()

    def close(self) -> None:
        """Finish the current bar, if any (also after an error)."""
        if self.bar is not None:
            self.bar.close()
            self.bar = None


@contextlib.contextmanager
def progress_bars(label: str, quiet: bool, unit: str = "blocks") -> Iterator[ProgressBars | None]:
    """A :class:`ProgressBars` callback for the duration, or None with ``--quiet``."""
    if quiet:
        yield None
        return
    bars = ProgressBars(label, unit)
    try:
        yield bars
    finally:
        bars.close()


class _StderrLines(logging.Handler):
    """Prints each record as ``<step>: <message>`` on the current stderr."""

    def emit(self, record: logging.LogRecord) -> None:
        name = record.name
        while name not in STEP_NAMES and "." in name:
            name = name.rsplit(".", 1)[0]
        try:
            click.echo(f"{STEP_NAMES.get(name, 'geosr')}: {record.getMessage()}", err=True)
        except Exception:  # noqa: BLE001 - logging must never fail the run
            self.handleError(record)


@contextlib.contextmanager
def library_output(quiet: bool) -> Iterator[None]:
    """Print the library's INFO log lines on stderr for the duration (none with ``--quiet``)."""
    if quiet:
        yield
        return
    logger = logging.getLogger("geosr")
    handler = _StderrLines(logging.INFO)
    level = logger.level
    logger.addHandler(handler)
    logger.setLevel(logging.INFO)
    try:
        yield
    finally:
        logger.removeHandler(handler)
        logger.setLevel(level)
