"""Shared fixtures: small case folders written to a temporary directory (data in tests/casefiles.py)."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest
from casefiles import write_case


@pytest.fixture
def case_writer(tmp_path: Path) -> Callable[..., Path]:
    """``case_writer(files=None, name="case")`` writes a case under ``tmp_path`` and returns its folder."""

    def make(files: dict[str, str | None] | None = None, name: str = "case") -> Path:
        return write_case(tmp_path / name, files)

    return make
