"""Tests of detector.io: atomic writes leave nothing behind and honour the umask."""

import os
import stat

import pytest

from detector.io import atomic_dir, atomic_path, write_json


@pytest.fixture
def umask_022():
    old = os.umask(0o022)
    yield
    os.umask(old)


def _mode(path):
    return stat.S_IMODE(path.stat().st_mode)


def test_atomic_files_and_folders_get_the_umask_permissions(tmp_path, umask_022):
    # POSIX open(2) / mkdir(2): the mode asked for (0666 files, 0777 folders) less the umask.
    write_json(tmp_path / "a.json", {"x": 1})
    assert _mode(tmp_path / "a.json") == 0o644
    with atomic_dir(tmp_path / "folder") as tmp:
        (tmp / "inner.txt").write_text("x")
    assert _mode(tmp_path / "folder") == 0o755
    os.umask(0o077)
    with atomic_path(tmp_path / "private.txt") as tmp:
        tmp.write_text("x")
    assert _mode(tmp_path / "private.txt") == 0o600


def test_a_failed_write_leaves_nothing(tmp_path):
    with pytest.raises(RuntimeError), atomic_path(tmp_path / "b.txt") as tmp:
        tmp.write_text("half")
        raise RuntimeError("stop")
    assert list(tmp_path.iterdir()) == []
