"""Byte sources over real transports: loop://, pseudo-terminals, TCP sockets, recordings.

No mocks: every serial test opens a real pyserial port on a real pty or socket, and
unplugs by really closing the far end. Waits are bounded loops on conditions, never fixed
sleeps, and nothing asserts on how fast anything ran.
"""

from __future__ import annotations

import json
import os
import socket
import threading
import time
from collections.abc import Callable
from pathlib import Path

import pydantic
import pytest

from bridge.errors import ConfigError
from bridge.recording import (
    RecordingHeader,
    RecordingSource,
    RecordingWriter,
    iter_chunks,
    read_header,
)
from bridge.sources import (
    Backoff,
    ByteSource,
    LinkState,
    PtyBoard,
    SerialSource,
    SocketBoard,
    SourceSettings,
    StateChange,
)

PERIOD = 0.005  # 200 frames/s from the simulated boards


class Counter:
    """A board that sends "1\\n", "2\\n", ...: lost, doubled or altered bytes show up."""

    def __init__(self) -> None:
        self.n = 0

    def __call__(self) -> bytes:
        self.n += 1
        return b"%d\n" % self.n


def pump(src: SerialSource, until: Callable[[], bool], timeout: float = 5.0) -> bytes:
    """Read until ``until()`` holds; fail (not hang) if it never does."""
    deadline = time.monotonic() + timeout
    buf = bytearray()
    while not until():
        if time.monotonic() > deadline:
            raise AssertionError(f"condition not reached; state {src.state}, {src.stats}")
        buf += src.read(0.02)
    return bytes(buf)


def wait_for(pred: Callable[[], bool], timeout: float = 5.0) -> None:
    done = threading.Event()
    deadline = time.monotonic() + timeout
    while not pred():
        assert time.monotonic() < deadline, "condition not reached"
        done.wait(0.005)


def whole_lines(data: bytes) -> list[int]:
    """The lines of a Counter stream as numbers; the first and last pieces may be torn by
    where a read started or stopped, so they are left out."""
    return [int(p) for p in data.split(b"\n")[1:-1]]


def read_until(src: SerialSource, needle: bytes, timeout: float = 5.0) -> bytes:
    """Read until ``needle`` has arrived; return everything read."""
    deadline = time.monotonic() + timeout
    buf = bytearray()
    while needle not in buf:
        assert time.monotonic() < deadline, f"{needle!r} never arrived; state {src.state}"
        buf += src.read(0.02)
    return bytes(buf)


def assert_consecutive(numbers: list[int]) -> None:
    assert len(numbers) >= 3
    assert numbers == list(range(numbers[0], numbers[0] + len(numbers)))


def fast(url: str, **kw: object) -> SourceSettings:
    base: dict[str, object] = {
        "url": url, "backoff_start_s": 0.02, "backoff_max_s": 0.1, "quiet_after_s": 2.0
    }
    base.update(kw)
    return SourceSettings.model_validate(base)


# -- settings ---------------------------------------------------------------------------------


def test_settings_reject_typos_zero_timeout_and_inverted_backoff() -> None:
    with pytest.raises(pydantic.ValidationError, match="baudrate"):
        SourceSettings.model_validate({"url": "loop://", "baudrate": 9600})
    # A zero read timeout turns every read into a busy poll (DOMAIN.md section 11,
    # pyserial issue-tracker lesson).
    with pytest.raises(pydantic.ValidationError):
        SourceSettings(url="loop://", read_timeout_s=0)
    with pytest.raises(pydantic.ValidationError, match="backoff_max_s"):
        SourceSettings(url="loop://", backoff_start_s=2, backoff_max_s=1)
    s = SourceSettings(url="/dev/serial/by-id/usb-x-if00")
    assert s.is_device_path and not SourceSettings(url="socket://h:1").is_device_path


def test_unknown_url_scheme_is_a_config_error_not_a_retry() -> None:
    src = SerialSource(SourceSettings(url="nosuchscheme://x"))
    with pytest.raises(ConfigError, match="nosuchscheme"):
        src.read(0.01)


