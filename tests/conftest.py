"""Shared fixtures: the examples and the filters each supports."""

from __future__ import annotations

import os
import shutil
import sys
from typing import List, Tuple

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
EXAMPLES_DIR = os.path.join(ROOT, "generated_examples")
sys.path.insert(0, EXAMPLES_DIR)

import regenerate  # noqa: E402  (generated_examples/regenerate.py: the committed configurations)


def example_model(name: str) -> str:
    return os.path.join(EXAMPLES_DIR, name, "model.py")


def example_filters() -> List[Tuple[str, str]]:
    """(example, filter) for every committed configuration."""
    return [(ex, f) for ex, filters in regenerate.EXAMPLES.items() for f in filters]


def require_tool(name: str) -> str:
    """Path of a tool CI installs; a missing one fails the test (it must not be skipped)."""
    path = shutil.which(name)
    if path is None:
        pytest.fail(f"{name} is not installed; .ci/run installs it (apt-get)")
    return path
