"""A one-line progress display on stderr, shared by the long commands.

Shown when stderr is a terminal (or when asked), never with ``-q``; it rewrites one line and
ends it when the work is done, so a CI log gets no progress noise unless ``--progress`` asks.
"""

from __future__ import annotations

import sys
import time
from typing import Optional

__all__ = ["Progress", "wanted"]


def wanted(quiet: bool = False, force: bool = False) -> bool:
    """Whether to show progress: never when quiet, always when forced, else on a terminal."""
    if quiet:
        return False
    return bool(force) or sys.stderr.isatty()


class Progress:
    """``with Progress("verify", 3, show) as p: p.step("building the C") ...``"""

    def __init__(self, label: str, total: int, show: bool) -> None:
        self.label = label
        self.total = max(1, int(total))
        self.show = show
        self.done = 0
        self.started = time.perf_counter()

    def step(self, note: str) -> None:
        """Announce the next piece of work (``note``) and count the previous one done."""
        if self.show:
            el = time.perf_counter() - self.started
            sys.stderr.write(f"\r{self.label}: [{self.done + 1}/{self.total}] {note} ({el:.1f} s)\x1b[K")
            sys.stderr.flush()
        self.done += 1

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc: object) -> None:
        if self.show:
            el = time.perf_counter() - self.started
            sys.stderr.write(f"\r{self.label}: done in {el:.1f} s\x1b[K\n")
            sys.stderr.flush()
