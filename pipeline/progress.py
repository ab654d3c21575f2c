"""Progress reporting: a bar in a terminal, plain log lines in batch jobs.

``GAPLINE_PROGRESS`` = ``bar`` | ``plain`` | ``off`` overrides the choice (default: ``bar``
when stderr is a terminal, otherwise ``plain``). Under MPI only rank 0 prints.
"""

from __future__ import annotations

import os
import sys
import time

__all__ = ["Progress", "log", "warn"]


def _mode() -> str:
    if _secondary_rank():
        return "off"  # under MPI only rank 0 speaks
    chosen = os.environ.get("GAPLINE_PROGRESS", "").strip().lower()
    if chosen in ("bar", "plain", "off"):
        return chosen
    return "bar" if sys.stderr.isatty() else "plain"


def log(message: str) -> None:
    """One timestamped line on stderr (silenced by ``GAPLINE_PROGRESS=off``)."""
    if _mode() != "off":
        print(f"[{time.strftime('%H:%M:%S')}] {message}", file=sys.stderr, flush=True)


def _secondary_rank() -> bool:
    from pipeline.parallel import world

    return not world().is_root


def warn(message: str) -> None:
    """A warning line on stderr; never silenced (results may be affected), but said once
    under MPI (by rank 0)."""
    if _secondary_rank():
        return
    print(f"[{time.strftime('%H:%M:%S')}] warning: {message}", file=sys.stderr, flush=True)


class Progress:
    """Count work units of one long step: ``with Progress(total, 'assemble') as p: p.advance(n)``.

    In plain mode a line is printed at most every ``interval`` seconds and at the end.
    """

    def __init__(self, total: int, label: str, interval: float = 10.0) -> None:
        self.total = max(int(total), 1)
        self.label = label
        self.done = 0
        self.interval = interval
        self.mode = _mode()
        self.started = time.perf_counter()
        self._last = self.started

    def __enter__(self) -> Progress:
        return self

    def advance(self, units: int) -> None:
        self.done += int(units)
        now = time.perf_counter()
        if self.mode == "bar":
            filled = int(30 * self.done / self.total)
            bar = "#" * filled + "-" * (30 - filled)
            print(f"\r{self.label:>10} [{bar}] {100 * self.done / self.total:5.1f}%",
                  end="", file=sys.stderr, flush=True)
        elif self.mode == "plain" and now - self._last >= self.interval:
            self._last = now
            log(f"{self.label}: {self.done}/{self.total} ({100 * self.done / self.total:.0f}%)")

    def __exit__(self, *exc: object) -> None:
        elapsed = time.perf_counter() - self.started
        if self.mode == "bar":
            print(file=sys.stderr, flush=True)
        elif self.mode == "plain" and elapsed >= self.interval:
            log(f"{self.label}: done in {elapsed:.1f} s")
