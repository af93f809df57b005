"""Record what the MIDI output plays as a Standard MIDI File.

:class:`MidiFileRecorder` is a port like the rtmidi ones (``send(data)``), so the same
:class:`~bridge.outputs.midi.MidiSink` logic plays into a file: for listening back, for
rendering offline with a synthesizer, or for tests. Each message is kept with its time;
on close the file is written (type 0, one track, a tempo event, then the messages with
delta times in ticks) in one atomic step, so a crash never leaves half a file.

Times come from the caller (``send(data, t)``, seconds on any clock, e.g. a reading's
``t``) or, when none is given, from ``time.monotonic``. The first message is at tick 0.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable
from pathlib import Path

from pydantic import Field

from bridge.errors import DeviceError
from bridge.outputs.midi import MidiSettings, MidiSink

log = logging.getLogger(__name__)


class MidiFileRecorder:
    """A port that records raw messages with their times and writes an SMF on close."""

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
        self._events: list[tuple[int, bytes]] = []
        self._given_times = False
        self.closed = False

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
        self._last_tick = tick
        self._events.append((tick, bytes(data)))

    @property
    def messages(self) -> int:
        return len(self._events)

    def close(self) -> None:
        """Write the file (atomically) once; later calls do nothing."""
        if self.closed:
            return
        self.closed = True
        import mido

        track = mido.MidiTrack()
        track.append(mido.MetaMessage("set_tempo", tempo=self.tempo, time=0))
        prev = 0
        for tick, data in self._events:
            track.append(mido.Message.from_bytes(data, time=tick - prev))
            prev = tick
        track.append(mido.MetaMessage("end_of_track", time=0))
        smf = mido.MidiFile(type=0, ticks_per_beat=self.ticks_per_beat)
        smf.tracks.append(track)
        _write_atomic(self.path, smf)
        log.info("MIDI file written: %s (%d messages)", self.path, len(self._events))


def _write_atomic(path: Path, smf: object) -> None:
    """Temporary file in the same folder, fsync, rename over the target, fsync the folder."""
    folder = path.parent if str(path.parent) else Path(".")
    tmp = folder / f".{path.name}.{os.getpid()}.tmp"
    try:
        with open(tmp, "wb") as f:
            smf.save(file=f)  # type: ignore[attr-defined]
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise DeviceError(f"cannot write MIDI file {path}: {exc}") from exc
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
