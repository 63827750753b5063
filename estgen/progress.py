"""A one-line progress display on stderr, shared by the long commands.

Shown when stderr is a terminal (or when asked), never with ``-q``. On a terminal it rewrites
one line and ends it when the work is done; when stderr is not a terminal (a CI log, with
``--progress``) it writes one plain line per step and no control characters.

Work that runs deep inside a command (the derivations of ``generate``) announces its stages
through :func:`stage` and :func:`detail`; they reach the display a command made active with
:func:`reporting`, and do nothing when none is (the library's callers see no output).
"""

from __future__ import annotations

import contextlib
import contextvars
import sys
import time
from typing import Iterator, Optional

__all__ = ["Progress", "wanted", "reporting", "stage", "detail"]


def wanted(quiet: bool = False, force: bool = False) -> bool:
    """Whether to show progress: never when quiet, always when forced, else on a terminal."""
    if quiet:
        return False
    return bool(force) or sys.stderr.isatty()


class Progress:
    """``with Progress("verify", 3, show) as p: p.step("building the C") ...``

    ``total`` None: the number of steps is not known ahead (no ``[k/n]`` count is shown).
    ``clear``: on a terminal, erase the line at the end instead of ending it with "done"
    (for a command that prints its own summary line)."""

    def __init__(self, label: str, total: Optional[int], show: bool, clear: bool = False) -> None:
        self.label = label
        self.total = None if total is None else max(1, int(total))
        self.show = show
        self.clear = clear
        self.tty = sys.stderr.isatty()
        self.done = 0
        self.note = ""
        self.started = time.perf_counter()

    def _line(self, text: str) -> None:
        el = time.perf_counter() - self.started
        count = f"[{self.done}/{self.total}] " if self.total is not None else ""
        if self.tty:
            sys.stderr.write(f"\r{self.label}: {count}{text} ({el:.1f} s)\x1b[K")
        else:
            sys.stderr.write(f"{self.label}: {count}{text} ({el:.1f} s)\n")
        sys.stderr.flush()

    def step(self, note: str) -> None:
        """Announce the next piece of work (``note``) and count the previous one done."""
        self.done += 1
        if self.show:
            self.note = note
            self._line(note)

    def detail(self, text: str) -> None:
        """Say what the current step is doing now (a terminal only: a log gets the steps)."""
        if self.show and self.tty and self.done:
            self._line(f"{self.note}: {text}")

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc: object) -> None:
        if not self.show:
            return
        el = time.perf_counter() - self.started
        if self.tty:
            sys.stderr.write("\r\x1b[K" if self.clear else f"\r{self.label}: done in {el:.1f} s\x1b[K\n")
        elif not self.clear:
            sys.stderr.write(f"{self.label}: done in {el:.1f} s\n")
        sys.stderr.flush()


_ACTIVE: contextvars.ContextVar[Optional[Progress]] = contextvars.ContextVar("estgen_progress", default=None)


@contextlib.contextmanager
def reporting(bar: Progress) -> Iterator[Progress]:
    """Make ``bar`` the display that :func:`stage` and :func:`detail` reach inside the block."""
    token = _ACTIVE.set(bar)
    try:
        yield bar
    finally:
        _ACTIVE.reset(token)


def stage(note: str) -> None:
    """Announce the next stage of the work to the active display, if any."""
    bar = _ACTIVE.get()
    if bar is not None:
        bar.step(note)


def detail(text: str) -> None:
    """Say what the current stage is doing now, on the active display, if any."""
    bar = _ACTIVE.get()
    if bar is not None:
        bar.detail(text)
