"""Progress feedback for long work: a rich progress bar on a terminal, plain periodic lines elsewhere.

Replay, tuning, catalogue indexing and benchmarks use this so that a person at
a terminal sees a live bar with counts, rate and time left, while a log file,
a pipe or CI gets a few plain lines it can keep.

Use
---
Wrap an iterable (the total is taken from ``len()`` when it has one)::

    from matcher.report.progress import track

    for item in track(items, "replaying", unit="msg"):
        handle(item)

Or advance by hand, for work done in batches::

    from matcher.report.progress import progress

    with progress("indexing", total=n_rows, unit="rows") as p:
        for chunk in chunks:
            work(chunk)
            p.advance(len(chunk))
        p.note("index written")        # a one-line status, shown in either mode

Modes
-----
``mode="auto"`` (the default) picks ``"bar"`` when the stream is a terminal
(``isatty()``, and ``TERM`` is not ``dumb``) and ``"lines"`` otherwise. The
environment variable ``MATCHER_PROGRESS`` (``bar``, ``lines`` or ``off``)
overrides ``auto``, so an operator can quiet a service or force lines in a
terminal multiplexer. An explicit ``mode=`` argument wins over both.

* ``"bar"``: a :mod:`rich` bar with description, bar (pulsing when the total is
  unknown), ``done/total unit``, percentage, rate (``unit/s``), elapsed and
  remaining time; it stays on screen when the work ends.
* ``"lines"``: one line at the start, one every ``every_s`` seconds (default
  10 s) while work goes on, and one at the end, e.g.::

      replaying: started (10,000 msg)
      replaying: 4,211/10,000 msg (42.1%), 421 msg/s, 10.0 s elapsed, about 14 s left
      replaying: done, 10,000 msg in 23.7 s (422 msg/s)

  The rate is the average since the start (steady in logs). If the block
  raises, the last line is ``replaying: stopped after 4,211 msg in 10.3 s
  (KeyboardInterrupt)`` and the exception propagates.
* ``"off"``: nothing is shown; counts are still kept.

Output goes to ``stream`` (default ``sys.stderr``), never stdout, so JSON
output on stdout stays clean. ``clock`` (default :func:`time.monotonic`, s)
can be replaced for tests.

The handle returned by :func:`progress` (and used inside :func:`track`) has
``advance(n=1)``, ``set_total(total)``, ``note(text)`` and the read-only
properties ``completed``, ``total``, ``elapsed_s`` and ``rate_per_s``.
"""

from __future__ import annotations

import os
import sys
import time
from contextlib import contextmanager
from typing import Callable, Iterable, Iterator, TextIO, TypeVar

from matcher.errors import InputError

__all__ = ["progress", "track", "Progress", "choose_mode", "MODES", "ENV_VAR", "format_duration", "format_rate"]

T = TypeVar("T")

#: Accepted values of ``mode``.
MODES = ("auto", "bar", "lines", "off")
#: Environment variable that overrides ``mode="auto"``.
ENV_VAR = "MATCHER_PROGRESS"


def choose_mode(mode: str, stream: TextIO, environ=None) -> str:
    """Resolve ``mode`` (one of :data:`MODES`) to ``"bar"``, ``"lines"`` or ``"off"`` for ``stream``."""
    if mode not in MODES:
        raise InputError(f"progress mode {mode!r} is not one of {', '.join(MODES)}")
    if mode != "auto":
        return mode
    env = (os.environ if environ is None else environ).get(ENV_VAR, "").strip().lower()
    if env:
        if env not in ("bar", "lines", "off"):
            raise InputError(f"environment variable {ENV_VAR}={env!r}: use bar, lines or off")
        return env
    try:
        tty = bool(stream.isatty())
    except (AttributeError, ValueError):  # no isatty, or a closed stream
        tty = False
    term = (os.environ if environ is None else environ).get("TERM", "")
    return "bar" if tty and term != "dumb" else "lines"


