"""How settings files are stored: atomic writes, and TOML that keeps its comments.

**Atomic writes.** A settings file is replaced in one step or not at all::

    write bytes to a hidden temporary file in the same folder
    -> flush, fsync (the bytes are on the medium)
    -> hard-link the current file to NAME.bak (the previous version)
    -> os.replace(temporary, NAME)       (atomic on POSIX and Windows)
    -> fsync the folder                   (the rename itself is on the medium)

A crash at any point leaves either the old file or the new one, never half of each.
When the disk is full (or a file-size limit is hit) the write fails before anything is
renamed, the temporary file is removed and the old file is untouched. Flash wears with
every write, so ``atomic_write`` compares the new bytes with the file's current bytes
first and skips the write when they are identical.

**TOML settings files.** Every file starts with ``schema = SCHEMA`` and a ``kind`` line.
``load_model`` reads one into a pydantic model and reports every problem on its own
line as ``FILE: path.to[0].key: what is wrong (found VALUE)``. ``save_model`` checks
the model again, then updates the existing document in place: values that did not
change keep their formatting and comments, keys the file leaves out stay out while
they equal their default, and a file whose bytes would not change is not written.
``differences`` lists the fields in which two models differ, by the same paths.
"""

from __future__ import annotations

import errno
import glob
import logging
import math
import os
import re
import shutil
import tempfile
import types
from collections.abc import Callable, Iterable, Mapping, MutableMapping
from dataclasses import dataclass
from datetime import date, datetime, time
from enum import Enum
from pathlib import Path, PurePath
from typing import Annotated, Any, TypeVar, Union, get_args, get_origin

import tomlkit
from pydantic import BaseModel, ValidationError
from tomlkit.container import Container
from tomlkit.exceptions import TOMLKitError
from tomlkit.items import AoT, Array, Table

from bridge.errors import BridgeError, ConfigError

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
    _sweep_stale_temporaries(path)
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


#: A temporary file older than this was left by a write that was killed (power cut).
STALE_TMP_S = 3600.0


def _sweep_stale_temporaries(path: Path) -> None:
    """Remove hidden temporaries of ``path`` left behind by killed writes (an hour old)."""
    now = datetime.now().timestamp()
    for old in path.parent.glob(f".{glob.escape(path.name)}.*.tmp"):
        try:
            if now - old.lstat().st_mtime > STALE_TMP_S:
                old.unlink()
        except OSError:
            pass  # gone already, or not ours to remove: leave it


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


# ======================================================================================
# TOML settings files
# ======================================================================================

#: The file layout version this code reads and writes.
SCHEMA = 1

M = TypeVar("M", bound=BaseModel)

#: Further checks of a valid model: (location, message) pairs, empty when all is well.
Check = Callable[[Any], "list[tuple[str, str]]"]


def read_document(path: Path) -> tomlkit.TOMLDocument:
    """Parse a UTF-8 TOML file into a tomlkit document (comments and layout kept)."""
    raw = read_bytes(path)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: not UTF-8 text (byte {exc.start}): save it as UTF-8") from exc
    try:
        return tomlkit.parse(text)
    except TOMLKitError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from exc


def check_header(path: Path, data: Mapping[str, Any], kind: str) -> None:
    """Refuse a file without ``schema = SCHEMA`` (saying whether it is newer or older)
    or of another kind than ``kind``."""
    schema = data.get("schema")
    if schema is None:
        raise ConfigError(f"{path}: schema: missing; the first line should be `schema = {SCHEMA}`")
    if isinstance(schema, bool) or not isinstance(schema, int):
        raise ConfigError(
            f"{path}: schema: must be a whole number such as {SCHEMA} (found {schema!r})"
        )
    if schema > SCHEMA:
        raise ConfigError(
            f"{path}: schema: the file is schema {schema}, written by a newer fieldbridge; this "
            f"version reads schema {SCHEMA}. Upgrade fieldbridge."
        )
    if schema < SCHEMA:
        raise ConfigError(
            f"{path}: schema: the file is schema {schema}, older than this version's {SCHEMA}, "
            "and cannot be read; recreate it from the examples in the profiles/ folder."
        )
    found = data.get("kind")
    if found != kind:
        raise ConfigError(
            f'{path}: kind: must be "{kind}" here (found {found!r}); is this the right file?'
        )


