"""Progress of long runs: a tqdm bar on a terminal, periodic log lines elsewhere.

When stderr is not a terminal (a notebook's captured stream, a log file, a batch queue), a bar
would write control characters; instead one line is written to stderr every ``every``
seconds (none at all for a run shorter than that), e.g.
``batch: 1,200,000 frames (13,400/s)``.
"""

from __future__ import annotations

import sys
import time

__all__ = ["progress", "LogLines"]


class LogLines:
    """A tqdm-shaped counter that writes a line to ``stream`` every ``every`` seconds.

    Parameters
    ----------
    desc : str
    unit : str
    every : float, default=30.0
    stream : file, optional
        Default ``sys.stderr``.
    """

    def __init__(self, desc, unit, every=30.0, stream=None):
        self.desc, self.unit, self.every = desc, unit, float(every)
        self.stream = stream if stream is not None else sys.stderr
        self.n = 0
        self._start = self._last = time.monotonic()

    def update(self, n=1):
        """Count ``n`` more; write a line when ``every`` seconds have passed since the last."""
        self.n += n
        now = time.monotonic()
        if now - self._last >= self.every:
            self._last = now
            rate = self.n / max(now - self._start, 1e-9)
            print(f"{self.desc}: {self.n:,} {self.unit}s ({rate:,.0f}/s)", file=self.stream,
                  flush=True)

    def close(self):
        """Nothing to clear (the lines stay)."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def progress(total=None, *, desc, unit, every=30.0):
    """Return a tqdm bar when stderr is a terminal, else :class:`LogLines`."""
    if sys.stderr.isatty():
        from tqdm.auto import tqdm

        return tqdm(total=total, unit=unit, unit_scale=True, desc=desc, smoothing=0.1)
    return LogLines(desc, unit, every)
