"""Atomic writes: the old file survives every failure, backups are kept, no needless writes."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from bridge.errors import ConfigError
from bridge.storage import atomic_write, backup_path, read_bytes


def _leftovers(folder: Path) -> list[str]:
    """Hidden temporary files a write may have left behind."""
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def test_new_file_is_written_and_no_temporary_file_remains(tmp_path: Path) -> None:
    target = tmp_path / "rig.toml"
    assert atomic_write(target, b"schema = 1\n") is True
    assert target.read_bytes() == b"schema = 1\n"
    assert not backup_path(target).exists()  # nothing to back up on first write
    assert _leftovers(tmp_path) == []


def test_identical_bytes_are_not_rewritten(tmp_path: Path) -> None:
    target = tmp_path / "rig.toml"
    atomic_write(target, b"a = 1\n")
    before = target.stat()
    assert atomic_write(target, b"a = 1\n") is False
    after = target.stat()
    # Same inode and same modification time: the file was not replaced or touched.
    assert (after.st_ino, after.st_mtime_ns) == (before.st_ino, before.st_mtime_ns)
    assert not backup_path(target).exists()


def test_change_keeps_previous_version_as_backup(tmp_path: Path) -> None:
    target = tmp_path / "venue.toml"
    atomic_write(target, b"v = 1\n")
    atomic_write(target, b"v = 2\n")
    assert target.read_bytes() == b"v = 2\n"
    assert backup_path(target).read_bytes() == b"v = 1\n"
    atomic_write(target, b"v = 3\n")
    # The backup is always the version just before the current one.
    assert backup_path(target).read_bytes() == b"v = 2\n"
    assert _leftovers(tmp_path) == []


def test_backup_can_be_turned_off(tmp_path: Path) -> None:
    target = tmp_path / "active"
    atomic_write(target, b"one\n", backup=False)
    atomic_write(target, b"two\n", backup=False)
    assert target.read_bytes() == b"two\n"
    assert not backup_path(target).exists()


def test_permissions_of_the_old_file_are_kept(tmp_path: Path) -> None:
    target = tmp_path / "rig.toml"
    atomic_write(target, b"a = 1\n")
    os.chmod(target, 0o640)
    atomic_write(target, b"a = 2\n")
    assert target.stat().st_mode & 0o777 == 0o640


def test_missing_folder_is_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="temporary file"):
        atomic_write(tmp_path / "nowhere" / "rig.toml", b"a = 1\n")


def test_read_bytes_names_the_file(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="no such file"):
        read_bytes(tmp_path / "absent.toml")
    with pytest.raises(ConfigError, match="is a folder"):
        read_bytes(tmp_path)


# --- real "no room" failures -------------------------------------------------------------


@pytest.fixture
def tiny_tmpfs(tmp_path: Path) -> Iterator[Path]:
    """A real 32 KiB tmpfs: writing past it fails with ENOSPC from the kernel."""
    mnt = tmp_path / "tiny"
    mnt.mkdir()
    res = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=32k,mode=0755", f"fb{uuid.uuid4().hex[:8]}", str(mnt)],
        capture_output=True,
        text=True,
        check=False,
    )
    if res.returncode != 0:
        pytest.skip(
            f"cannot mount a tmpfs here ({res.stderr.strip()}); the RLIMIT test covers EFBIG"
        )
    try:
        yield mnt
    finally:
        subprocess.run(["umount", str(mnt)], check=False)


def test_full_disk_leaves_old_file_intact(tiny_tmpfs: Path) -> None:
    target = tiny_tmpfs / "venue.toml"
    atomic_write(target, b"baseline = 5550\n")
    with pytest.raises(ConfigError, match="disk is full") as info:
        atomic_write(target, b"x" * 200_000)  # far more than the 32 KiB file system holds
    assert str(target) in str(info.value)
    assert target.read_bytes() == b"baseline = 5550\n"
    assert not backup_path(target).exists()  # nothing replaced, so nothing backed up
    assert _leftovers(tiny_tmpfs) == []


def test_file_size_limit_leaves_old_file_intact(tmp_path: Path) -> None:
    """RLIMIT_FSIZE makes the kernel refuse writes past 4 KiB (EFBIG) in a child process."""
    target = tmp_path / "rig.toml"
    atomic_write(target, b"schema = 1\n")
    atomic_write(target, b"schema = 1\nname = 'old'\n")  # now a backup exists too
    child = textwrap.dedent(
        f"""
        import resource, signal, sys
        from bridge.errors import ConfigError
        from bridge.storage import atomic_write
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # get EFBIG instead of being killed
        resource.setrlimit(resource.RLIMIT_FSIZE, (4096, 4096))
        try:
            atomic_write({str(target)!r}, b"y" * 100_000)
        except ConfigError as exc:
            print(exc)
            sys.exit(3)
        sys.exit(0)
        """
    )
    env = dict(os.environ, PYTHONDONTWRITEBYTECODE="1")
    res = subprocess.run(
        [sys.executable, "-c", child],
        capture_output=True,
        text=True,
        env=env,
        timeout=60,
        check=False,
    )
    assert res.returncode == 3, res.stdout + res.stderr
    assert "file-size limit" in res.stdout and "unchanged" in res.stdout
    assert target.read_bytes() == b"schema = 1\nname = 'old'\n"
    assert backup_path(target).read_bytes() == b"schema = 1\n"
    assert _leftovers(tmp_path) == []
