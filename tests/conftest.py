"""Shared fixtures: a fitted demo calibration, an in-memory MIDI port, an OSC listener on a
real UDP socket, simulated boards on real transports, and a daemon running in a thread.

The in-memory port (:class:`RecordingPort`) is the "in-memory sink" of the style guide: it
implements the ``RawPort`` interface of ``bridge/outputs/midi.py`` (``name``, ``send(data)``,
``close()``) and keeps every message with the time it arrived, for logic tests. Real MIDI
peers (a JACK server with a dump client) are exercised in tests/e2e/test_jack_midi.py.

Waiting is always on a condition with a timeout (``wait_for`` / ``wait_until``), never a
fixed sleep, and no helper measures how fast anything ran.
"""

from __future__ import annotations

import shutil
import socket
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from bridge.daemon import Counters, Daemon, Loader, Setup
from bridge.demo import demo_board_settings, demo_calibration, demo_channels
from bridge.errors import DeviceError
from bridge.frames import FrameSettings
from bridge.mapping import PitchSettings
from bridge.outputs import Sink
from bridge.pipeline import ChannelSettings, VoiceSettings
from bridge.sim import Performance, SimBoard, SimSettings
from bridge.soundcheck import RigCalibration
from bridge.sources import PtyBoard, SocketBoard, SourceSettings

# MIDI 1.0 Detailed Specification: status high nibbles used by the helpers below.
NOTE_OFF, NOTE_ON, CONTROL_CHANGE, PITCH_BEND = 0x8, 0x9, 0xB, 0xE


def wait_until(pred: Callable[[], bool], timeout: float, what: str) -> None:
    """Wait (on an Event, in short steps) until ``pred()`` holds; fail with ``what`` if not."""
    deadline = time.monotonic() + timeout
    step = threading.Event()
    while not pred():
        if time.monotonic() >= deadline:
            raise AssertionError(f"timed out after {timeout:g} s waiting for: {what}")
        step.wait(0.01)


# ---------------------------------------------------------------------- demo calibration


@dataclass(frozen=True)
class DemoCal:
    """The demo board's settings, its channel list and the calibration fitted on it."""

    sim: SimSettings
    channels: list[ChannelSettings]
    calibration: RigCalibration


@pytest.fixture(scope="session")
def demo_cal() -> DemoCal:
    """One simulated soundcheck, fitted once per session (as ``fieldbridge demo`` does)."""
    s = demo_board_settings()
    channels = demo_channels(s)
    return DemoCal(s, channels, demo_calibration(s, channels))


# ---------------------------------------------------------------------- in-memory MIDI port


@dataclass(frozen=True)
class MidiEvent:
    """A note message as seen by a receiver: note-on with velocity 0 counts as note-off
    (MIDI 1.0 Detailed Specification, "note on with velocity 0")."""

    index: int
    on: bool
    channel: int
    note: int
    velocity: int