# -- loop:// ----------------------------------------------------------------------------------


def test_loop_url_echoes_written_bytes() -> None:
    with SerialSource(SourceSettings(url="loop://")) as src:
        source: ByteSource = src
        assert source.read(0.01) == b""  # opens the port; nothing written yet
        assert src.generation == 1 and src.port is not None
        frame = b"5012 4987 5101\n"
        src.port.write(frame)
        got = pump(src, lambda: src.stats.bytes_in >= len(frame))
        assert got == frame
        assert src.state is LinkState.STREAMING
    assert src.state is LinkState.STOPPED and src.port is None


# -- pseudo-terminal board --------------------------------------------------------------------


def test_pty_board_streams_every_byte_value_unchanged(caplog: pytest.LogCaptureFixture) -> None:
    pattern = bytes(range(256))
    caplog.set_level("DEBUG", logger="bridge.sources")
    with PtyBoard(lambda: pattern, PERIOD) as board, SerialSource(fast(board.path)) as src:
        data = pump(src, lambda: src.stats.bytes_in >= 4 * len(pattern))
    # Raw mode passes CR, LF, NUL, ^C, ^D, DEL and 0xFF untouched: no CR/LF translation,
    # no echo, no signal characters (POSIX termios raw mode; from memory).
    assert pattern * 2 in data
    # ptys have no low-latency flag; the failure is logged at debug level, not raised.
    assert any("low-latency" in r.message for r in caplog.records)


def test_pty_board_counter_stream_has_no_gaps() -> None:
    counter = Counter()
    with PtyBoard(counter, PERIOD) as board, SerialSource(fast(board.path)) as src:
        data = pump(src, lambda: src.stats.bytes_in >= 60)
    assert_consecutive(whole_lines(data))
    assert b"\r" not in data


def test_pty_unplug_and_replug_through_stable_link(tmp_path: Path) -> None:
    link = tmp_path / "by-id-board"
    events: list[StateChange] = []
    board = PtyBoard(Counter(), PERIOD, link_path=link)
    with board, SerialSource(fast(str(link)), on_state=events.append) as src:
        pump(src, lambda: src.state is LinkState.STREAMING)
        assert src.generation == 1 and src.device == board.slave_path

        board.unplug()
        pump(src, lambda: src.state is LinkState.LOST)
        assert not os.path.lexists(link)  # the by-id link vanishes with the device
        pump(src, lambda: src.stats.open_failures >= 2)  # keeps trying while absent
        assert src.generation == 1

        board.replug()
        pump(src, lambda: src.state is LinkState.STREAMING)
        assert src.generation == 2 and src.stats.reconnects == 1
        assert src.device == os.path.realpath(link) == board.slave_path
        after = pump(src, lambda: src.stats.bytes_in > 200)
    assert_consecutive(whole_lines(after))
    assert [e.new for e in events] == [
        LinkState.STREAMING,
        LinkState.LOST,
        LinkState.CONNECTING,
        LinkState.STREAMING,
        LinkState.STOPPED,
    ]
    assert events[2].generation == 2


def test_link_repointed_to_another_device_is_noticed_while_quiet(tmp_path: Path) -> None:
    link = tmp_path / "by-id-board"
    old = PtyBoard(lambda: b"old\n", PERIOD, link_path=link)
    new = PtyBoard(lambda: b"new\n", PERIOD)
    with old, new, SerialSource(fast(str(link))) as src:
        pump(src, lambda: src.state is LinkState.STREAMING)
        old.pause()
        tmp = tmp_path / "tmp-link"
        os.symlink(new.path, tmp)
        os.replace(tmp, link)
        pump(src, lambda: src.generation == 2)
        assert b"new\n" in read_until(src, b"new\n")
        assert src.device == new.path and src.stats.vanished == 1


