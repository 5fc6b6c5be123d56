"""A one-line progress bar on stderr: the only progress display, so it lives with the command line.

Library code takes a plain ``progress(fraction, rays, note="")`` callable; this is one such callable.
"""

from __future__ import annotations

import sys
import time


class ProgressBar:
    """A one-line progress bar on stderr, shown only on a terminal and only after one second."""

    def __init__(self, label: str, stream=None, delay: float = 1.0, enabled: bool | None = None):
        self.label = label
        self.stream = stream or sys.stderr
        self.delay = delay
        self.start = time.perf_counter()
        self.enabled = self.stream.isatty() if enabled is None else enabled
        self.shown = False
        self._last = 0.0

    def __call__(self, fraction: float, rays: int = 0, note: str = "") -> None:
        now = time.perf_counter()
        elapsed = now - self.start
        if not self.enabled or elapsed < self.delay or (now - self._last < 0.1 and fraction < 1):
            return
        self._last = now
        width = 28
        filled = int(round(width * min(max(fraction, 0.0), 1.0)))
        eta = elapsed * (1 - fraction) / fraction if fraction > 0 else float("nan")
        rate = f" {rays / elapsed / 1e6:.2f}M rays/s" if rays else ""
        text = f"\r{self.label} [{'#' * filled}{'.' * (width - filled)}] {fraction:6.1%}{rate} ETA {format_seconds(eta)}{note}"
        self.stream.write(text.ljust(100)[:120])
        self.stream.flush()
        self.shown = True

    def close(self) -> None:
        if self.shown:
            self.stream.write("\r" + " " * 120 + "\r")
            self.stream.flush()
            self.shown = False


def format_seconds(seconds: float) -> str:
    """``mm:ss`` (or ``XhYYm`` past an hour); ``--:--`` for NaN."""
    if seconds != seconds:  # NaN
        return "--:--"
    seconds = int(round(seconds))
    return f"{seconds // 60:02d}:{seconds % 60:02d}" if seconds < 3600 else f"{seconds // 3600}h{seconds % 3600 // 60:02d}m"
