"""The README's examples run as written on a fresh store (issue 12, defect 11): the shell tour
of "A morning with calib" line by line, the settings file of "Settings and gates" and the
Python client example of "Serving pricers". ``calib serve`` (a server that runs until stopped)
is the one line left out; tests/serving covers the API."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

from tests.cli.console import HANG_SECONDS, ROOT, calib

README = (ROOT / "README.md").read_text(encoding="utf-8")
LEFT_OUT = ("calib serve",)


def _block(section: str, language: str) -> str:
    """The first fenced block of ``language`` after the heading ``section``."""
    start = README.index(f"\n{section}\n")
    found = re.compile(rf"```{language}\n(.*?)```", re.S).search(README, start)
    assert found is not None, f"no {language} block under {section!r}"
    return found.group(1)


def _tour() -> list[list[str]]:
    import shlex

    lines = []
    for raw in _block("## A morning with calib", "sh").splitlines():
        words = shlex.split(raw, comments=True)
        if words and " ".join(words[:2]) not in LEFT_OUT:
            assert words[0] == "calib", raw
            lines.append(words[1:])
    return lines


def test_the_tour_is_found() -> None:
    tour = _tour()
    assert tour[0] == ["init"] and any(w[0] == "fit" for w in tour) and len(tour) >= 10


@pytest.mark.slow
def test_readme_examples_run_as_written(tmp_path: Path) -> None:
    # a fresh folder (the tour's default store is db/calib.sqlite under it) with the fixtures
    (tmp_path / "fixtures").symlink_to(ROOT / "fixtures")
    for args in _tour():
        done = calib(*args, cwd=tmp_path)
        assert done.returncode == 0, (args, done.stdout, done.stderr)
        assert "Traceback" not in done.stderr and "Warning:" not in done.stderr, done.stderr

    settings = tmp_path / "settings.toml"
    settings.write_text(_block("### Settings and gates", "toml"))
    done = calib("fit", "QLM", "--date", "2033-06-01", "--settings", str(settings), cwd=tmp_path)
    assert done.returncode == 0 and "gates:" in done.stdout, done.stderr

    example = _block("## Serving pricers", "python")
    done = subprocess.run(
        [sys.executable, "-c", example],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"},
        timeout=HANG_SECONDS,
        check=False,
    )
    assert done.returncode == 0, done.stderr