def format_duration(seconds: float) -> str:
    """``"12.3 s"``, ``"4 min 05 s"``, ``"2 h 07 min"``."""
    if seconds != seconds or seconds < 0:  # NaN or negative: unknown
        return "?"
    if seconds < 60:
        return f"{seconds:.1f} s"
    if seconds < 3600:
        m, s = divmod(int(round(seconds)), 60)
        return f"{m} min {s:02d} s"
    h, m = divmod(int(round(seconds / 60)), 60)
    return f"{h} h {m:02d} min"


def format_rate(rate: float, unit: str) -> str:
    """``"421 msg/s"``, ``"3.5 msg/s"``, ``"0.25 msg/s"``."""
    if rate != rate:
        return f"? {unit}/s"
    if rate >= 100:
        return f"{rate:,.0f} {unit}/s"
    if rate >= 10:
        return f"{rate:.1f} {unit}/s"
    return f"{rate:.2f} {unit}/s"


def _count(n: float) -> str:
    return f"{n:,.0f}" if float(n).is_integer() else f"{n:,.1f}"


class Progress:
    """The handle of one piece of work (see the module docstring); build it with :func:`progress`."""

    def __init__(self, description: str, total: float | None, unit: str, mode: str, stream: TextIO,
                 every_s: float, clock: Callable[[], float]):
        self.description = description
        self.unit = unit
        self.mode = mode
        self._stream = stream
        self._every = float(every_s)
        self._clock = clock
        self._total = None if total is None else float(total)
        self._done = 0.0
        self._start = clock()
        self._last_line = self._start
        self._bar = None
        self._task = None

    # -------------------------------------------------------------- public
    @property
    def completed(self) -> float:
        return self._done

    @property
    def total(self) -> float | None:
        return self._total

    @property
    def elapsed_s(self) -> float:
        return self._clock() - self._start

    @property
    def rate_per_s(self) -> float:
        """Average rate since the start (``unit`` per second); NaN before any time has passed."""
        el = self.elapsed_s
        return self._done / el if el > 0 else float("nan")

    def advance(self, n: float = 1) -> None:
        """Record ``n`` more units done."""
        if n < 0:
            raise InputError(f"progress {self.description!r}: advance({n!r}) must not be negative")
        self._done += n
        if self._bar is not None:
            self._bar.update(self._task, advance=n)
        elif self.mode == "lines":
            now = self._clock()
            if now - self._last_line >= self._every:
                self._last_line = now
                self._write(self._status_line())

    def set_total(self, total: float | None) -> None:
        """Change the expected total (e.g. once it becomes known)."""
        self._total = None if total is None else float(total)
        if self._bar is not None:
            self._bar.update(self._task, total=self._total)

    def note(self, text: str) -> None:
        """Show a one-line status message (above the bar, or as a line of its own)."""
        if self._bar is not None:
            self._bar.console.print(f"{self.description}: {text}", markup=False, highlight=False)
        elif self.mode == "lines":
            self._write(f"{self.description}: {text}")

    # ------------------------------------------------------------- internal
    def _write(self, line: str) -> None:
        self._stream.write(line + "\n")
        self._stream.flush()

    def _status_line(self) -> str:
        el = self.elapsed_s
        rate = self.rate_per_s
        if self._total:
            frac = self._done / self._total
            left = (self._total - self._done) / rate if rate and rate > 0 else float("nan")
            return (f"{self.description}: {_count(self._done)}/{_count(self._total)} {self.unit} ({frac:.1%}), "
                    f"{format_rate(rate, self.unit)}, {format_duration(el)} elapsed, about {format_duration(left)} left")
        return f"{self.description}: {_count(self._done)} {self.unit}, {format_rate(rate, self.unit)}, " \
               f"{format_duration(el)} elapsed"

    def _begin(self) -> None:
        if self.mode == "lines":
            what = f" ({_count(self._total)} {self.unit})" if self._total is not None else ""
            self._write(f"{self.description}: started{what}")
        elif self.mode == "bar":
            self._bar = _rich_progress(self._stream, self.unit, self._clock)
            self._bar.start()
            self._task = self._bar.add_task(self.description, total=self._total)

    def _end(self, exc: BaseException | None) -> None:
        if self._bar is not None:
            self._bar.stop()
            self._bar = None
        if self.mode != "lines":
            return
        el = self.elapsed_s
        if exc is None:
            self._write(f"{self.description}: done, {_count(self._done)} {self.unit} in {format_duration(el)} "
                        f"({format_rate(self.rate_per_s, self.unit)})")
        else:
            self._write(f"{self.description}: stopped after {_count(self._done)} {self.unit} in "
                        f"{format_duration(el)} ({type(exc).__name__})")