def test_paused_board_is_quiet_not_lost() -> None:
    events: list[StateChange] = []
    board = PtyBoard(Counter(), PERIOD)
    with board, SerialSource(fast(board.path, quiet_after_s=0.1), on_state=events.append) as src:
        pump(src, lambda: src.state is LinkState.STREAMING)
        board.pause()
        pump(src, lambda: src.state is LinkState.QUIET)
        # Empty reads with a timeout are a quiet sensor, not an unplug (DOMAIN.md section 11).
        assert [src.read(0.02) for _ in range(3)] == [b"", b"", b""]
        assert src.state is LinkState.QUIET and src.generation == 1
        board.resume()
        pump(src, lambda: src.state is LinkState.STREAMING)
    states = [e.new for e in events]
    assert LinkState.LOST not in states
    assert states == [LinkState.STREAMING, LinkState.QUIET, LinkState.STREAMING, LinkState.STOPPED]
    assert src.stats.quiet_spells == 1 and src.stats.read_errors == 0


def test_quiet_by_frames_ignores_garbage_bytes() -> None:
    board = PtyBoard(lambda: b"\xfe\xfd", PERIOD)  # bytes, but never a valid frame
    with board, SerialSource(fast(board.path, quiet_after_s=0.1), quiet_by="frames") as src:
        pump(src, lambda: src.state is LinkState.QUIET)
        assert src.stats.bytes_in > 0  # data was flowing all along
        src.note_frame()
        assert src.state is LinkState.STREAMING


# -- socket:// --------------------------------------------------------------------------------


def test_socket_board_stopped_and_restarted_on_same_port() -> None:
    events: list[StateChange] = []
    board = SocketBoard(Counter(), PERIOD)
    with board:
        url = board.url
        with SerialSource(fast(url), on_state=events.append) as src:
            first = pump(src, lambda: src.stats.bytes_in > 60)
            assert_consecutive(whole_lines(first))
            board.unplug()
            pump(src, lambda: src.state is LinkState.LOST)
            pump(src, lambda: src.stats.open_failures >= 1)  # connection refused meanwhile
            board.replug()
            assert board.url == url
            pump(src, lambda: src.state is LinkState.STREAMING and src.generation == 2)
            before = src.stats.bytes_in
            again = pump(src, lambda: src.stats.bytes_in > before + 60)
    assert_consecutive(whole_lines(again))
    assert [e.new for e in events][:4] == [
        LinkState.STREAMING, LinkState.LOST, LinkState.CONNECTING, LinkState.STREAMING
    ]


def test_bytes_sent_just_before_a_disconnect_are_delivered() -> None:
    with socket.create_server(("127.0.0.1", 0)) as server:
        url = f"socket://127.0.0.1:{server.getsockname()[1]}"
        with SerialSource(fast(url)) as src:
            assert src.read(0.01) == b""  # connected (the kernel accepted it), no data yet
            conn, _ = server.accept()
            conn.sendall(b"5012 4987\n")
            conn.close()  # the board goes away right after its last frame
            assert read_until(src, b"\n") == b"5012 4987\n"
            pump(src, lambda: src.state is LinkState.LOST)
            assert src.stats.read_errors == 1


# -- back-off and interruption ----------------------------------------------------------------


def test_backoff_doubles_to_its_cap_and_resets() -> None:
    b = Backoff(0.25, 5.0)
    # Doubling with a cap: common practice for reconnect loops.
    assert [b.next() for _ in range(7)] == [0.25, 0.5, 1.0, 2.0, 4.0, 5.0, 5.0]
    b.reset()
    assert b.next() == 0.25


def test_absent_device_retries_with_growing_delays(tmp_path: Path) -> None:
    events: list[StateChange] = []
    settings = SourceSettings(url=str(tmp_path / "no-board"), backoff_start_s=0.01,
                              backoff_max_s=0.04)
    with SerialSource(settings, on_state=events.append) as src:
        pump(src, lambda: src.stats.open_failures >= 5)
        assert list(src.backoff.history)[:5] == [0.01, 0.02, 0.04, 0.04, 0.04]
        assert src.state is LinkState.LOST and src.generation == 0
    # One warning-worthy transition, not one per attempt.
    assert [e.new for e in events] == [LinkState.LOST, LinkState.STOPPED]


