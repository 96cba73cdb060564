"""Run the ``calib`` console script in a subprocess, as a user's shell does.

The script is the one ``[project.scripts]`` declares (``calib.cli:main``), started the way the
installer's wrapper starts it (``sys.exit(main())``), by this interpreter, on this source tree.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
"""The repository root: the subprocess imports calib from here."""

HANG_SECONDS = 300.0
"""Bound on one command's run: only a hung command reaches it, a loaded machine does not."""

SCRIPT = "import sys\nfrom calib.cli import main\nsys.argv[0] = 'calib'\nsys.exit(main())\n"
"""What the installed ``calib`` wrapper runs."""


def calib(
    *args: str, env: dict[str, str] | None = None, cwd: Path | None = None, prelude: str = ""
) -> subprocess.CompletedProcess[str]:
    """Run ``calib ARGS...``; ``prelude`` is Python run before the script (e.g. a probe)."""
    inherited = {k: v for k, v in os.environ.items() if k != "CALIB_DB"}
    environment = {**inherited, **(env or {}), "PYTHONPATH": str(ROOT)}
    return subprocess.run(
        [sys.executable, "-c", prelude + SCRIPT, *args],
        capture_output=True,
        text=True,
        cwd=cwd or ROOT,
        env=environment,
        timeout=HANG_SECONDS,
        check=False,
    )
