"""Atomic writes: the file on disk has the permissions the user's umask gives."""

from __future__ import annotations

import os
import stat

import pytest

from wearcast import _atomic


@pytest.mark.parametrize("umask, expected", [(0o022, 0o644), (0o002, 0o664), (0o077, 0o600)])
def test_written_file_follows_the_umask(tmp_path, umask, expected):
    # 0o666 & ~umask is what open(path, "w") gives a new file (POSIX open(2), common practice)
    old = os.umask(umask)
    try:
        path = _atomic.write_text(tmp_path / "life_table.csv", "unit_id\nP-1\n")
        replaced = _atomic.write_text(tmp_path / "life_table.csv", "unit_id\nP-2\n")
    finally:
        os.umask(old)
    assert stat.S_IMODE(path.stat().st_mode) == expected
    assert stat.S_IMODE(replaced.stat().st_mode) == expected
    assert replaced.read_text() == "unit_id\nP-2\n"
    assert not list(tmp_path.glob(f"*{_atomic.TMP_SUFFIX}"))


def test_umask_is_left_as_it_was(tmp_path):
    old = os.umask(0o027)
    try:
        _atomic.write_json(tmp_path / "check_summary.json", {"units": 3})
        now = os.umask(0o027)
    finally:
        os.umask(old)
    assert now == 0o027
