"""Usage errors on the real console script: typer's short usage message naming the option as
the user types it, exit code 2, never a traceback (issue 12, defect 1)."""

from __future__ import annotations

import pytest

from tests.cli.console import calib

CASES = [
    # (command line, what the message must name)
    (["fit", "QLM", "--date", "05/11/2033"], "'--date'"),
    (["fit", "QLM"], "Missing option '--date'"),
    (["show", "abc"], "'RUN'"),
    (["runs", "QLM", "--colour"], "No such option: --colour"),
    (["fitt", "QLM"], "No such command 'fitt'"),
    (["latest", "QLM", "--as-of", "yesterday"], "'--as-of'"),
    (["latest", "QLM", "--as-of", "20330601"], "'--as-of': '20330601': not an ISO date"),
    (["--version"], "No such option: --version"),
    (["estimate", "QLM", "--from", "2033-01-01"], "Missing option '--to'"),
]


@pytest.mark.parametrize(("args", "named"), CASES, ids=[" ".join(c[0]) for c in CASES])
def test_usage_error_is_short_and_exits_2(args: list[str], named: str) -> None:
    done = calib(*args)
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr and done.stdout == ""
    assert done.stderr.startswith("Usage: calib "), done.stderr
    assert named in done.stderr
    assert "trade_date" not in done.stderr and "as_of" not in done.stderr
    assert done.stderr.count("\n") <= 6, done.stderr


def test_no_arguments_prints_the_help_and_exits_2() -> None:
    done = calib()
    assert done.returncode == 2 and "Traceback" not in done.stderr
    assert done.stderr.startswith("Usage: calib [OPTIONS] COMMAND")
    assert "fit" in done.stderr and "latest" in done.stderr


@pytest.mark.parametrize("command", ["fit", "backfill"])
def test_settings_help_shows_its_table_names(command: str) -> None:
    # issue 12, defect 2: "[calibration]" and "[gates]" were swallowed as rich markup
    done = calib(command, "--help")
    assert done.returncode == 0
    help_text = " ".join(done.stdout.split())
    assert "[calibration] and [gates] tables" in help_text
