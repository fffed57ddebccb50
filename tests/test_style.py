"""ruff (lint and format) is part of the test command, so style drift fails CI."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("arguments", [["check", "."], ["format", "--check", "."]])
def test_ruff(arguments: list[str]) -> None:
    result = subprocess.run(
        [sys.executable, "-m", "ruff", *arguments], cwd=ROOT, capture_output=True, text=True
    )
    assert result.returncode == 0, result.stdout + result.stderr
