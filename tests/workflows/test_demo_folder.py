"""The demo's folder: it deletes only what its marker says it wrote, and refuses a non-empty
folder it did not make (no demo run here: the folder rules alone)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from calib.errors import DemoFolderError
from calib.workflows.demo import MARKER, _mark, _prepare


def _tree(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*") if p.is_file())


@pytest.mark.parametrize("fresh", [False, True])
def test_a_folder_it_did_not_make_is_refused_and_untouched(tmp_path: Path, fresh: bool) -> None:
    (tmp_path / "inputs").mkdir()
    (tmp_path / "inputs" / "mine.csv").write_text("a,b\n")
    (tmp_path / "report").mkdir()
    with pytest.raises(DemoFolderError, match="not made by calib demo"):
        _prepare(tmp_path, fresh)
    assert _tree(tmp_path) == ["inputs/mine.csv"] and (tmp_path / "report").is_dir()


def test_a_new_or_empty_folder_is_marked_before_anything_is_written(tmp_path: Path) -> None:
    for folder in (tmp_path, tmp_path / "new" / "deep"):
        assert _prepare(folder, False) == {folder / MARKER}
        assert json.loads((folder / MARKER).read_text())["files"] == []


def test_a_rerun_deletes_exactly_the_files_it_wrote(tmp_path: Path) -> None:
    _prepare(tmp_path, False)
    for name in ("calib.sqlite", "inputs/futures.csv", "report/index.html"):
        (tmp_path / name).parent.mkdir(exist_ok=True)
        (tmp_path / name).write_text("demo")
    _mark(tmp_path, ["calib.sqlite", "inputs/futures.csv", "report/index.html"])
    (tmp_path / "report" / "my-notes.txt").write_text("the user's")  # added later by hand
    (tmp_path / "keep.txt").write_text("the user's")
    theirs = _prepare(tmp_path, True)
    assert _tree(tmp_path) == [MARKER, "keep.txt", "report/my-notes.txt"]
    assert not (tmp_path / "inputs").exists()  # left empty by the demo's own files
    assert theirs == {tmp_path / MARKER, tmp_path / "keep.txt", tmp_path / "report/my-notes.txt"}
