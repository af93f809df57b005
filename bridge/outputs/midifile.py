"""Record what the MIDI output plays as a Standard MIDI File.

:class:`MidiFileRecorder` is a port like the rtmidi ones (``send(data)``), so the same
:class:`~bridge.outputs.midi.MidiSink` logic plays into a file: for listening back, for
rendering offline with a synthesizer, or for tests. Each message is kept with its time;
on close the file is written (type 0, one track, a tempo event, then the messages with
delta times in ticks), streamed to a temporary file and renamed into place on close,
so a long set costs no memory and a crash never leaves half a file.

Times come from the caller (``send(data, t)``, seconds on any clock, e.g. a reading's
``t``) or, when none is given, from ``time.monotonic``. The first message is at tick 0.
"""

from __future__ import annotations

import logging
import os
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import BinaryIO

from pydantic import Field

from bridge.errors import DeviceError
from bridge.outputs.midi import MidiSettings, MidiSink

log = logging.getLogger(__name__)


def _varlen(n: int) -> bytes:
    """A Standard MIDI File variable-length quantity: 7 bits a byte, high bit = more follows
    (Standard MIDI Files 1.0, "Variable Length Quantity"; e.g. 0x80 -> 81 00)."""
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append(0x80 | (n & 0x7F))
        n >>= 7
    return bytes(reversed(out))


class MidiFileRecorder:
    """A port that streams raw messages with their times into a Standard MIDI File.

    Messages go to a temporary file beside the target as they arrive (buffered), so a
    long set costs no memory; ``close()`` fills in the track length, syncs and renames
    the file into place in one atomic step, so a crash never leaves half a file under the
    real name.
    """

    #: Tells :class:`MidiSink` to pass the reading's time along with each message.
    timed = True

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        tempo_bpm: float = 120.0,
        ticks_per_beat: int = 960,
        t0: float | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        import mido

        self.path = Path(path)
        self.name = f"file:{self.path.name}"
        self.ticks_per_beat = ticks_per_beat
        self.tempo = mido.bpm2tempo(tempo_bpm)  # microseconds a beat, an integer in the file
        # Ticks a second from the tempo as stored, so reading the file back gives our times.
        self.ticks_per_s = ticks_per_beat * 1_000_000 / self.tempo
        self._clock = clock
        self._t0 = t0
        self._last_t: float | None = None
        self._last_tick = 0
        self._count = 0
        self._given_times = False
        self._file: BinaryIO | None = None
        self._tmp = self.path  # set by _start to a fresh, unpredictable name
        self._body = 0  # bytes of track data written so far
        self.closed = False

    def _start(self) -> BinaryIO:
        folder = self.path.parent if str(self.path.parent) else Path(".")
        try:
            # mkstemp: a new file (O_EXCL, owner-only) that no planted link can redirect
            fd, tmp = tempfile.mkstemp(prefix=f".{self.path.name}.", suffix=".tmp", dir=folder)
            self._tmp = Path(tmp)
            f = os.fdopen(fd, "wb")  # held open until close()
        except OSError as exc:
            raise DeviceError(f"cannot write MIDI file {self.path}: {exc}") from exc
        # MThd: type 0, one track, ticks per beat; MTrk with its length filled in at close.
        f.write(b"MThd" + (6).to_bytes(4, "big") + (0).to_bytes(2, "big")
                + (1).to_bytes(2, "big") + self.ticks_per_beat.to_bytes(2, "big"))
        f.write(b"MTrk" + b"\0\0\0\0")
        self._write(f, b"\x00\xff\x51\x03" + self.tempo.to_bytes(3, "big"))  # set_tempo
        self._file = f
        return f

    def _write(self, f: BinaryIO, chunk: bytes) -> None:
        f.write(chunk)
        self._body += len(chunk)

    def send(self, data: bytes, t: float | None = None) -> None:
        """Record one complete message at time ``t`` (seconds; None: now, or the last time)."""
        if self.closed:
            raise DeviceError(f"MIDI file {self.path} is already written; open a new recorder")
        if t is None:
            # A recording driven by given times stays on that clock; otherwise use ours.
            t = self._last_t if self._last_t is not None and self._given_times else self._clock()
        else:
            self._given_times = True
        if self._t0 is None:
            self._t0 = t
        self._last_t = t
        tick = round((t - self._t0) * self.ticks_per_s)
        if tick < self._last_tick:  # never backwards: a file has only forward deltas
            tick = self._last_tick
        f = self._file or self._start()
        try:
            self._write(f, _varlen(tick - self._last_tick) + bytes(data))
        except OSError as exc:
            raise DeviceError(f"cannot write MIDI file {self.path}: {exc}") from exc
        self._last_tick = tick
        self._count += 1

    @property
    def messages(self) -> int:
        return self._count

    def close(self) -> None:
        """Finish the file (atomically) once; later calls do nothing."""
        if self.closed:
            return
        self.closed = True
        f = self._file or self._start()
        try:
            self._write(f, b"\x00\xff\x2f\x00")  # end_of_track
            f.seek(18)  # 14 bytes of MThd, then "MTrk"
            f.write(self._body.to_bytes(4, "big"))
            f.flush()
            os.fsync(f.fileno())
            f.close()
            mask = os.umask(0)
            os.umask(mask)
            os.chmod(self._tmp, 0o666 & ~mask)  # mkstemp made it 0600; a take is a normal file
            os.replace(self._tmp, self.path)
        except OSError as exc:
            f.close()
            self._tmp.unlink(missing_ok=True)
            raise DeviceError(f"cannot write MIDI file {self.path}: {exc}") from exc
        _fsync_folder(self.path.parent if str(self.path.parent) else Path("."))
        log.info("MIDI file written: %s (%d messages)", self.path, self._count)


def _fsync_folder(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return  # some file systems do not open folders; the rename is done anyway
    try:
        os.fsync(fd)
    except OSError:
        pass  # folder fsync is unsupported on some file systems; nothing more to do
    finally:
        os.close(fd)


class MidiFileSettings(MidiSettings):
    """MIDI output settings plus where and how to write the file (port fields unused)."""

    path: Path
    tempo_bpm: float = Field(default=120.0, gt=0.0)
    ticks_per_beat: int = Field(default=960, ge=24, le=32767)


class MidiFileSink(MidiSink):
    """The MIDI output, played into a Standard MIDI File instead of a live port."""

    kind = "midifile"

    def __init__(self, settings: MidiFileSettings, *, voices: int | None = None) -> None:
        super().__init__(settings, [], voices=voices)
        self._file_settings = settings

    def open(self) -> None:
        if not self._opened:
            s = self._file_settings
            self._given = [
                MidiFileRecorder(s.path, tempo_bpm=s.tempo_bpm, ticks_per_beat=s.ticks_per_beat)
            ]
        super().open()


__all__ = ["MidiFileRecorder", "MidiFileSettings", "MidiFileSink"]
