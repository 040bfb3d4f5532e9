"""Progress on the terminal for long runs: a bar for counted stages, a stage line otherwise.

Usage::

    bar = ProgressBar(enabled=None)          # None: on when stderr is a terminal
    bar("gamma", 0, 200)                     # announce a counted stage (starts its clock)
    bar("gamma", 10, 200)                    # stage label, done, total
    bar("report", 0, 0)                      # a stage with no count: a stage line
    bar.close()

A :class:`ProgressBar` is a callable ``(stage, done, total)`` (the :data:`Progress`
protocol) and can be passed wherever a ``progress`` callback is accepted (for
example :func:`schedule.family.design_family`). A total of 0 or less marks a stage
without a count: it is drawn as ``stage ...`` and finished with its elapsed time
when the next stage starts or the bar is closed.

The rate is measured from the first report of a stage: ``(done - done_first) /
(now - t_first)``, so a stage that jumps from nothing to all in one report shows
its elapsed time, never an absurd rate. Callers announce a stage with ``done = 0``
before its work starts. The estimated time left (ETA) is ``(total - done) / rate``.
Progress is written to stderr (never stdout, which may carry ``--json``), only
when stderr is a terminal, unless the environment variable
``SCHEDULE_PROGRESS`` is ``1`` (always draw, for logs and tests) or ``0`` (never).
"""

from __future__ import annotations

import os
import sys
import threading
import time
from collections.abc import Callable, Iterator
from typing import TextIO

Progress = Callable[[str, int, int], None]
ENV = "SCHEDULE_PROGRESS"


def format_rate(rate: float | None) -> str:
    """Items per second in a readable unit: ``"87.8/s"``, or ``"3.2 s each"`` below 1/s.

    ``None`` (not measured yet) reads ``"--"``.
    """
    if rate is None or not rate > 0:
        return "--"
    if rate >= 100:
        return f"{rate:.0f}/s"
    if rate >= 10:
        return f"{rate:.1f}/s"
    if rate >= 1:
        return f"{rate:.2f}/s"
    return f"{format_seconds(1.0 / rate)} each"