def load_model(path: Path | str, cls: type[M], kind: str, *, check: Check | None = None) -> M:
    """Read a settings file: header checked, every field validated, problems named.

    ``check`` runs further checks on the valid model and returns (location, message)
    pairs; any makes the load fail like a field error.
    """
    path = Path(path)
    data = read_document(path).unwrap()
    check_header(path, data, kind)
    body = {k: v for k, v in data.items() if k not in ("schema", "kind")}
    try:
        model = cls.model_validate(body)
    except ValidationError as exc:
        raise ConfigError(error_text(path, exc, body, cls)) from exc
    except BridgeError as exc:
        raise ConfigError(f"{path}: {exc}") from exc
    problems = check(model) if check is not None else []
    if problems:
        raise ConfigError("\n".join(f"{path}: {loc}: {msg}" for loc, msg in problems))
    return model


# Pydantic's error locations, made into the paths a person sees in the file.


def validation_problems(
    exc: ValidationError, data: Any, root: type[BaseModel]
) -> list[tuple[str, str]]:
    """(path in the file, message) for each of pydantic's errors about ``data``.

    Paths look like ``voices[0].pitch.span_semitones``; an unknown key lists the keys
    allowed in its table (found from the ``root`` model), a bad value shows what was found.
    """
    out: list[tuple[str, str]] = []
    for err in exc.errors(include_url=False):
        loc = _real_loc(err["loc"], data)
        kind, msg = err["type"], err["msg"]
        if kind == "extra_forbidden":
            allowed = _allowed_keys(root, loc[:-1])
            msg = "unknown key" + (f"; allowed here: {', '.join(allowed)}" if allowed else "")
        elif kind == "missing":
            msg = "required, but missing"
        else:
            msg = msg.removeprefix("Value error, ")
            found = err.get("input")
            if isinstance(found, (str, int, float, bool)) and len(repr(found)) <= 60:
                msg += f" (found {found!r})"
        if "\n" in msg and not loc:  # a model-level check reports several problems at once
            out += [("", line) for line in msg.splitlines()]
        else:
            out.append((loc_text(loc), msg))
    return out


def error_text(path: Path, exc: ValidationError, data: Any, root: type[BaseModel]) -> str:
    """The problems of :func:`validation_problems`, one line each, prefixed with the file."""
    lines = [
        f"{path}: {loc}: {msg}" if loc else f"{path}: {msg}"
        for loc, msg in validation_problems(exc, data, root)
    ]
    return "\n".join(lines)


def _real_loc(loc: tuple[Any, ...], data: Any) -> tuple[Any, ...]:
    """Keep the parts of a location that are keys or indexes of the data (drop union tags)."""
    out: list[Any] = []
    node = data
    for i, part in enumerate(loc):
        last = i == len(loc) - 1
        if isinstance(node, Mapping) and isinstance(part, str) and (part in node or last):
            out.append(part)
            node = node.get(part)
        elif isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node):
            out.append(part)
            node = node[part]
    return tuple(out)


_BARE = re.compile(r"[A-Za-z0-9_-]+")


def loc_text(loc: Iterable[Any]) -> str:
    """("voices", 0, "pitch") -> ``voices[0].pitch``; odd keys are quoted: ``['a b']``."""
    text = ""
    for part in loc:
        if isinstance(part, int):
            text += f"[{part}]"
        elif _BARE.fullmatch(str(part)):
            text += f".{part}" if text else str(part)
        else:
            text += f"[{str(part)!r}]"
    return text


