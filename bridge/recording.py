"""Recordings of raw board bytes with timestamps, and a source that plays them back.

A recording keeps the bytes exactly as the link delivered them, in the chunks it delivered
them, so a replay exercises the frame decoder again (torn lines, a reset's garbage and all).

The file format (version 1) is line-oriented ASCII text, easy to inspect and to cut::

    {"format": "fieldbridge-raw", "version": 1, "created": "2025-03-01T20:15:00+00:00", ...}
    0.000000 3130323420393931320a
    0.010012 3130323320393931310a
    # a line starting with '#' is a comment; blank lines are ignored

- Line 1 is one JSON object, the :class:`RecordingHeader`: format name and version, when
  it was made, the frame format and its settings, channel names and kinds (``count`` or
  ``period``), a free-text board description and notes.
- Every other line is ``<seconds since the first chunk, 6 decimals> <the chunk in hex>``.
  Times never decrease. Hex doubles the size, and buys a file any text tool can read.

Writing is buffered and flushed to the operating system about once a second (by the
timestamps written), and fsynced once on close: an SD card is not written for every chunk,
and a crash loses about a second. A torn last line from a crash is skipped on replay.
"""

from __future__ import annotations

import json
import logging
import os
import threading
import time
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import IO, Any, Final, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from bridge.errors import ConfigError, DeviceError
from bridge.sources import DEFAULT_WAIT_S, LinkState, StateChange

log = logging.getLogger(__name__)

FORMAT_NAME: Final = "fieldbridge-raw"
FORMAT_VERSION: Final = 1


def _now_utc() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


class RecordingHeader(BaseModel):
    """The first line of a recording: what is needed to decode the bytes again."""

    model_config = ConfigDict(extra="forbid")

    format: Literal["fieldbridge-raw"] = FORMAT_NAME
    version: int = FORMAT_VERSION
    created: str = Field(default_factory=_now_utc, description="ISO 8601 time, UTC.")
    frame_format: str = Field(default="text", description="Name of the frame format (frames.py).")
    frame_settings: dict[str, Any] = Field(
        default_factory=dict, description="The frame settings in force, to rebuild the decoder."
    )
    channels: list[str] = Field(default_factory=list)
    kinds: list[Literal["count", "period"]] = Field(default_factory=list)
    board: str = Field(default="", description="Free text: which board, which firmware.")
    notes: str = ""

    @model_validator(mode="after")
    def _kinds_match(self) -> RecordingHeader:
        if self.kinds and self.channels and len(self.kinds) != len(self.channels):
            raise ValueError("kinds must give one entry per channel")
        return self


def _parse_header(line: str, path: str) -> RecordingHeader:
    try:
        raw = json.loads(line)
    except json.JSONDecodeError as exc:
        raise ConfigError(f"{path}: not a recording (first line is not JSON: {exc})") from exc
    if not isinstance(raw, dict) or raw.get("format") != FORMAT_NAME:
        raise ConfigError(f"{path}: not a recording (no format {FORMAT_NAME!r} on line 1)")
    version = raw.get("version")
    if not isinstance(version, int) or version > FORMAT_VERSION:
        raise ConfigError(
            f"{path}: recording format version {version!r} is newer than this program "
            f"reads ({FORMAT_VERSION}); update fieldbridge"
        )
    try:
        return RecordingHeader.model_validate(raw)
    except ValidationError as exc:
        raise ConfigError(f"{path}: bad recording header: {exc}") from exc


def read_header(path: str | os.PathLike[str]) -> RecordingHeader:
    """Read only the header of a recording."""
    p = os.fspath(path)
    try:
        with open(p, encoding="ascii", errors="replace") as fh:
            return _parse_header(fh.readline(), p)
    except OSError as exc:
        raise ConfigError(f"cannot read recording {p}: {exc}") from exc


