"""A small terminal progress bar for long runs (stderr, only on a terminal).

Usage::

    bar = ProgressBar(enabled=None)          # None: on when stderr is a tty
    bar("gamma", 10, 200)                    # stage label, done, total
    bar.close()

A :class:`ProgressBar` is a callable ``(stage, done, total)`` and can be passed
wherever a ``progress`` callback is accepted (for example
:func:`schedule.family.design_family`).
"""

from __future__ import annotations

import sys
import time
from typing import TextIO


class ProgressBar:
    """Draw ``stage [#####-----] done/total  rate/s`` on one line of ``stream``.

    Parameters
    ----------
    enabled : True / False, or None to draw only when ``stream`` is a terminal.
    stream : where to draw (default ``sys.stderr``).
    width : number of bar cells.
    min_interval : seconds between redraws (the last step is always drawn).
    """

    def __init__(self, enabled: bool | None = None, stream: TextIO | None = None,
                 width: int = 30, min_interval: float = 0.1) -> None:
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            enabled = bool(isatty and isatty())
        self.enabled = enabled
        self.width = width
        self.min_interval = min_interval
        self._stage: str | None = None
        self._start = 0.0
        self._last = 0.0
        self._open = False

    def __call__(self, stage: str, done: int, total: int) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if stage != self._stage:
            if self._open:
                self.stream.write("\n")
            self._stage, self._start, self._last = stage, now, 0.0
        if done < total and now - self._last < self.min_interval:
            return
        self._last = now
        frac = 0.0 if total <= 0 else min(1.0, done / total)
        cells = int(round(frac * self.width))
        elapsed = max(now - self._start, 1e-9)
        rate = done / elapsed
        self.stream.write(f"\r{stage:<12} [{'#' * cells}{'-' * (self.width - cells)}] "
                          f"{done}/{total}  {rate:7.1f}/s")
        self.stream.flush()
        self._open = True

    def close(self) -> None:
        """End the line of the bar (if one was drawn)."""
        if self.enabled and self._open:
            self.stream.write("\n")
            self.stream.flush()
        self._open = False

    def __enter__(self) -> ProgressBar:
        return self

    def __exit__(self, *exc) -> None:
        self.close()
