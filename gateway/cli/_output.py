"""Shared terminal output for the commands: sizes and a progress bar."""
from __future__ import annotations

import sys
import time


def size(n: int | float | None) -> str:
    """Bytes as a short human figure (binary units)."""
    if n is None:
        return "-"
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(n) < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return str(n)


class ProgressBar:
    """A one-line bar on stderr, drawn only when stderr is a terminal.

    Two ways to feed it: ``show(ratio, text)``, or call it as a progress
    callback ``(phase, done, total)``; a new phase starts a new line."""

    def __init__(self, stream=None, width: int = 30):
        self.stream = stream or sys.stderr
        self.on = self.stream.isatty()
        self.width = width
        self.phase: str | None = None
        self.drawn = False
        self._last = 0.0

    def show(self, ratio: float, text: str) -> None:
        if not self.on:
            return
        ratio = min(1.0, max(0.0, ratio))
        full = int(ratio * self.width)
        self.stream.write(f"\r[{'#' * full}{'-' * (self.width - full)}] {ratio * 100:5.1f}%  {text}\x1b[K")
        self.stream.flush()
        self.drawn = True

    def __call__(self, phase: str, done: int, total: int | None) -> None:
        if not self.on:
            return
        now = time.monotonic()
        final = total is not None and done >= total
        if phase == self.phase and not final and now - self._last < 0.1:
            return
        if phase != self.phase and self.phase is not None:
            self.stream.write("\n")
        self.phase, self._last = phase, now
        if total:
            self.show(done / total, phase)
        else:
            self.stream.write(f"\r{phase:<24} ...\x1b[K")
            self.stream.flush()
            self.drawn = True

    def close(self) -> None:
        if self.on and self.drawn:
            self.stream.write("\n")
            self.stream.flush()
        self.drawn, self.phase = False, None