def _rich_progress(stream: TextIO, unit: str, clock):
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        ProgressColumn,
        TaskProgressColumn,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )
    from rich.progress import Progress as RichProgress
    from rich.text import Text

    class RateColumn(ProgressColumn):
        """Units per second (rich's own windowed speed, else the average so far)."""

        def render(self, task):
            speed = task.speed
            if speed is None and task.elapsed:
                speed = task.completed / task.elapsed
            return Text("" if speed is None else format_rate(speed, unit), style="progress.data.speed")

    # The mode is decided already (a terminal, or the caller asked for a bar): draw it.
    console = Console(file=stream, force_terminal=True)
    return RichProgress(
        TextColumn("[progress.description]{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TextColumn(unit),
        TaskProgressColumn(),
        RateColumn(),
        TimeElapsedColumn(),
        TimeRemainingColumn(),
        console=console,
        get_time=clock,
        transient=False,
    )


@contextmanager
def progress(description: str, *, total: float | None = None, unit: str = "items", mode: str = "auto",
             stream: TextIO | None = None, every_s: float = 10.0,
             clock: Callable[[], float] = time.monotonic) -> Iterator[Progress]:
    """Show progress of a block of work; yields a :class:`Progress` handle.

    Parameters
    ----------
    description : str
        What is being done (``"replaying"``), the start of every line.
    total : float, optional
        Units expected; None when unknown (no percentage or time left).
    unit : str
        What is counted (``"msg"``, ``"rows"``, ``"events"``).
    mode : str
        ``"auto"``, ``"bar"``, ``"lines"`` or ``"off"`` (see the module docstring).
    stream : text file, optional
        Where to write (default ``sys.stderr``).
    every_s : float, s
        Interval between status lines in ``"lines"`` mode.
    clock : callable, optional
        Returns seconds (monotonic); for tests.

    Raises
    ------
    InputError
        An unknown mode, a negative total or interval.
    """
    if total is not None and not total >= 0:
        raise InputError(f"progress {description!r}: total={total!r} must be >= 0")
    if not every_s > 0:
        raise InputError(f"progress {description!r}: every_s={every_s!r} must be > 0")
    stream = sys.stderr if stream is None else stream
    handle = Progress(description, total, unit, choose_mode(mode, stream), stream, every_s, clock)
    handle._begin()
    try:
        yield handle
    except GeneratorExit:  # a loop over track() that stopped early (break): not a failure
        handle._end(None)
        raise
    except BaseException as exc:
        handle._end(exc)
        raise
    handle._end(None)


def track(iterable: Iterable[T], description: str, *, total: float | None = None, unit: str = "items",
          mode: str = "auto", stream: TextIO | None = None, every_s: float = 10.0,
          clock: Callable[[], float] = time.monotonic) -> Iterator[T]:
    """Yield the items of ``iterable`` while showing progress (one unit per item).

    ``total`` defaults to ``len(iterable)`` when it has a length. Other
    parameters as in :func:`progress`.
    """
    if total is None:
        try:
            total = len(iterable)  # type: ignore[arg-type]
        except TypeError:
            total = None
    with progress(description, total=total, unit=unit, mode=mode, stream=stream, every_s=every_s,
                  clock=clock) as p:
        for item in iterable:
            yield item
            p.advance(1)
