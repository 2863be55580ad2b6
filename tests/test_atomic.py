"""Atomic writes: complete file or nothing, with ordinary permissions."""

import os
import stat

import pytest

from fanmap._atomic import atomic_path, write_text_atomic


def test_atomic_write_replaces_and_uses_umask_permissions(tmp_path):
    target = tmp_path / "out" / "result.json"
    write_text_atomic(target, "first")
    write_text_atomic(target, "second")
    assert target.read_text() == "second"
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~mask
    assert [p.name for p in target.parent.iterdir()] == ["result.json"]


def test_failed_write_leaves_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "map.nc"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            tmp.write_text("half")
            raise RuntimeError("writer crashed")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["map.nc"]