class RecordingPort:
    """A RawPort that keeps every message with the time (time.monotonic) it arrived.

    ``mark(label)`` remembers how many messages had arrived at that moment, so a test can
    look at exactly what came after an event (an unplug, a profile switch). Sending after
    :meth:`close` raises like a closed real port would.
    """

    def __init__(self, name: str = "recording") -> None:
        self.name = name
        self.messages: list[tuple[float, bytes]] = []
        self.marks: dict[str, int] = {}
        self.closed = False
        self.close_calls = 0
        self._cond = threading.Condition()

    # -- RawPort -----------------------------------------------------------------------

    def send(self, data: bytes) -> None:
        if self.closed:
            raise DeviceError(f"port {self.name} is closed")
        with self._cond:
            self.messages.append((time.monotonic(), bytes(data)))
            self._cond.notify_all()

    def close(self) -> None:
        with self._cond:
            self.closed = True
            self.close_calls += 1
            self._cond.notify_all()

    # -- for tests ---------------------------------------------------------------------

    def mark(self, label: str) -> int:
        with self._cond:
            self.marks[label] = len(self.messages)
            return self.marks[label]

    def snapshot(self) -> list[bytes]:
        with self._cond:
            return [m for _t, m in self.messages]

    def since(self, label: str) -> list[bytes]:
        with self._cond:
            return [m for _t, m in self.messages[self.marks[label] :]]

    def wait_for(self, pred: Callable[[list[bytes]], bool], timeout: float, what: str) -> None:
        """Block until ``pred(all messages so far)`` holds, or fail after ``timeout``."""
        with self._cond:
            ok = self._cond.wait_for(lambda: pred([m for _t, m in self.messages]), timeout)
        if not ok:
            raise AssertionError(f"timed out after {timeout:g} s waiting for MIDI: {what}")

    @staticmethod
    def notes(msgs: Sequence[bytes]) -> list[MidiEvent]:
        out = []
        for i, m in enumerate(msgs):
            kind = m[0] >> 4
            if kind == NOTE_ON and len(m) == 3:
                out.append(MidiEvent(i, m[2] > 0, m[0] & 0x0F, m[1], m[2]))
            elif kind == NOTE_OFF and len(m) == 3:
                out.append(MidiEvent(i, False, m[0] & 0x0F, m[1], m[2]))
        return out

    @classmethod
    def sounding(cls, msgs: Sequence[bytes]) -> dict[tuple[int, int], int]:
        """(channel, note) -> how many note-ons are still unmatched after ``msgs``."""
        held: dict[tuple[int, int], int] = {}
        for m in msgs:
            if m[0] >> 4 == CONTROL_CHANGE and len(m) == 3 and m[1] in (120, 123):
                # All Sound Off / All Notes Off end every note on the channel
                # (MIDI 1.0 Detailed Specification, channel mode messages)
                held = {k: n for k, n in held.items() if k[0] != m[0] & 0x0F}
                continue
            notes = cls.notes([m])
            if not notes:
                continue
            e = notes[0]
            key = (e.channel, e.note)
            if e.on:
                held[key] = held.get(key, 0) + 1
            elif held.get(key):
                held[key] -= 1
                if not held[key]:
                    del held[key]
        return held

    @staticmethod
    def controller(msgs: Sequence[bytes], number: int) -> list[int]:
        return [m[2] for m in msgs if m[0] >> 4 == CONTROL_CHANGE and m[1] == number]

    @staticmethod
    def bends(msgs: Sequence[bytes]) -> list[int]:
        return [m[1] | (m[2] << 7) for m in msgs if m[0] >> 4 == PITCH_BEND]


@pytest.fixture
def recording_port() -> RecordingPort:
    return RecordingPort()


# ---------------------------------------------------------------------- OSC on real UDP


@dataclass(frozen=True)
class OscReceived:
    t: float
    address: str
    args: tuple[Any, ...]


class OscListener:
    """A UDP socket on 127.0.0.1 and a thread that parses what arrives with python-osc
    (an independent OSC 1.0 implementation), bundles unpacked into their messages."""

    def __init__(self) -> None:
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.settimeout(0.05)
        self.port = self.sock.getsockname()[1]
        self.received: list[OscReceived] = []
        self.errors: list[str] = []
        self._cond = threading.Condition()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="osc-listener", daemon=True)
        self._thread.start()

    @property
    def destination(self) -> str:
        return f"127.0.0.1:{self.port}"

    def _run(self) -> None:
        from pythonosc.osc_bundle import OscBundle
        from pythonosc.osc_message import OscMessage

        while not self._stop.is_set():
            try:
                data = self.sock.recv(65536)
            except socket.timeout:
                continue
            except OSError:
                return
            now = time.monotonic()
            try:
                if OscBundle.dgram_is_bundle(data):
                    msgs = list(_flatten(OscBundle(data)))
                else:
                    msgs = [OscMessage(data)]
            except Exception as exc:  # a malformed datagram is recorded, not fatal here
                self.errors.append(repr(exc))
                continue
            with self._cond:
                for m in msgs:
                    self.received.append(OscReceived(now, m.address, tuple(m.params)))
                self._cond.notify_all()

    def count(self) -> int:
        with self._cond:
            return len(self.received)

    def values(self, address: str, start: int = 0) -> list[Any]:
        with self._cond:
            return [r.args[0] for r in self.received[start:] if r.address == address]

    def wait_for(
        self, pred: Callable[[list[OscReceived]], bool], timeout: float, what: str
    ) -> None:
        with self._cond:
            ok = self._cond.wait_for(lambda: pred(self.received), timeout)
        if not ok:
            raise AssertionError(f"timed out after {timeout:g} s waiting for OSC: {what}")

    def close(self) -> None:
        self._stop.set()
        self._thread.join(timeout=2.0)
        self.sock.close()


