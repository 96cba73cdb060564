"""The project metadata a fresh install reads (licence form, typer pin) and the version."""

from __future__ import annotations

import json
import tomllib
from importlib.metadata import version

from packaging.requirements import Requirement

from calib import __version__
from tests.cli.console import ROOT, calib

PROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]


def test_licence_is_an_spdx_expression() -> None:
    # the table form ({ text = ... }) is deprecated: setuptools warned on every install
    assert PROJECT["license"] == "LicenseRef-Proprietary"


def test_typer_is_pinned_to_the_tested_release_line() -> None:
    # typer changes its usage-error classes and help output between 0.x releases
    (typer,) = (Requirement(d) for d in PROJECT["dependencies"] if d.startswith("typer"))
    assert typer.specifier.contains(version("typer"))
    assert any(s.operator == "<" for s in typer.specifier)


def test_the_console_script_is_calib_cli_main() -> None:
    # tests/cli/console.py runs calib.cli:main as the installed wrapper does: keep them one
    assert PROJECT["scripts"] == {"calib": "calib.cli:main"}


def test_version_is_the_one_runs_record() -> None:
    # issue 12, defect 10: `calib version` said 0.1.0 while runs recorded 0.1.0+g<commit>;
    # read afresh around the call (code_version caches per process; a commit or an edit made
    # while the suite runs changes it)
    from calib.workflows.provenance import code_version

    fresh = code_version.__wrapped__
    before = fresh()
    done = calib("version")
    plain = calib("version", "--json")
    after = fresh()
    assert done.returncode == 0 and done.stdout.strip() in {before, after}
    assert json.loads(plain.stdout)["version"] in {before, after}
    assert before.startswith(__version__)