def _plain_type(tp: Any) -> Any:
    while True:
        origin = get_origin(tp)
        if origin is Annotated:
            tp = get_args(tp)[0]
        elif origin in (Union, types.UnionType):
            members = [a for a in get_args(tp) if a is not type(None)]
            models = [a for a in members if isinstance(a, type) and issubclass(a, BaseModel)]
            if len(models) != 1:
                return tp
            tp = models[0]
        else:
            return tp


def _allowed_keys(root: type[BaseModel], loc: tuple[Any, ...]) -> list[str]:
    tp: Any = root
    for part in loc:
        tp = _plain_type(tp)
        origin = get_origin(tp)
        if isinstance(tp, type) and issubclass(tp, BaseModel) and isinstance(part, str):
            info = tp.model_fields.get(part)
            if info is None:
                return []
            tp = info.annotation
        elif origin in (list, tuple) and isinstance(part, int):
            tp = get_args(tp)[0]
        elif origin is dict and isinstance(part, str):
            tp = get_args(tp)[1]
        else:
            return []
    tp = _plain_type(tp)
    if isinstance(tp, type) and issubclass(tp, BaseModel):
        return list(tp.model_fields)
    return []


# --------------------------------------------------------------------------------- writing


class _Default:
    """Marks a value equal to its field's default: not added to a file that lacks it."""

    __slots__ = ("value",)

    def __init__(self, value: Any) -> None:
        self.value = value


_NO_DEFAULT = object()


def _field_default(info: Any) -> Any:
    try:
        return info.get_default(call_default_factory=True)
    except TypeError:  # a default factory that wants the other fields: treat as no default
        return _NO_DEFAULT


def _dump_model(model: BaseModel) -> Any:
    raw = model.model_dump(mode="python")
    if not isinstance(raw, dict):
        return _plain(raw)
    out: dict[str, Any] = {}
    for name, info in type(model).model_fields.items():
        if name not in raw:
            continue  # left out by the model's own serializer
        data = _to_data(getattr(model, name), raw[name])
        if data is None:
            # TOML has no null: an unset optional is an absent key, which reads back as
            # the default. When the default is not None that would change the value.
            default = _field_default(info)
            if not info.is_required() and default is not None and default is not _NO_DEFAULT:
                raise ConfigError(
                    f"{type(model).__name__}.{name}: 'unset' cannot be written in TOML, and "
                    f"leaving the key out means its default {default!r}"
                )
            continue
        if not info.is_required() and _equal(getattr(model, name), _field_default(info)):
            data = _Default(data)
        out[name] = data
    return out


def _to_data(value: Any, raw: Any) -> Any:
    if isinstance(value, BaseModel):
        return _dump_model(value)
    if isinstance(value, (list, tuple)) and isinstance(raw, list) and len(value) == len(raw):
        return [_to_data(v, r) for v, r in zip(value, raw, strict=True)]
    if isinstance(value, Mapping) and isinstance(raw, dict):
        return {str(k): _to_data(value[k], raw[k]) for k in value if raw.get(k) is not None}
    return _plain(raw)


def _plain(v: Any) -> Any:
    """Python values as TOML can hold them."""
    if v is None or isinstance(v, (bool, int, float, str, datetime, date, time)):
        return v
    if isinstance(v, Enum):
        return _plain(v.value)
    if isinstance(v, PurePath):
        return str(v)
    if isinstance(v, Mapping):
        return {str(k): _plain(x) for k, x in v.items() if x is not None}
    if isinstance(v, (list, tuple, set, frozenset)):
        items = sorted(v) if isinstance(v, (set, frozenset)) else v
        return [_plain(x) for x in items]
    if hasattr(v, "item"):  # numpy scalars
        return _plain(v.item())
    raise ConfigError(f"cannot store a value of type {type(v).__name__} in TOML")


def _equal(a: Any, b: Any) -> bool:
    try:
        return bool(a == b)
    except Exception:  # noqa: BLE001 - exotic __eq__: not equal, so the value is written
        return False


