"""Writing generated files: only those that changed, so build systems stay quiet, and the
stale-file check behind ``estgen generate --check``."""

from __future__ import annotations

import os
from typing import Dict, List

__all__ = ["stale_files", "write_generated"]


def stale_files(files: Dict[str, str], out_dir: str) -> List[str]:
    """Names in ``files`` whose copy in ``out_dir`` is missing or differs."""
    stale = []
    for name, text in sorted(files.items()):
        path = os.path.join(out_dir, name)
        try:
            with open(path, "r", encoding="utf-8", newline="") as fh:
                if fh.read() == text:
                    continue
        except OSError:
            pass
        stale.append(name)
    return stale


def write_generated(files: Dict[str, str], out_dir: str) -> List[str]:
    """Write the generated files (only those that changed, so build systems stay quiet)."""
    os.makedirs(out_dir, exist_ok=True)
    written = []
    for name in stale_files(files, out_dir):
        with open(os.path.join(out_dir, name), "w", encoding="utf-8", newline="") as fh:
            fh.write(files[name])
        written.append(name)
    return written
