"""Build-system integration: dependency files for Make and Ninja, the shipped CMake package.

``estgen generate ... --depfile FILE`` writes FILE in the format C compilers write with
``-MD -MF`` (the Make rule syntax that GNU Make includes and Ninja reads with ``deps = gcc``)::

    out/cart_ekf.c out/cart_ekf.h: model.py /abs/cart_params.py

listing the model file and the user's own Python files it imported (not the standard library,
not installed packages). Outputs and the model keep the paths as given on the command line;
imported files are absolute. With ``--depfile`` every output is rewritten or, when its content did
not change, touched: a build tool compares times, so an output older than a changed input would
make it rerun the command on every build. Without ``--depfile`` unchanged files keep their time.

``estgen --cmake-dir`` prints the folder holding ``estgen-config.cmake`` (see that file).
"""

from __future__ import annotations

import os
from typing import Iterable, List

__all__ = ["cmake_dir", "depfile_text", "write_depfile", "touch"]


def cmake_dir() -> str:
    """The folder of the installed CMake package (``estgen-config.cmake``)."""
    return os.path.join(os.path.dirname(os.path.abspath(__file__)), "cmake")


def _escape(path: str) -> str:
    """A path in Make rule syntax: spaces and '#' backslash-escaped, '$' doubled (what gcc -MD
    writes; GNU Make and Ninja's depfile parser read it back)."""
    return path.replace("\\", "/").replace(" ", "\\ ").replace("#", "\\#").replace("$", "$$")


def depfile_text(outputs: Iterable[str], inputs: Iterable[str]) -> str:
    """One rule: every output depends on every input. Paths stay as given (like gcc's -MD, which
    names the target as -o gave it): Make matches targets by their text, so a rule for
    ``gen/x.c`` and a depfile naming ``/abs/gen/x.c`` would not meet."""
    outs = " ".join(_escape(o) for o in outputs)
    ins = " \\\n  ".join(_escape(i) for i in inputs)
    return f"{outs}: {ins}\n"


def write_depfile(path: str, outputs: Iterable[str], inputs: Iterable[str]) -> None:
    """Write the dependency file (its folder is created when missing)."""
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(depfile_text(outputs, inputs))


def touch(paths: List[str]) -> None:
    """Set the modification time of ``paths`` to now (outputs a build tool must see as new)."""
    for p in paths:
        os.utime(p, None)
