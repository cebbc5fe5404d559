"""The one atomic-write helper: a failed write leaves the old file whole and no temporary behind."""

from __future__ import annotations

from pathlib import Path

import pytest

from retriever import atomicfile


def test_write_replaces_the_file_and_leaves_no_temporary(tmp_path: Path) -> None:
    target = tmp_path / "sub" / "model.json"
    atomicfile.write_text(target, "first")
    atomicfile.write_text(target, "second")
    assert target.read_text() == "second"
    assert sorted(p.name for p in target.parent.iterdir()) == ["model.json"]


def test_a_failing_writer_keeps_the_old_content(tmp_path: Path) -> None:
    target = tmp_path / "report.html"
    target.write_text("old, complete")
    with pytest.raises(RuntimeError), atomicfile.replacing(target) as tmp:
        tmp.write_text("new, half")
        raise RuntimeError("the writer failed half way")
    assert target.read_text() == "old, complete"
    assert [p.name for p in tmp_path.iterdir()] == ["report.html"]


def test_temporary_is_in_the_same_folder_and_hidden(tmp_path: Path) -> None:
    target = tmp_path / "a.json"
    tmp = atomicfile.temporary_sibling(target)
    assert tmp.parent == target.parent
    assert tmp.name.startswith(".a.json.") and tmp.name.endswith(".tmp")
    assert tmp != atomicfile.temporary_sibling(target)


def test_a_folder_in_the_way_is_named_plainly(tmp_path: Path) -> None:
    (tmp_path / "model.json").mkdir()
    with pytest.raises(IsADirectoryError, match=r"model\.json is a folder; give a file name"):
        atomicfile.write_text(tmp_path / "model.json", "{}")