def format_seconds(seconds: float) -> str:
    """A duration: ``"4.2 s"`` below a minute, ``"1:05"`` (m:ss), ``"2:03:07"`` (h:mm:ss)."""
    if seconds < 10:
        return f"{seconds:.1f} s"
    if seconds < 60:
        return f"{seconds:.0f} s"
    total = int(round(seconds))
    h, rest = divmod(total, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def forced() -> bool | None:
    """The ``SCHEDULE_PROGRESS`` setting: True (``1``), False (``0``) or None (unset)."""
    value = os.environ.get(ENV, "").strip()
    if value == "1":
        return True
    if value == "0":
        return False
    return None


class ProgressBar:
    """Draw ``stage [#####-----] done/total  rate  ETA`` (or a stage line) on ``stream``.

    Parameters
    ----------
    enabled : True / False, or None for ``SCHEDULE_PROGRESS`` when set, else only
        when ``stream`` is a terminal. False always wins (``--quiet``).
    stream : where to draw (default ``sys.stderr``).
    width : number of bar cells.
    min_interval : seconds between redraws (the first and last report of a stage are
        always drawn).
    clock : a monotonic clock in seconds (injectable for tests).
    tick : seconds between redraws of an unfinished stage by a background thread (its
        elapsed time and ETA move while a long step runs); None: no thread.
    """

    def __init__(self, enabled: bool | None = None, stream: TextIO | None = None,
                 width: int = 24, min_interval: float = 0.1,
                 clock: Callable[[], float] = time.monotonic,
                 tick: float | None = 1.0) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            enabled = forced()
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            enabled = bool(isatty and isatty())
        self.enabled = bool(enabled)
        self.width = width
        self.min_interval = min_interval
        self.clock = clock
        self._stage: str | None = None
        self._total = 0
        self._done = 0
        self._t0 = 0.0  # time of the stage's first report
        self._done0 = 0  # done at the stage's first report
        self._last = 0.0
        self._open = False
        self.tick = tick
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._ticker: threading.Thread | None = None

    # ------------------------------------------------------------------ arithmetic
    def rate(self, done: int, now: float) -> float | None:
        """Items per second since the stage's first report (None before any progress)."""
        elapsed = now - self._t0
        if elapsed <= 0 or done <= self._done0:
            return None
        return (done - self._done0) / elapsed

    def eta(self, done: int, total: int, now: float) -> float | None:
        """Seconds left at the measured rate (None while the rate is unknown)."""
        r = self.rate(done, now)
        if r is None:
            return None
        return max(0, total - done) / r

    def line(self, stage: str, done: int, total: int, now: float) -> str:
        """The text drawn for a report (without the carriage return)."""
        elapsed = max(0.0, now - self._t0)
        if total <= 0:
            count = f"{done} done, " if done > 0 else ""
            return f"{stage:<12} ... {count}{format_seconds(elapsed)}"
        frac = min(1.0, max(0.0, done / total))
        cells = int(frac * self.width)
        bar = "#" * cells + "-" * (self.width - cells)
        text = f"{stage:<12} [{bar}] {done}/{total}  {format_rate(self.rate(done, now))}"
        if done >= total:
            return f"{text}  in {format_seconds(elapsed)}"
        eta = self.eta(done, total, now)
        return f"{text}  ETA {format_seconds(eta) if eta is not None else '--'}"

    # ------------------------------------------------------------------ drawing
    def __call__(self, stage: str, done: int, total: int) -> None:
        if not self.enabled:
            return
        with self._lock:
            self._report(stage, done, total)
        if self.tick and self._ticker is None:
            self._stop.clear()
            self._ticker = threading.Thread(target=self._tick_loop, daemon=True)
            self._ticker.start()

    def _tick_loop(self) -> None:
        while not self._stop.wait(self.tick):
            with self._lock:
                if self._open and self._stage is not None and (
                        self._total <= 0 or self._done < self._total):
                    self._draw(self.line(self._stage, self._done, self._total, self.clock()))

    def _report(self, stage: str, done: int, total: int) -> None:
        now = self.clock()
        new = (stage != self._stage or total != self._total or done < self._done)
        if new:
            self._finish(now)
            self._stage, self._total, self._t0, self._done0 = stage, total, now, done
        elif total > 0 and done < total and now - self._last < self.min_interval:
            self._done = done
            return
        self._done = done
        self._last = now
        self._draw(self.line(stage, done, total, now))

    def _draw(self, text: str) -> None:
        self.stream.write(f"\r{text}\x1b[K" if self._tty() else f"\r{text}")
        self.stream.flush()
        self._open = True

    def _tty(self) -> bool:
        isatty = getattr(self.stream, "isatty", None)
        return bool(isatty and isatty())

    def _finish(self, now: float) -> None:
        """End the current stage's line (a stage line gets its elapsed time)."""
        if not self._open:
            return
        if self._stage is not None and self._total <= 0:
            self._draw(f"{self._stage:<12} done in {format_seconds(max(0.0, now - self._t0))}")
        self.stream.write("\n")
        self.stream.flush()
        self._open = False

    def close(self, erase: bool = False) -> None:
        """End the line of the bar (if one was drawn) and stop the redraw thread;
        ``erase`` clears an unfinished line instead (an error message follows)."""
        if self._ticker is not None:
            self._stop.set()
            self._ticker.join()
            self._ticker = None
        with self._lock:
            if self.enabled and erase and self._open and self._tty():
                self.stream.write("\r\x1b[K")
                self.stream.flush()
            elif self.enabled:
                self._finish(self.clock())
            self._stage = None
            self._open = False

    def __enter__(self) -> ProgressBar:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def timed_slices(total: int, first: int = 32, seconds: float = 0.75, largest: int | None = None,
                 clock: Callable[[], float] = time.perf_counter) -> Iterator[slice]:
    """Consecutive slices covering ``range(total)``, each sized to take about ``seconds``.

    The first slice has ``first`` items; each next one is sized from the time per item
    the caller took on the previous slice (measured between the yields), never below
    ``first`` nor above ``largest``. Work done in such chunks reports progress a few
    times a second while the fixed cost per chunk stays a small share of the run (a
    chunk of about ``seconds`` against a per-call cost of milliseconds).
    """
    start, size = 0, max(1, int(first))
    cap = int(largest) if largest else None
    while start < total:
        stop = min(int(total), start + size)
        t = clock()
        yield slice(start, stop)
        per_item = (clock() - t) / (stop - start)
        size = max(int(first), int(seconds / per_item)) if per_item > 0 else 2 * size
        if cap is not None:
            size = min(size, max(1, cap))
        start = stop


def prefixed(progress: Progress | None, prefix: str) -> Progress | None:
    """``progress`` with every stage label preceded by ``prefix`` (None stays None)."""
    if progress is None:
        return None

    def report(stage: str, done: int, total: int) -> None:
        progress(f"{prefix} {stage}", done, total)

    return report


def stage_line(progress: Progress | None, stage: str) -> None:
    """Announce a stage without a count on ``progress`` (nothing when it is None)."""
    if progress is not None:
        progress(stage, 0, 0)