def _same(a: Any, b: Any) -> bool:
    """Equal as TOML values: 5550 and 5550.0 are the same number, true and 1 are not."""
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return a == b or (math.isnan(a) and math.isnan(b))  # NaN equals NaN here
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    return type(a) is type(b) and a == b


def _unwrapped(item: Any) -> Any:
    return item.unwrap() if hasattr(item, "unwrap") else item


def _fresh(v: Any) -> Any:
    """Values for new content: everything explicit, except empty tables left at default."""
    if isinstance(v, _Default):
        if isinstance(v.value, dict) and not v.value:
            return None
        return _fresh(v.value)
    if isinstance(v, dict):
        return {k: x for k, x in ((k, _fresh(x)) for k, x in v.items()) if x is not None}
    if isinstance(v, list):
        return [_fresh(x) for x in v]
    if isinstance(v, str) and "\n" in v:
        return tomlkit.string(v, multiline=True)
    return v


def _merge_table(
    table: MutableMapping[str, Any], data: Mapping[str, Any], *, fresh: bool = False
) -> None:
    """Change ``table`` (part of a tomlkit document) in place to hold ``data``.

    Values that are already equal are not touched, so their formatting and comments
    stay; keys no longer wanted are removed. A key the file leaves out stays out while
    its value is the default (unless the document is ``fresh``: then all is written).
    """
    for key in list(table.keys()):
        if key not in data:
            del table[key]
    for key, value in data.items():
        if key in table:
            _merge_value(table, key, value.value if isinstance(value, _Default) else value)
        elif fresh or not isinstance(value, _Default):
            new = _fresh(value)
            if new is not None:
                _add_key(table, key, new)


def _add_key(table: MutableMapping[str, Any], key: str, value: Any) -> None:
    """Add a new key; a plain value goes right after the table's last plain value.

    Appending would put it after the comments that introduce the next table (tomlkit
    counts them as the end of this one), so it is inserted instead when possible.
    """
    container = table if isinstance(table, Container) else getattr(table, "value", None)
    plain = not isinstance(value, (dict, list)) or isinstance(value, Array)
    if plain and isinstance(container, Container):
        last = None
        for k, item in container.body:
            if k is not None and not isinstance(item, (Table, AoT)):
                last = k
        if last is not None:
            try:
                container._insert_after(last, key, value)  # tomlkit has no public insert
                return
            except (TOMLKitError, KeyError, ValueError, AttributeError):
                pass
    table[key] = value


def _merge_value(table: MutableMapping[str, Any], key: str, value: Any) -> None:
    old = table[key]
    if isinstance(value, dict) and isinstance(old, MutableMapping):
        _merge_table(old, value)
        return
    if isinstance(old, AoT) and isinstance(value, list) and all(isinstance(v, dict) for v in value):
        for i, item in enumerate(value):
            if i < len(old):
                _merge_table(old[i], item)
            else:
                old.append(_fresh(item))
        while len(old) > len(value):
            del old[len(old) - 1]
        return
    if not _same(_unwrapped(old), _strip_plain(value)):
        table[key] = _fresh(value)


def _strip_plain(v: Any) -> Any:
    if isinstance(v, _Default):
        return _strip_plain(v.value)
    if isinstance(v, dict):
        return {k: _strip_plain(x) for k, x in v.items()}
    if isinstance(v, list):
        return [_strip_plain(x) for x in v]
    return v


