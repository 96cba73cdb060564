"""Commands that only read open the store read-only: on a SQLite file that nothing may write
(mode 0444 in a folder of mode 0555, as on a read-only mount) they answer and leave no
``-wal``/``-shm`` (nor lock) file behind, and their connection refuses writes. The checks hold
when the tests run as root too, for whom the mode bits do not stop a write: what is asserted is
what the program did, not what the file system refused."""

from __future__ import annotations

import json
import os
import stat
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import text
from sqlalchemy.exc import OperationalError

from bench.serve_seed import CODE, candidate, commodity
from calib.store.engine import make_store
from calib.store.migrate import upgrade
from calib.workflows.approve import approve
from tests.cli.test_store_cmds import run


@pytest.fixture
def frozen_store(tmp_path: Path) -> Iterator[tuple[str, Path]]:
    """A SQLite store with an approved run, then made read-only (file 0444, folder 0555)."""
    folder = tmp_path / "mount"
    folder.mkdir()
    url = f"sqlite:///{folder / 'calib.sqlite'}"
    store = make_store(url)
    upgrade(store.engine)
    cid, eid = commodity(store)
    run_id = candidate(store, cid, eid, 1)
    approve(store.sessions, run_id, by="risk", note="ok")
    store.engine.dispose()  # the last connection closes: the log is checkpointed and removed
    for side in folder.iterdir():
        if side.name != "calib.sqlite":
            side.unlink()  # the approval lock file: a read-only copy would not have one either
    (folder / "calib.sqlite").chmod(0o444)
    folder.chmod(0o555)
    try:
        yield url, folder
    finally:
        folder.chmod(0o755)


def test_reading_commands_leave_a_read_only_store_untouched(
    frozen_store: tuple[str, Path],
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    url, folder = frozen_store
    before = {p.name: p.stat().st_mtime_ns for p in folder.iterdir()}
    assert stat.S_IMODE(folder.stat().st_mode) == 0o555

    code, out, err = run(capsys, monkeypatch, "latest", CODE, "--json", "--db", url)
    assert code == 0, err
    run_id = json.loads(out)["run_id"]
    for args in (
        ("latest", CODE, "--history", "--json"),
        ("show", str(run_id), "--json"),
        ("runs", CODE, "--json"),
        ("estimates", CODE, "--json"),
    ):
        code, out, err = run(capsys, monkeypatch, *args, "--db", url)
        assert code == 0, (args, err)
        assert json.loads(out), args
    after = {p.name: p.stat().st_mtime_ns for p in folder.iterdir()}
    assert after == before  # no -wal, -shm or lock file made, the database file not written


def test_a_read_only_store_refuses_writes_on_its_connection(
    frozen_store: tuple[str, Path],
) -> None:
    url, folder = frozen_store
    store = make_store(url, read_only=True)
    try:
        with store.engine.connect() as conn:
            assert conn.execute(text("SELECT count(*) FROM calibration_runs")).scalar() == 1
            with pytest.raises(OperationalError, match="readonly"):
                conn.execute(text("DELETE FROM run_events"))
    finally:
        store.engine.dispose()
    assert sorted(p.name for p in folder.iterdir()) == ["calib.sqlite"]
    if os.geteuid() != 0:  # as root the mode bits would not stop a writer; elsewhere they do
        with pytest.raises(PermissionError):
            (folder / "calib.sqlite-wal").touch()
