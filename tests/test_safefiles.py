"""Replacing a folder in one step: with and without the atomic exchange rename, and recovering what a killed run
left beside the folder."""

from __future__ import annotations

from pathlib import Path

import pytest

from ivdossier import safefiles


def _tree(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.mark.parametrize("exchange", [True, False])
def test_replace_tree_swaps_content_and_carries_version_control(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, exchange: bool
) -> None:
    if not exchange:  # systems without renameat2: two renames, with recovery beside the folder
        monkeypatch.setattr(safefiles, "_exchange", lambda a, b: False)
    target = tmp_path / "out"
    first = safefiles.replace_tree(target, {"a.txt": b"1", "sub/b.txt": b"2"})
    assert (first.written, first.unchanged, first.removed) == (2, 0, 0)
    (target / ".git").mkdir()
    (target / ".git" / "HEAD").write_bytes(b"ref")
    second = safefiles.replace_tree(target, {"a.txt": b"1", "c.txt": b"3"})
    assert (second.written, second.unchanged, second.removed) == (1, 1, 1)
    assert _tree(target) == {".git/HEAD": b"ref", "a.txt": b"1", "c.txt": b"3"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_a_folder_moved_aside_by_a_killed_run_is_brought_back(tmp_path: Path) -> None:
    target = tmp_path / "out"
    old = tmp_path / ".out.ivdossier-old-k1ll3d"  # killed between "move the old aside" and "move the new in"
    old.mkdir()
    (old / "a.txt").write_bytes(b"old")
    staging = tmp_path / ".out.ivdossier-staging-k1ll3d"
    staging.mkdir()
    (staging / "a.txt").write_bytes(b"new")
    (staging / ".git").mkdir()
    safefiles.clean_stale(target)
    assert _tree(target) == {"a.txt": b"old"} and (target / ".git").is_dir()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_unsafe_relative_paths_are_refused(tmp_path: Path) -> None:
    for rel in ("../x", "/abs", "a//b", "a/./b", "a\\b"):
        with pytest.raises(safefiles.InvalidInputError, match="not a plain relative path"):
            safefiles.replace_tree(tmp_path / "out", {rel: b"x"})
    assert sorted(p.name for p in tmp_path.iterdir()) == []


def test_without_comparing_no_old_file_is_read_and_every_file_counts_as_written(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    target = tmp_path / "out"
    safefiles.replace_tree(target, {"a.txt": b"1", "b.txt": b"2"})

    def no_reading(path: Path, limit: int | None = None) -> bytes | None:
        raise AssertionError(f"read {path}")

    monkeypatch.setattr(safefiles, "read_regular", no_reading)
    change = safefiles.replace_tree(target, {"a.txt": b"1", "c.txt": b"3"}, compare=False)
    assert (change.written, change.unchanged, change.removed) == (2, 0, 1)
    assert _tree(target) == {"a.txt": b"1", "c.txt": b"3"}


def test_a_staged_tree_is_swapped_in_only_by_its_commit(tmp_path: Path) -> None:
    target = tmp_path / "out"
    safefiles.replace_tree(target, {"a.txt": b"old"})
    with pytest.raises(ValueError, match="stop"), safefiles.staged_tree(target) as stage:
        stage.write("a.txt", b"new")
        stage.write("sub/b.txt", b"2")
        raise ValueError("stop")
    with safefiles.staged_tree(target) as stage:  # left without a commit
        stage.write("a.txt", b"new")
    assert _tree(target) == {"a.txt": b"old"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # no staging folder left beside it
    with safefiles.staged_tree(target) as stage:
        stage.write("a.txt", b"first")
        stage.write("sub/b.txt", b"2")
        stage.write("a.txt", b"old")  # written again: the last version counts, compared with the old file
        change = stage.commit()
        with pytest.raises(RuntimeError, match="committed"):
            stage.write("c.txt", b"3")
    assert (change.written, change.unchanged, change.removed) == (1, 1, 0)
    assert _tree(target) == {"a.txt": b"old", "sub/b.txt": b"2"}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]
