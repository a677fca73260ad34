"""Atomic writes: all or nothing, with ordinary permissions."""

import os
import stat

import pytest

from sweepgen._atomic import atomic_open, atomic_write_text


def test_success_replaces_with_usual_permissions(tmp_path):
    target = tmp_path / "a.json"
    target.write_text("old")
    atomic_write_text(target, "new")
    assert target.read_text() == "new"
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~mask
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.json"]


def test_failure_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "a.json"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_open(target, "w") as handle:
            handle.write("half")
            raise RuntimeError("disk gone")
    assert target.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.json"]
