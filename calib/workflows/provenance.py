"""What a stored result was made with: the code version and a hash of the inputs."""

from __future__ import annotations

import hashlib
import json
import subprocess
from collections.abc import Mapping
from functools import cache
from pathlib import Path
from typing import Any

from calib import __version__

_SOURCE_ROOT = Path(__file__).resolve().parents[2]


def _git(*args: str) -> str:
    done = subprocess.run(
        ["git", "-C", str(_SOURCE_ROOT), *args],
        capture_output=True,
        text=True,
        timeout=5,
        check=True,
    )
    return done.stdout.strip()


@cache
def code_version() -> str:
    """``calib.__version__``, plus ``+g<commit>`` (and ``.dirty``) when run from a git checkout.

    The commit is read once per process with ``git rev-parse``; without git (an installed
    package) only the version is given.
    """
    try:
        commit = _git("rev-parse", "--short=12", "HEAD")
        dirty = _git("status", "--porcelain", "--untracked-files=no")
    except (OSError, subprocess.SubprocessError):
        return __version__
    return f"{__version__}+g{commit}{'.dirty' if dirty else ''}" if commit else __version__


def inputs_sha256(inputs: Mapping[str, Any]) -> str:
    """SHA-256 of the canonical JSON of ``inputs`` (sorted keys, no spaces)."""
    text = json.dumps(inputs, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
