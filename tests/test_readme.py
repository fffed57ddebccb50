"""The README's tour runs as written, so the first page a user reads cannot rot."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_readme_tour_runs(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)```", text, flags=re.DOTALL)
    assert blocks, "the README has no python tour"
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    exec(compile("\n".join(blocks), "README.md", "exec"), namespace)  # noqa: S102
    assert (tmp_path / "investigation.html").stat().st_size > 100_000
    assert namespace["s"].findings()


def test_readme_names_the_caution_and_the_two_commands() -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    assert "weights-and-measures" in text and "quality system" in text
    # Each of the two commands works as the first one on a fresh machine: the demo's installs
    # into a new virtual environment first; the suite's is the CI entry point itself.
    demo = '```bash\npython3 -m venv .venv && . .venv/bin/activate && pip install ".[app]" '
    assert demo + "&& qcexplore app\n```" in text
    assert "```bash\nbash .ci/run\n```" in text
    assert "Python 3.10 or newer" in text
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert "python -m pytest" in ci
