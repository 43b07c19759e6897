"""A small progress reporter for long loops (calibration, sampling, relaxations).

On a terminal it redraws one line in place: a bar, done/total, failures and
the estimated time left. When the stream is not a terminal (CI logs, files)
it prints a plain line now and then instead, so logs stay readable. With
``quiet=True`` it prints nothing at all.

Example
-------
>>> with Progress(50, "calibration", quiet=True) as bar:
...     for _ in range(50):
...         bar.advance()
"""

from __future__ import annotations

import sys
import time
from typing import TextIO

# Redrawing a terminal line more often than this only costs time.
REDRAW_SECONDS = 0.1
# Plain (non-terminal) output: one line at least this far apart, and one at
# every tenth of the work, so a CI log gets about a dozen lines per loop.
PLAIN_SECONDS = 30.0
PLAIN_STEPS = 10
BAR_WIDTH = 24


def format_duration(seconds: float) -> str:
    """``75`` -> ``'1:15'``, ``3725`` -> ``'1:02:05'``."""
    seconds = max(0, int(round(seconds)))
    hours, rest = divmod(seconds, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}" if hours else f"{minutes}:{secs:02d}"


class Progress:
    """Counts finished items of a known total and shows the rate and time left.

    Parameters
    ----------
    total : int
        Number of items the loop will finish.
    label : str
        What is being counted, shown at the start of each line.
    quiet : bool, default False
        Print nothing.
    done : int, default 0
        Items already finished before this loop started (a resumed run); they
        count towards the total but not towards the rate.
    failed : int, default 0
        Failures among the items already finished.
    stream : file-like, optional
        Where to write; standard error by default.
    """

    def __init__(self, total: int, label: str, quiet: bool = False, *, done: int = 0,
                 failed: int = 0, stream: TextIO | None = None):
        self.total = int(total)
        self.label = label
        self.quiet = quiet
        self.done = int(done)
        self.failed = int(failed)
        self.stream = stream if stream is not None else sys.stderr
        self._resumed = self.done
        self._start = time.monotonic()
        self._last_draw = 0.0
        self._last_plain_step = -1
        self._last_plain_time = self._start
        self._last_plain_done = -1
        self._closed = False
        isatty = getattr(self.stream, "isatty", None)
        self.terminal = bool(isatty and isatty())
        if not quiet and not self.terminal:
            self._plain(force=True)

    # --- public ---------------------------------------------------------------

    def advance(self, n: int = 1, failed: int = 0) -> None:
        """Count ``n`` more finished items, ``failed`` of which failed."""
        self.done += n
        self.failed += failed
        if self.quiet:
            return
        if self.terminal:
            now = time.monotonic()
            if now - self._last_draw >= REDRAW_SECONDS or self.done >= self.total:
                self._draw()
                self._last_draw = now
        else:
            self._plain()

    def close(self) -> None:
        """Print the final state once and end the line."""
        if self._closed:
            return
        self._closed = True
        if self.quiet:
            return
        if self.terminal:
            self._draw()
            self.stream.write("\n")
        else:
            self._plain(force=self._last_plain_done != self.done)
        self.stream.flush()

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # --- text -----------------------------------------------------------------

    def eta(self) -> float | None:
        """Seconds left at the rate of this loop so far (None before any item)."""
        new = self.done - self._resumed
        if new <= 0:
            return None
        elapsed = time.monotonic() - self._start
        return elapsed / new * max(self.total - self.done, 0)

    def status(self) -> str:
        """The counts as text, e.g. ``'12/50 done, 1 failed, 0:34 left'``."""
        parts = [f"{self.done}/{self.total} done"]
        if self.failed:
            parts.append(f"{self.failed} failed")
        left = self.eta()
        if self.done >= self.total:
            parts.append(f"{format_duration(time.monotonic() - self._start)} elapsed")
        elif left is not None:
            parts.append(f"{format_duration(left)} left")
        return ", ".join(parts)

    def _draw(self) -> None:
        share = self.done / self.total if self.total else 1.0
        filled = int(round(BAR_WIDTH * min(share, 1.0)))
        bar = "#" * filled + "-" * (BAR_WIDTH - filled)
        self.stream.write(f"\r{self.label} [{bar}] {self.status()}\x1b[K")
        self.stream.flush()

    def _plain(self, force: bool = False) -> None:
        step = int(PLAIN_STEPS * self.done / self.total) if self.total else PLAIN_STEPS
        now = time.monotonic()
        due = step > self._last_plain_step or now - self._last_plain_time >= PLAIN_SECONDS
        if not (force or due):
            return
        self._last_plain_step = step
        self._last_plain_time = now
        self._last_plain_done = self.done
        self.stream.write(f"{self.label}: {self.status()}\n")
        self.stream.flush()
