"""Safe file writes for settings that live on SD cards and survive power cuts.

A settings file is replaced in one step or not at all::

    write bytes to a hidden temporary file in the same folder
    -> flush, fsync (the bytes are on the medium)
    -> hard-link the current file to NAME.bak (the previous version)
    -> os.replace(temporary, NAME)       (atomic on POSIX and Windows)
    -> fsync the folder                   (the rename itself is on the medium)

A crash at any point leaves either the old file or the new one, never half of
each. When the disk is full (or a file-size limit is hit) the write fails before
anything is renamed, the temporary file is removed and the old file is untouched.

Flash wears with every write, so ``atomic_write`` compares the new bytes with
the file's current bytes first and skips the write when they are identical.
"""

from __future__ import annotations

import errno
import logging
import os
import shutil
import tempfile
from pathlib import Path

from bridge.errors import ConfigError

log = logging.getLogger(__name__)

BACKUP_SUFFIX = ".bak"

# errno values that mean "no room": a full file system, a full quota, or a
# per-process file-size limit (RLIMIT_FSIZE -> EFBIG).
_NO_ROOM = {errno.ENOSPC, errno.EFBIG, getattr(errno, "EDQUOT", errno.ENOSPC)}


def backup_path(path: Path) -> Path:
    """Where the previous version of ``path`` is kept: ``NAME.bak`` beside it."""
    return path.with_name(path.name + BACKUP_SUFFIX)


def read_bytes(path: Path) -> bytes:
    """Read a whole settings file; a missing or unreadable file is a ConfigError."""
    try:
        return Path(path).read_bytes()
    except FileNotFoundError as exc:
        raise ConfigError(f"{path}: no such file") from exc
    except IsADirectoryError as exc:
        raise ConfigError(f"{path}: is a folder, not a file") from exc
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read: {exc.strerror or exc}") from exc


def atomic_write(path: Path | str, data: bytes, *, backup: bool = True) -> bool:
    """Replace ``path`` with ``data`` atomically; return False if nothing had to change.

    With ``backup`` the replaced version stays as ``NAME.bak`` (a hard link, so
    keeping it costs no space; on file systems without hard links, a copy).
    The folder must exist. Raises ConfigError with a plain reason on failure;
    the old file is then unchanged.
    """
    path = Path(path)
    try:
        if path.read_bytes() == data:
            log.debug("%s unchanged, not rewritten", path)
            return False
        existed = True
    except FileNotFoundError:
        existed = False
    except IsADirectoryError as exc:
        raise ConfigError(f"{path}: is a folder, not a file") from exc
    except OSError:
        existed = path.exists()

    folder = path.parent
    tmp = _write_temporary(path, data)
    try:
        if existed:
            _keep_mode(path, tmp)
            if backup:
                _make_backup(path)
        os.replace(tmp, path)
    except OSError as exc:
        _remove_quietly(tmp)
        raise _error(path, "cannot replace", exc) from exc
    _fsync_folder(folder)
    log.debug("wrote %s (%d bytes)", path, len(data))
    return True


def _write_temporary(path: Path, data: bytes) -> Path:
    """Write ``data`` to a new hidden file beside ``path``, flushed to the medium."""
    try:
        fd, name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as exc:
        raise _error(path, "cannot create a temporary file in its folder", exc) from exc
    tmp = Path(name)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    except OSError as exc:
        _remove_quietly(tmp)
        raise _error(path, "cannot write", exc) from exc
    return tmp


def _keep_mode(path: Path, tmp: Path) -> None:
    """Give the new file the old file's permission bits (mkstemp makes 0600)."""
    try:
        os.chmod(tmp, path.stat().st_mode & 0o7777)
    except OSError:
        pass  # permissions are best effort; the content matters more


def _make_backup(path: Path) -> None:
    """Keep the current ``path`` as ``NAME.bak``, replacing an older backup atomically."""
    bak = backup_path(path)
    staging = path.with_name(f".{bak.name}.{os.getpid()}.tmp")
    _remove_quietly(staging)
    try:
        os.link(path, staging)
    except OSError:
        # No hard links here (e.g. FAT on an SD card): copy instead. A failed copy
        # must not block the save itself, so it only costs the backup.
        try:
            shutil.copy2(path, staging)
        except OSError as exc:
            _remove_quietly(staging)
            log.warning("%s: could not keep a backup: %s", path, exc.strerror or exc)
            return
    os.replace(staging, bak)


def _fsync_folder(folder: Path) -> None:
    """Make a rename durable; folders cannot be opened on some platforms (Windows)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems refuse fsync on a folder; the rename already happened
    finally:
        os.close(fd)


def _remove_quietly(path: Path) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass


def _error(path: Path, what: str, exc: OSError) -> ConfigError:
    if exc.errno in _NO_ROOM:
        if exc.errno == errno.EFBIG:
            reason = "the file-size limit was reached (EFBIG)"
        else:
            reason = "the disk is full (no space left on the device)"
        return ConfigError(
            f"{path}: not saved: {reason}; the previous version is unchanged. "
            "Free some space and save again."
        )
    if exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        return ConfigError(
            f"{path}: not saved: {exc.strerror} (check the folder's owner and permissions, "
            "or whether the medium is mounted read-only); the previous version is unchanged."
        )
    return ConfigError(f"{path}: {what}: {exc.strerror or exc}; the previous version is unchanged.")
