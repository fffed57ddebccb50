"""The checked packages pass mypy with pandas-stubs, under the settings in pyproject.toml.

mypy follows imports into modules that are not checked yet and reports their errors too; only
errors whose path lies in a checked directory count.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
#: The directories held to no mypy errors (paths from the repository root).
CHECKED = ("qcexplore/data", "qcexplore/stats")


def test_checked_packages_have_no_mypy_errors() -> None:
    run = subprocess.run(
        [sys.executable, "-m", "mypy", "--no-error-summary", *CHECKED],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert run.returncode in (0, 1), run.stdout + run.stderr  # 2: mypy itself failed
    errors = [
        line
        for line in run.stdout.splitlines()
        if ": error:" in line and line.startswith(tuple(f"{d}/" for d in CHECKED))
    ]
    assert not errors, f"{len(errors)} mypy errors:\n" + "\n".join(errors)
