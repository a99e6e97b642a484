"""Shared fixtures: the shipped spaces, and a writer for small space files in tmp_path."""

from __future__ import annotations

from pathlib import Path
from typing import Callable

import pytest

from searcher.space import Space, builtin_space, load_space

SHIPPED_SPACES = ("mcu", "workstation", "classic")

# A tiny but complete space: variable depth and hidden count, 8,064 configurations. Tests
# write variations of it (one key changed) to check what the reader refuses.
TINY_SPACE = """\
name = "tiny"

[input]
channels = 1
sizes = [[12, 12], [16, 16]]
classes = 4

[stages]
count = [1, 3]
convs = [1, 2]
first_width = [2, 4]
growth = 2.0
max_width = 8

[conv]
kernel = 3
padding = "same"
activation = ["relu", "tanh"]
batch_norm = [true, false]

[pool]
kind = ["max", "none"]
window = 2

[head]
features = ["gap", "flatten"]
hidden = [0, 1]
hidden_width = [3, 5]
dropout = 0.0

[budget]
max_params = "300"
max_macs = "20k"
"""


@pytest.fixture(scope="session")
def shipped() -> dict[str, Space]:
    """Every space under spaces/, loaded once."""
    return {name: load_space(builtin_space(name)) for name in SHIPPED_SPACES}


@pytest.fixture
def write_space(tmp_path: Path) -> Callable[..., Path]:
    """write_space(text, name) -> path of a space file in tmp_path (default: the tiny space)."""

    def write(text: str = TINY_SPACE, name: str = "space.toml") -> Path:
        path = tmp_path / name
        path.write_text(text, encoding="utf-8")
        return path

    return write
