"""A one-line progress bar on stderr for long batch jobs.

Drawn only for a person watching: off with ``--quiet`` and whenever stderr
is not a terminal (a CI log gets no carriage-return noise).
"""

from __future__ import annotations

import sys
import time


class Progress:
    """``with Progress(total, "export") as bar: bar.step("census")``."""

    def __init__(self, total: int, label: str = "", *, stream=None, enabled: bool | None = None,
                 width: int = 28):
        self.total = max(int(total), 1)
        self.label = label
        self.stream = stream if stream is not None else sys.stderr
        if enabled is None:
            isatty = getattr(self.stream, "isatty", None)
            enabled = bool(isatty and isatty())
        self.enabled = enabled
        self.width = width
        self.done = 0
        self.start = time.perf_counter()
        self._last_len = 0

    def __enter__(self):
        self.draw("")
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def add(self, n: int) -> None:
        """More work discovered on the way (keeps the bar honest)."""
        self.total += max(int(n), 0)

    def step(self, what: str = "", n: int = 1) -> None:
        self.done = min(self.done + n, self.total)
        self.draw(what)

    def draw(self, what: str) -> None:
        if not self.enabled:
            return
        frac = self.done / self.total
        fill = int(round(frac * self.width))
        elapsed = time.perf_counter() - self.start
        text = (f"{self.label} [{'#' * fill}{'.' * (self.width - fill)}] "
                f"{self.done}/{self.total} {elapsed:5.1f}s {what}")
        text = text[:118]
        pad = max(self._last_len - len(text), 0)
        self.stream.write("\r" + text + " " * pad)
        self.stream.flush()
        self._last_len = len(text)

    def close(self) -> None:
        if self.enabled and self._last_len:
            self.stream.write("\r" + " " * self._last_len + "\r")
            self.stream.flush()
            self._last_len = 0

    @property
    def elapsed(self) -> float:
        return time.perf_counter() - self.start
