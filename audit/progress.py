"""A small progress bar on stderr for long resampling runs.

Shown only when the stream is a terminal and the run turns out to be long
(more than ``delay`` seconds expected in total); silent otherwise, so logs,
pipes and tests never see it.  No third-party dependency.
"""

from __future__ import annotations

import sys
import time

__all__ = ["TerminalProgress"]


class TerminalProgress:
    """Callable ``(done, total)`` that draws ``label [#####.....]  45%  ~3 s left``.

    Parameters
    ----------
    label : str
        What is running (e.g. the method id).
    stream : file-like, optional
        Default ``sys.stderr``.  Nothing is written unless ``stream.isatty()``.
    delay : float
        Draw nothing until the expected total run time exceeds this many
        seconds (and at least 0.2 s have passed).
    width : int
        Width of the bar in characters.
    """

    def __init__(self, label: str, *, stream=None, delay: float = 1.0, width: int = 30, clock=time.monotonic):
        self.label = label
        self.stream = sys.stderr if stream is None else stream
        self.delay = float(delay)
        self.width = int(width)
        self._clock = clock
        self._t0 = clock()
        self._last = -1.0
        self._shown = False
        try:
            self._tty = bool(self.stream.isatty())
        except (AttributeError, ValueError):
            self._tty = False

    @property
    def shown(self) -> bool:
        """Whether anything has been drawn."""
        return self._shown

    def __call__(self, done: int, total: int) -> None:
        if not self._tty or total <= 0:
            return
        now = self._clock()
        elapsed = now - self._t0
        frac = min(max(done / total, 0.0), 1.0)
        finished = done >= total
        if not self._shown:
            if finished or elapsed < 0.2 or frac <= 0:
                return
            if elapsed / frac < self.delay:
                return
        if not finished and now - self._last < 0.1:
            return
        self._last = now
        fill = int(round(frac * self.width))
        left = elapsed / frac - elapsed if frac > 0 else 0.0
        tail = "done" if finished else f"~{left:.0f} s left"
        line = f"\r{self.label} [{'#' * fill}{'.' * (self.width - fill)}] {frac:4.0%}  {tail}"
        self.stream.write(line + ("\n" if finished else ""))
        self.stream.flush()
        self._shown = True