def _reader(src: SerialSource, max_wait: float) -> threading.Thread:
    t = threading.Thread(target=lambda: [src.read(max_wait) for _ in iter(
        lambda: src.state is LinkState.STOPPED, True)], daemon=True)
    t.start()
    return t


def test_interrupt_ends_a_long_backoff_wait(tmp_path: Path) -> None:
    lost = threading.Event()
    settings = SourceSettings(url=str(tmp_path / "no-board"), backoff_start_s=30,
                              backoff_max_s=30)
    src = SerialSource(settings, on_state=lambda ch: lost.set())
    t = _reader(src, max_wait=120)
    assert lost.wait(5)  # first open failed; now waiting 30 s before the next
    src.interrupt()
    t.join(timeout=5)
    assert not t.is_alive()
    assert src.state is LinkState.STOPPED and src.stats.open_failures == 1


def test_interrupt_wakes_a_blocked_serial_read() -> None:
    board = PtyBoard(Counter(), PERIOD)
    board.pause()  # nothing arrives: the read blocks for its full 10 s timeout
    with board:
        src = SerialSource(fast(board.path, read_timeout_s=10, quiet_after_s=100))
        t = _reader(src, max_wait=60)
        wait_for(lambda: src.generation == 1)
        src.interrupt()
        t.join(timeout=5)
        assert not t.is_alive()
        assert src.state is LinkState.STOPPED and src.port is None


# -- recordings -------------------------------------------------------------------------------


def _header() -> RecordingHeader:
    return RecordingHeader(channels=["pitch", "volume"], kinds=["count", "count"],
                           board="test rig, text frames", frame_format="text")


CHUNKS = [(50.0, b"5012 49"), (50.010, b"87\n5011 4988\n"), (50.25, bytes(range(256))),
          (51.0, b"\r\n\x00")]


def _write(path: Path, chunks: list[tuple[float, bytes]] = CHUNKS) -> None:
    with RecordingWriter(path, _header()) as rec:
        for t, data in chunks:
            rec.write(t, data)


def test_recording_round_trip_and_documented_line_format(tmp_path: Path) -> None:
    path = tmp_path / "take1.fbraw"
    _write(path)
    lines = path.read_text(encoding="ascii").splitlines()
    head = json.loads(lines[0])
    assert head["format"] == "fieldbridge-raw" and head["version"] == 1
    assert lines[1] == "0.000000 " + b"5012 49".hex()
    assert lines[2].startswith("0.010000 ")
    assert read_header(path) == RecordingHeader.model_validate(head)
    assert read_header(path).channels == ["pitch", "volume"]

    got = list(iter_chunks(path))
    assert [d for _, d in got] == [d for _, d in CHUNKS]
    assert [t for t, _ in got] == pytest.approx([t - 50.0 for t, _ in CHUNKS], abs=1e-6)


def test_recording_refuses_to_overwrite(tmp_path: Path) -> None:
    path = tmp_path / "take1.fbraw"
    _write(path)
    with pytest.raises(ConfigError, match="exists"):
        _write(path)
    with RecordingWriter(path, _header(), overwrite=True) as rec:
        rec.write(0.0, b"x")
    assert [d for _, d in iter_chunks(path)] == [b"x"]


def test_recording_flushes_about_once_a_second(tmp_path: Path) -> None:
    path = tmp_path / "take.fbraw"

    def on_disk() -> int:
        return len(path.read_text(encoding="ascii").splitlines())

    with RecordingWriter(path, _header(), t0=0.0) as rec:
        assert on_disk() == 1  # the header is out at once
        rec.write(0.2, b"a")
        rec.write(0.5, b"b")
        assert on_disk() == 1  # buffered: an SD card is not written per chunk
        rec.write(1.0, b"c")
        assert on_disk() == 4
    assert on_disk() == 4


class FakeClock:
    """A clock that only moves when the source waits: pacing without wall time."""

    def __init__(self, t: float = 1000.0) -> None:
        self.t = t
        self.waits: list[float] = []

    def __call__(self) -> float:
        return self.t

    def wait(self, seconds: float) -> bool:
        self.waits.append(seconds)
        self.t += seconds
        return False