def _flatten(bundle: Any) -> Iterator[Any]:
    from pythonosc.osc_bundle import OscBundle

    for item in bundle:
        if isinstance(item, OscBundle):
            yield from _flatten(item)
        else:
            yield item


@pytest.fixture
def osc_listener() -> Iterator[OscListener]:
    listener = OscListener()
    yield listener
    listener.close()


# ---------------------------------------------------------------------- boards and setups


def held_performance(
    seed: int = 3, *, pitch: float = 0.15, volume: float = 0.3, rest_s: float = 0.5
) -> Performance:
    """Hands away for ``rest_s``, then both hands move in and stay (a held note)."""
    p = Performance(seed, tremor_m=0.0003).silence(rest_s)
    return p.glide(0.4, pitch=pitch, volume=volume).hold(3600.0)


@pytest.fixture
def short_dir() -> Iterator[Path]:
    """A private folder with a short path (Unix socket paths are limited to ~107 bytes)."""
    d = Path(tempfile.mkdtemp(prefix="fbt-", dir="/tmp"))
    yield d
    shutil.rmtree(d, ignore_errors=True)


@dataclass
class Boards:
    """Starts simulated boards on real transports; stops every one at teardown."""

    folder: Path
    started: list[PtyBoard | SocketBoard] = field(default_factory=list)

    def _bytes(
        self, sim: SimSettings, perf: Performance, seed: int, frames_per_write: int
    ) -> Callable[[], bytes]:
        board = SimBoard(sim.model_copy(update={"seed": seed}), perf)
        if frames_per_write == 1:
            return board.next_bytes
        return lambda: b"".join(board.next_bytes() for _ in range(frames_per_write))

    def pty(
        self,
        sim: SimSettings,
        perf: Performance,
        *,
        seed: int = 8,
        frames_per_write: int = 1,
        link: bool = True,
    ) -> PtyBoard:
        """A board on a pseudo-terminal, reached through a stable link path when ``link``."""
        link_path = self.folder / f"board{len(self.started)}" if link else None
        b = PtyBoard(
            self._bytes(sim, perf, seed, frames_per_write),
            sim.window_s * frames_per_write,
            link_path=link_path,
        )
        b.start()
        self.started.append(b)
        return b

    def tcp(self, sim: SimSettings, perf: Performance, *, seed: int = 8) -> SocketBoard:
        """A board behind a TCP server on 127.0.0.1 (for a socket:// URL)."""
        b = SocketBoard(self._bytes(sim, perf, seed, 1), sim.window_s)
        b.start()
        self.started.append(b)
        return b

    def stop_all(self) -> None:
        for b in self.started:
            b.stop()


@pytest.fixture
def boards(short_dir: Path) -> Iterator[Boards]:
    b = Boards(short_dir)
    yield b
    b.stop_all()