def render_model(
    path: Path, model: BaseModel, kind: str, header: str, keep_comments: bool
) -> bytes:
    """The bytes of ``model`` as a TOML file of ``kind``.

    With ``keep_comments`` and a readable file at ``path``, that document is updated in
    place (see :func:`_merge_table`); otherwise a new one starts with ``header``. A file
    written by a newer version is never overwritten.
    """
    data = {"schema": SCHEMA, "kind": kind, **_dump_model(model)}
    doc: tomlkit.TOMLDocument | None = None
    old: tomlkit.TOMLDocument | None = None
    fresh, reason = True, ""
    if path.exists():
        try:
            old = read_document(path)
        except ConfigError as exc:
            reason = str(exc)
        schema = old.get("schema") if old is not None else None
        if isinstance(schema, int) and not isinstance(schema, bool) and schema > SCHEMA:
            raise ConfigError(
                f"{path}: not saved: the file is schema {schema}, written by a newer "
                f"fieldbridge; this version writes schema {SCHEMA}. Upgrade fieldbridge."
            )
        if keep_comments and old is not None:
            doc, fresh = old, False
        elif keep_comments:
            log.warning(
                "%s could not be read (%s); writing it afresh (the old file is kept as .bak)",
                path,
                reason,
            )
    if doc is None:
        doc = tomlkit.document()
        for line in header.splitlines():
            doc.add(tomlkit.comment(line) if line else tomlkit.nl())
        doc.add(tomlkit.nl())
        doc.add("schema", SCHEMA)
        doc.add("kind", kind)
    _merge_table(doc, data, fresh=fresh)
    return tomlkit.dumps(doc).encode("utf-8")


def save_model(
    path: Path | str,
    model: M,
    kind: str,
    *,
    header: str = "",
    keep_comments: bool = True,
    check: Check | None = None,
) -> bool:
    """Validate ``model`` again and write it atomically; False when the file already held it.

    With ``keep_comments`` an existing file is updated in place (see :func:`render_model`);
    ``header`` is the comment that starts a new file.
    """
    path = Path(path)
    # Check the whole model again: a value assigned after loading may not have been.
    full = _strip_plain(_dump_model(model))
    try:
        type(model).model_validate(full)
    except ValidationError as exc:
        raise ConfigError("not saved:\n" + error_text(path, exc, full, type(model))) from exc
    problems = check(model) if check is not None else []
    if problems:
        raise ConfigError("not saved:\n" + "\n".join(f"{path}: {a}: {b}" for a, b in problems))
    return atomic_write(path, render_model(path, model, kind, header, keep_comments))


# ------------------------------------------------------------------------------- comparing


class _Absent:
    def __repr__(self) -> str:
        return "(absent)"


#: Stands for a value that one side of a comparison does not have.
ABSENT: Any = _Absent()


@dataclass(frozen=True)
class Difference:
    """One field that differs: its path as written in the file, and the two values."""

    path: str
    a: Any
    b: Any

    def __str__(self) -> str:
        return f"{self.path}: {self.a!r} -> {self.b!r}"


def _flatten(data: Any, prefix: tuple[Any, ...], out: dict[str, Any]) -> None:
    if isinstance(data, Mapping) and data:
        for k, v in data.items():
            _flatten(v, (*prefix, k), out)
    elif isinstance(data, list) and data and all(isinstance(x, Mapping) for x in data):
        for i, v in enumerate(data):
            _flatten(v, (*prefix, i), out)
    else:
        out[loc_text(prefix)] = data


def differences(a: BaseModel, b: BaseModel) -> list[Difference]:
    """Every field whose value differs between two models, defaults included."""
    fa: dict[str, Any] = {}
    fb: dict[str, Any] = {}
    _flatten(_strip_plain(_dump_model(a)), (), fa)
    _flatten(_strip_plain(_dump_model(b)), (), fb)
    keys = list(fa) + [k for k in fb if k not in fa]
    return [
        Difference(k, fa.get(k, ABSENT), fb.get(k, ABSENT))
        for k in keys
        if k not in fa or k not in fb or not _same(fa[k], fb[k])
    ]


__all__ = [
    "ABSENT",
    "SCHEMA",
    "Check",
    "Difference",
    "atomic_write",
    "backup_path",
    "check_header",
    "differences",
    "error_text",
    "load_model",
    "loc_text",
    "read_bytes",
    "read_document",
    "render_model",
    "save_model",
    "validation_problems",
]
