"""The progress line of a pass over the data, on stderr when it is a terminal.

dask's own text bar redraws its line with a carriage return but never clears
it, so a shorter elapsed time leaves the tail of the longer one behind
(``8.84 ss``).  :class:`PassProgressBar` names the pass and pads each redraw
to the width of the previous one.  The local schedulers report through
dask's callback hooks; :func:`wait_with_progress` does the same for futures
of a distributed cluster.
"""

from __future__ import annotations

import contextlib
import sys
import time

from dask.diagnostics import ProgressBar

__all__ = ["PassProgressBar", "progress_line", "wait_with_progress"]

_WIDTH = 30  # characters of the bar itself


def _elapsed(seconds: float) -> str:
    if seconds < 60:
        return f"{seconds:5.1f} s"
    minutes, secs = divmod(int(round(seconds)), 60)
    return f"{minutes:d} min {secs:02d} s"


def progress_line(label: str, fraction: float, seconds: float) -> str:
    """``label [######      ]  45% |  12.3 s``: the text of one redraw (no control characters)."""
    fraction = min(max(fraction, 0.0), 1.0)
    bar = "#" * int(_WIDTH * fraction)
    return f"{label} [{bar:<{_WIDTH}}] {int(100 * fraction):3d}% | {_elapsed(seconds)}"


class PassProgressBar(ProgressBar):
    """dask's progress bar for the local schedulers, with a label and no stale characters."""

    def __init__(self, label: str, out=None, minimum: float = 0.0, dt: float = 0.1):
        super().__init__(minimum=minimum, width=_WIDTH, dt=dt, out=out if out is not None else sys.stderr)
        self.label = label
        self._shown = 0

    def _draw_bar(self, frac, elapsed):
        line = progress_line(self.label, frac, elapsed)
        pad = " " * max(0, self._shown - len(line))  # overwrite what a longer earlier line left
        self._shown = len(line)
        with contextlib.suppress(ValueError):
            if self._file is not None:
                self._file.write("\r" + line + pad)
                self._file.flush()


def wait_with_progress(futures, label: str, out=None, dt: float = 0.2) -> None:
    """Block until ``futures`` (distributed) are done, redrawing one labelled progress line."""
    from distributed import wait

    out = out if out is not None else sys.stderr
    start, shown = time.perf_counter(), 0
    total = max(1, len(futures))
    while True:
        done = sum(f.done() for f in futures)
        line = progress_line(label, done / total, time.perf_counter() - start)
        out.write("\r" + line + " " * max(0, shown - len(line)))
        out.flush()
        shown = len(line)
        if done == len(futures):
            break
        with contextlib.suppress(Exception):
            wait(futures, timeout=dt)
    out.write("\n")
    out.flush()