class RecordingWriter:
    """Writes chunks as they arrive. Use as a context manager, or call open() and close().

    ``t`` passed to :meth:`write` may come from any clock in seconds (time.monotonic in the
    daemon); the file stores it relative to ``t0``, by default the first chunk's time.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        header: RecordingHeader | Mapping[str, Any],
        *,
        t0: float | None = None,
        flush_every_s: float = 1.0,
        overwrite: bool = False,
    ) -> None:
        self.path = os.fspath(path)
        if not isinstance(header, RecordingHeader):
            header = RecordingHeader.model_validate(header)
        self.header = header
        self.flush_every_s = flush_every_s
        self.overwrite = overwrite
        self.chunks_written = 0
        self.bytes_written = 0
        self._t0 = t0
        self._last_rel = 0.0
        self._last_flush = 0.0
        self._fh: IO[str] | None = None
        self._warned_backwards = False

    def open(self) -> RecordingWriter:
        if self._fh is not None:
            return self
        try:
            # "x" refuses to overwrite an earlier take by accident.
            fh = open(  # noqa: SIM115 - closed in close()
                self.path, "w" if self.overwrite else "x", encoding="ascii", newline="\n",
                buffering=64 * 1024,
            )
        except FileExistsError as exc:
            raise ConfigError(f"recording {self.path} exists already; choose another name") from exc
        except OSError as exc:
            raise ConfigError(f"cannot create recording {self.path}: {exc}") from exc
        self._fh = fh
        try:
            fh.write(self.header.model_dump_json() + "\n")
            fh.flush()
        except OSError as exc:
            raise DeviceError(f"writing recording {self.path} failed: {exc}") from exc
        return self

    def write(self, t: float, data: bytes) -> None:
        """Append one chunk received at time ``t`` (seconds)."""
        if not data:
            return
        fh = self._fh
        if fh is None:
            raise DeviceError(f"recording {self.path} is not open")
        if self._t0 is None:
            self._t0 = t
        rel = t - self._t0
        if rel < self._last_rel:  # clocks do not run backwards; a caller's bug, keep order
            if not self._warned_backwards:
                log.warning("recording time went backwards (%.6f < %.6f); clamped", rel,
                            self._last_rel)
                self._warned_backwards = True
            rel = self._last_rel
        self._last_rel = rel
        try:
            fh.write(f"{rel:.6f} {data.hex()}\n")
            if rel - self._last_flush >= self.flush_every_s:
                fh.flush()
                self._last_flush = rel
        except OSError as exc:
            raise DeviceError(f"writing recording {self.path} failed (disk full?): {exc}") from exc
        self.chunks_written += 1
        self.bytes_written += len(data)

    def close(self) -> None:
        """Flush, fsync and close. Safe to call twice."""
        fh, self._fh = self._fh, None
        if fh is None:
            return
        try:
            fh.flush()
            os.fsync(fh.fileno())
        except OSError as exc:
            raise DeviceError(f"finishing recording {self.path} failed: {exc}") from exc
        finally:
            fh.close()

    def __enter__(self) -> RecordingWriter:
        return self.open()

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclass
class RecordingStats:
    bytes_in: int = 0
    chunks: int = 0
    bad_lines: int = 0


class RecordingSource:
    """Plays a recording back through the same ``read(max_wait)`` interface as a serial link.

    ``realtime=True`` returns each chunk when its timestamp comes due (scaled by
    ``speed``); ``realtime=False`` returns chunks as fast as they are asked for. One chunk
    per read, and :attr:`last_t` is its recorded time, so a caller can stamp frames with
    the recording's clock instead of its own. At the end :attr:`finished` turns true, the
    state becomes ``stopped`` and reads return ``b""``; with ``loop=True`` playback starts
    over instead and :attr:`generation` counts up (reset the decoder, as after a reopen).

    ``clock`` and ``wait`` (``wait(seconds) -> True if interrupted``) may be replaced to
    drive the pacing from a test's own clock.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        realtime: bool = True,
        speed: float = 1.0,
        loop: bool = False,
        stop: threading.Event | None = None,
        on_state: Callable[[StateChange], Any] | None = None,
        clock: Callable[[], float] = time.monotonic,
        wait: Callable[[float], bool] | None = None,
    ) -> None:
        if speed <= 0:
            raise ValueError("speed must be positive")
        self.path = os.fspath(path)
        self.realtime = realtime
        self.speed = speed
        self.loop = loop
        self.stats = RecordingStats()
        self.last_t = 0.0
        self._stop = stop if stop is not None else threading.Event()
        self._on_state = on_state
        self._clock = clock
        self._wait = wait if wait is not None else self._stop.wait
        self._fh: IO[str] | None = None
        self._header: RecordingHeader | None = None
        self._body_offset = 0
        self._lineno = 1
        self._pending: tuple[float, bytes] | None = None
        self._origin_clock = 0.0
        self._origin_t = 0.0
        self._fresh = True
        self._finished = False
        self._state = LinkState.CONNECTING
        self._generation = 0

    @property
    def header(self) -> RecordingHeader:
        self._ensure_open()
        assert self._header is not None
        return self._header

    @property
    def state(self) -> LinkState:
        return self._state

    @property
    def generation(self) -> int:
        return self._generation

    @property
    def finished(self) -> bool:
        """True once the last chunk was returned (never with loop=True)."""
        return self._finished

    def read(self, max_wait: float | None = None) -> bytes:
        """The next chunk when it is due, or b"" if it is not due within ``max_wait``."""
        if self._stop.is_set():
            self._finish("stopped")
            return b""
        if self._finished:
            return b""
        self._ensure_open()
        if self._pending is None:
            self._pending = self._next_chunk()
            if self._pending is None:
                self._finished = True
                self._close_file()
                self._finish("end of recording")
                return b""
        t, data = self._pending
        if self.realtime:
            due = self._origin_clock + (t - self._origin_t) / self.speed
            left = due - self._clock()
            if left > 0:
                budget = DEFAULT_WAIT_S if max_wait is None else max_wait
                if left > budget:
                    self._wait(budget)
                    return b""
                if self._wait(left):
                    return b""  # interrupted
        self._pending = None
        self.last_t = t
        self.stats.chunks += 1
        self.stats.bytes_in += len(data)
        self._set_state(LinkState.STREAMING, "playing")
        return data

    def interrupt(self) -> None:
        self._stop.set()

    def close(self) -> None:
        """Stop and close the file. Safe to call twice."""
        self._stop.set()
        self._close_file()
        self._finish("closed")

    def __enter__(self) -> RecordingSource:
        self._ensure_open()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- internals ------------------------------------------------------------------------

    def _ensure_open(self) -> None:
        if self._fh is not None or self._finished:
            return
        try:
            fh = open(self.path, encoding="ascii", errors="replace", newline="\n")  # noqa: SIM115
        except OSError as exc:
            raise ConfigError(f"cannot read recording {self.path}: {exc}") from exc
        try:
            self._header = _parse_header(fh.readline(), self.path)
        except ConfigError:
            fh.close()
            raise
        self._body_offset = fh.tell()
        self._fh = fh
        self._generation = 1

    def _close_file(self) -> None:
        fh, self._fh = self._fh, None
        if fh is not None:
            fh.close()

    def _next_chunk(self) -> tuple[float, bytes] | None:
        chunk = self._parse_next()
        if chunk is None and self.loop and self.stats.chunks:
            assert self._fh is not None
            self._fh.seek(self._body_offset)
            self._lineno = 1
            self._generation += 1
            self._fresh = True
            log.info("recording %s: starting over (generation %d)", self.path, self._generation)
            chunk = self._parse_next()
        if chunk is not None and self._fresh:
            self._fresh = False
            self._origin_clock = self._clock()
            self._origin_t = chunk[0]
        return chunk

    def _parse_next(self) -> tuple[float, bytes] | None:
        assert self._fh is not None
        for line in self._fh:
            self._lineno += 1
            text = line.strip()
            if not text or text.startswith("#"):
                continue
            stamp, _, hexdata = text.partition(" ")
            try:
                chunk = float(stamp), bytes.fromhex(hexdata)
            except ValueError:
                self.stats.bad_lines += 1
                if self.stats.bad_lines == 1:
                    log.warning("%s line %d unreadable, skipped (torn by a crash?)", self.path,
                                self._lineno)
                continue
            if chunk[1]:
                return chunk
        return None

    def _finish(self, reason: str) -> None:
        self._set_state(LinkState.STOPPED, reason)

    def _set_state(self, new: LinkState, reason: str) -> None:
        old = self._state
        if new is old:
            return
        self._state = new
        log.info("recording %s -> %s: %s", old.value, new.value, reason)
        if self._on_state is not None:
            self._on_state(StateChange(old, new, self._generation, reason, self._clock()))


def iter_chunks(path: str | os.PathLike[str]) -> Iterator[tuple[float, bytes]]:
    """Every (time, bytes) chunk of a recording, as fast as it can be read."""
    src = RecordingSource(path, realtime=False)
    try:
        while True:
            data = src.read()
            if not data:
                return
            yield src.last_t, data
    finally:
        src.close()