def make_setup(
    cal: DemoCal,
    url: str,
    *,
    profile: str = "tin-lantern",
    lowest_note: float = 48.0,
    quiet_after_s: float = 0.5,
    sound_without_hand: bool = False,
) -> Setup:
    """A Setup for the demo rig (pitch, volume, reference; period boards, text frames with
    sequence numbers) reading from ``url``."""
    voice = VoiceSettings(
        name="lead",
        pitch_channel="pitch",
        volume_channel="volume",
        pitch=PitchSettings(lowest_note=lowest_note, span_semitones=36.0),
        sound_without_hand=sound_without_hand,
    )
    return Setup(
        channels=list(cal.channels),
        voices=[voice],
        frames=FrameSettings(format=cal.sim.format, leading_seq=cal.sim.text_seq),
        source=SourceSettings(url=url, quiet_after_s=quiet_after_s, backoff_start_s=0.1,
                              backoff_max_s=0.5),
        rate_hz=1.0 / cal.sim.window_s,
        calibration=cal.calibration,
        profile=profile,
    )


@pytest.fixture
def setup_for(demo_cal: DemoCal) -> Callable[..., Setup]:
    """``setup_for(url, **options)``: a demo-rig Setup reading from ``url``."""
    return lambda url, **kw: make_setup(demo_cal, url, **kw)


# ---------------------------------------------------------------------- daemon in a thread


class RunningDaemon:
    """A Daemon whose ``run()`` executes in a background thread."""

    def __init__(self, daemon: Daemon) -> None:
        self.daemon = daemon
        self.counters: Counters | None = None
        self.error: BaseException | None = None
        self.done = threading.Event()
        self.thread = threading.Thread(target=self._run, name="daemon-under-test", daemon=True)

    def _run(self) -> None:
        try:
            self.counters = self.daemon.run()
        except BaseException as exc:  # reported by stop(), so a crash fails the test
            self.error = exc
        finally:
            self.done.set()

    def start(self) -> RunningDaemon:
        self.thread.start()
        return self

    def wait_frames(self, n: int, timeout: float = 10.0) -> int:
        """Wait until ``n`` more frames than now have been processed; return the count."""
        target = self.daemon.counters.frames + n
        wait_until(lambda: self.daemon.counters.frames >= target or self.done.is_set(),
                   timeout, f"{n} more frames")
        assert not self.done.is_set(), f"daemon ended early: {self.error!r}"
        return self.daemon.counters.frames

    def stop(self, timeout: float = 5.0) -> Counters:
        if not self.done.is_set():
            self.daemon.request_stop()
        finished = self.done.wait(timeout)
        assert finished, "the daemon did not stop"
        if self.error is not None:
            raise AssertionError(f"daemon run() raised {self.error!r}") from self.error
        assert self.counters is not None
        return self.counters


@pytest.fixture
def run_daemon(monkeypatch: pytest.MonkeyPatch) -> Iterator[Callable[..., RunningDaemon]]:
    """``run_daemon(setup, sinks, loader=None, control_path=None)`` starts a daemon thread;
    every one still running is stopped at teardown (outputs silenced, source closed).
    The daemon never talks to a real service manager, even when the tests run under one."""
    monkeypatch.delenv("NOTIFY_SOCKET", raising=False)
    monkeypatch.delenv("WATCHDOG_USEC", raising=False)
    running: list[RunningDaemon] = []

    def start(
        setup: Setup,
        sinks: Sequence[Sink],
        *,
        loader: Loader | None = None,
        control_path: Path | None = None,
        run_for_s: float = 60.0,
    ) -> RunningDaemon:
        d = Daemon(setup, sinks, loader=loader, control_path=control_path, run_for_s=run_for_s)
        r = RunningDaemon(d).start()
        running.append(r)
        return r

    yield start
    for r in running:
        if not r.done.is_set():
            r.daemon.request_stop()
            r.done.wait(5.0)



@pytest.fixture
def held() -> Callable[..., Performance]:
    """``held(seed, pitch=, volume=, rest_s=)``: hands away, then a note held for an hour."""
    return held_performance


@pytest.fixture
def until() -> Callable[[Callable[[], bool], float, str], None]:
    """``until(pred, timeout, what)``: wait for a condition or fail naming it."""
    return wait_until
