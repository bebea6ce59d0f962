"""A small progress line on stderr (step, rate and time left), and the one timer every stage reports with."""
from __future__ import annotations

import sys
import time
from typing import Callable


class Progress:
    """`with Progress(total, "perplexity", unit="tok") as p: p.update(n, loss=…)`; silent when quiet."""

    def __init__(self, total: int, label: str, unit: str = "it", quiet: bool = False, every: float = 0.5):
        self.total, self.label, self.unit, self.quiet, self.every = total, label, unit, quiet, every
        self.done, self.t0, self.last = 0, time.perf_counter(), 0.0
        self.tty = sys.stderr.isatty()
        self.fields: dict[str, str] = {}

    def update(self, n: int = 1, **fields) -> None:
        self.done += n
        self.fields.update({k: (f"{v:.4g}" if isinstance(v, float) else str(v)) for k, v in fields.items()})
        now = time.perf_counter()
        if not self.quiet and (now - self.last >= (self.every if self.tty else 10.0) or self.done >= self.total):
            self.last = now
            self._draw(now)

    def _draw(self, now: float) -> None:
        el = now - self.t0
        rate = self.done / el if el > 0 else 0.0
        left = (self.total - self.done) / rate if rate > 0 else 0.0
        extra = " ".join(f"{k} {v}" for k, v in self.fields.items())
        line = (f"{self.label}: {self.done}/{self.total} {self.unit} | {rate:.1f} {self.unit}/s | "
                f"{el:.0f}s elapsed, {left:.0f}s left {extra}").rstrip()
        sys.stderr.write(("\r" + line + "\x1b[K") if self.tty else line + "\n")
        sys.stderr.flush()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        if not self.quiet and self.tty:
            sys.stderr.write("\n")
        return False


class Timer:
    """Wall time per stage, for the reports; a stage met again (once per layer, once per step) adds up.

    `lap(name)` charges the time since the previous lap (or the start) to `name`; `seconds(fn)` times one call.
    """

    def __init__(self):
        self._sums: dict[str, float] = {}
        self._t = time.perf_counter()

    def lap(self, name: str) -> float:
        """Charge the time since the last lap to `name`; returns that time in seconds."""
        now = time.perf_counter()
        dt = now - self._t
        self._sums[name] = self._sums.get(name, 0.0) + dt
        self._t = now
        return dt

    def total(self, name: str) -> float:
        """Seconds charged to `name` so far (0 when never met)."""
        return self._sums.get(name, 0.0)

    @property
    def stages(self) -> dict[str, float]:
        """Seconds per stage, rounded to milliseconds, in the order the stages were first met."""
        return {k: round(v, 3) for k, v in self._sums.items()}


def seconds(fn: Callable[[], object]) -> float:
    """Wall seconds one call of fn takes."""
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0