@pytest.mark.parametrize("speed", [1.0, 2.0])
def test_realtime_replay_follows_the_timestamps(tmp_path: Path, speed: float) -> None:
    path = tmp_path / "take.fbraw"
    _write(path)
    clock = FakeClock()
    returned: list[tuple[float, bytes]] = []
    with RecordingSource(path, realtime=True, speed=speed, clock=clock, wait=clock.wait) as src:
        while not src.finished:
            data = src.read(0.1)
            if data:
                returned.append((clock.t, data))
        assert src.state is LinkState.STOPPED  # the end of the take, before close()
    start = returned[0][0]
    assert [t - start for t, _ in returned] == pytest.approx(
        [(t - 50.0) / speed for t, _ in CHUNKS], abs=1e-9)
    assert [d for _, d in returned] == [d for _, d in CHUNKS]
    assert max(clock.waits) <= 0.1 + 1e-12  # no read waits longer than asked


def test_fast_replay_does_not_wait(tmp_path: Path) -> None:
    path = tmp_path / "take.fbraw"
    _write(path)
    clock = FakeClock()
    with RecordingSource(path, realtime=False, clock=clock, wait=clock.wait) as src:
        out = [src.read(0.1) for _ in range(len(CHUNKS))]
        assert src.read(0.1) == b"" and src.finished
    assert out == [d for _, d in CHUNKS] and clock.waits == []


def test_looped_replay_counts_generations(tmp_path: Path) -> None:
    path = tmp_path / "take.fbraw"
    _write(path)
    with RecordingSource(path, realtime=False, loop=True) as src:
        source: ByteSource = src  # a recording stands in wherever a serial link does
        out = [source.read() for _ in range(2 * len(CHUNKS) + 1)]
        assert src.generation == 3 and not src.finished
    assert out == [d for _, d in CHUNKS] * 2 + [CHUNKS[0][1]]


def test_torn_last_line_is_skipped(tmp_path: Path) -> None:
    path = tmp_path / "take.fbraw"
    _write(path)
    with open(path, "a", encoding="ascii") as fh:
        fh.write("1.5 abc")  # odd hex digits: a crash tore the line
    with RecordingSource(path, realtime=False) as src:
        out = [src.read() for _ in range(len(CHUNKS) + 1)]
        assert src.finished and src.stats.bad_lines == 1
    assert out[:-1] == [d for _, d in CHUNKS] and out[-1] == b""


@pytest.mark.parametrize(
    ("first_line", "message"),
    [("hello", "not JSON"), ('{"format": "other"}', "not a recording"),
     ('{"format": "fieldbridge-raw", "version": 99}', "newer")],
)
def test_bad_headers_are_named(tmp_path: Path, first_line: str, message: str) -> None:
    path = tmp_path / "x.fbraw"
    path.write_text(first_line + "\n0.0 00\n", encoding="ascii")
    with pytest.raises(ConfigError, match=message):
        RecordingSource(path).read()


def test_interrupt_ends_a_realtime_wait(tmp_path: Path) -> None:
    path = tmp_path / "take.fbraw"
    _write(path, [(0.0, b"a"), (100.0, b"b")])
    src = RecordingSource(path, realtime=True)
    assert src.read() == b"a"
    result: list[bytes] = []
    t = threading.Thread(target=lambda: result.append(src.read(200)), daemon=True)
    t.start()
    src.interrupt()
    t.join(timeout=5)
    assert not t.is_alive() and result == [b""]
    src.close()


def test_live_pty_recording_replays_identical_bytes(tmp_path: Path) -> None:
    path = tmp_path / "live.fbraw"
    live = bytearray()
    with PtyBoard(Counter(), PERIOD) as board, SerialSource(fast(board.path)) as src, \
            RecordingWriter(path, _header()) as rec:
        while len(live) < 300:
            data = src.read(0.05)
            if data:
                rec.write(time.monotonic(), data)
                live += data
    replayed = b"".join(d for _, d in iter_chunks(path))
    assert replayed == bytes(live)
    assert_consecutive(whole_lines(replayed))
