"""The errors estgen raises, one class per cause.

* :class:`ModelError`: a model file is wrong (file, line and source line attached).
* :class:`UsageError`: an option or argument is wrong (a ModelError too: both are bad input the
  user fixes, and the command line treats them alike).
* :class:`ToolMissing`: an outside tool (compiler, emulator, valgrind) is not installed.
* :class:`BuildError`: the generated C did not compile (a defect of estgen, never of the model).

The command line prints ``str(err)`` of the first three (one to a few lines, no traceback) and
exits with status 2.
"""

from __future__ import annotations

import linecache
from dataclasses import dataclass
from typing import Optional


@dataclass(frozen=True)
class Where:
    """A place in a model file: the file and, where known, the 1-based line."""

    file: str
    line: Optional[int] = None

    def __str__(self) -> str:
        # the path as the user gave it, so editors and CI problem matchers can open it
        name = self.file or "<model>"
        return f"{name}:{self.line}" if self.line else name


class ModelError(Exception):
    """A model file is wrong in a way its author can fix.

    ``where`` names the file and line; ``message`` says what is wrong and what to do.
    """

    def __init__(self, message: str, where: Optional[Where] = None) -> None:
        super().__init__(message)
        self.message = message
        self.where = where

    def __str__(self) -> str:
        if self.where is None:
            return f"error: {self.message}"
        head = f"{self.where}: error: {self.message}"
        if self.where.line and self.where.file:
            src = linecache.getline(self.where.file, self.where.line).rstrip()
            if src:
                return f"{head}\n    {src.strip()}"
        return head


class UsageError(ModelError):
    """An option or argument is wrong (unknown filter, bad gate, bad UKF parameter, ...)."""


#: The Debian/Ubuntu package that provides each outside tool estgen runs.
DEBIAN_PACKAGES = {
    "cc": "gcc", "gcc": "gcc", "g++": "g++", "clang": "clang", "clang++": "clang",
    "arm-none-eabi-gcc": "gcc-arm-none-eabi", "arm-none-eabi-size": "binutils-arm-none-eabi",
    "arm-none-eabi-nm": "binutils-arm-none-eabi", "arm-none-eabi-objdump": "binutils-arm-none-eabi",
    "arm-none-eabi-readelf": "binutils-arm-none-eabi", "qemu-system-arm": "qemu-system-arm",
    "valgrind": "valgrind", "callgrind_annotate": "valgrind", "cppcheck": "cppcheck",
    "cmake": "cmake", "ninja": "ninja-build", "make": "make",
    # the host target's object tools (report --target host): GNU binutils
    "nm": "binutils", "size": "binutils", "objdump": "binutils", "readelf": "binutils",
}


class ToolMissing(RuntimeError):
    """An outside tool (C compiler, cross toolchain, emulator, valgrind) is not installed. The
    command line prints the one-line message, which names the package to install, and exits 2."""

    def __init__(self, tool: str) -> None:
        self.tool = tool
        base = tool.rsplit("/", 1)[-1]
        self.package = DEBIAN_PACKAGES.get(base) or ("gcc" if base.endswith("gcc") else base)
        super().__init__(f"{tool} is not installed (not found on PATH); install it, e.g. on Debian or "
                         f"Ubuntu: sudo apt-get install {self.package}")

    def __reduce__(self) -> tuple:  # pickled across worker processes by its tool alone
        return (ToolMissing, (self.tool,))


class BuildError(RuntimeError):
    """The generated C did not compile (a defect of estgen, never of the model)."""
