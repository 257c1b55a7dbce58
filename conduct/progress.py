"""Progress display for long work (bootstrap, simulation, power analysis).

Shows a one-line bar on standard error when it is a terminal; stays silent
when asked to be quiet or when standard error is not a terminal (scripts, CI).
"""

from __future__ import annotations

import sys
import time
from typing import TextIO

__all__ = ["Progress"]


class Progress:
    """A minimal progress bar.

    Parameters
    ----------
    total : int
        Number of steps.
    label : str
        What is being counted.
    quiet : bool
        Never print.
    stream : TextIO or None
        Where to print; standard error by default.
    """

    def __init__(self, total: int, label: str, *, quiet: bool = False,
                 stream: TextIO | None = None) -> None:
        self.total = max(int(total), 1)
        self.label = label
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = not quiet and bool(getattr(self.stream, "isatty", lambda: False)())
        self.done = 0
        self._last = 0.0

    def step(self, n: int = 1) -> None:
        """Advance by ``n`` steps and redraw at most ten times a second."""
        self.done += n
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self._last < 0.1 and self.done < self.total:
            return
        self._last = now
        width = 30
        filled = int(width * self.done / self.total)
        self.stream.write(f"\r{self.label} [{'#' * filled}{'.' * (width - filled)}] "
                          f"{self.done}/{self.total}")
        self.stream.flush()

    def close(self) -> None:
        """Finish the line."""
        if self.enabled:
            self.stream.write("\n")
            self.stream.flush()
