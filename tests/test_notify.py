"""bridge/notify.py against real datagram sockets standing in for the service manager.

Each test binds a Unix datagram socket (a file in a temporary folder, or a name in
Linux's abstract namespace), points ``NOTIFY_SOCKET`` at it and asserts the exact
datagrams that arrive. The message syntax is the sd_notify(3) protocol; where the
reference client ``systemd-notify`` is installed, its datagrams for the same requests are
compared byte for byte with ours.
"""

from __future__ import annotations

import io
import logging
import os
import re
import socket
import subprocess
import sys
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from bridge.notify import (
    Notifier,
    RepeatFilter,
    configure_logging,
    running_under_journal,
    watchdog_interval,
)

from e2e.peers import require as need  # path, or skip (fail with FIELDBRIDGE_REQUIRE_PEERS=1)


pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="Linux sockets")

RECV_TIMEOUT_S = 3.0


class FakeClock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


@pytest.fixture
def listener(tmp_path: Path) -> Iterator[tuple[socket.socket, str]]:
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    path = str(tmp_path / "notify")
    sock.bind(path)
    sock.settimeout(RECV_TIMEOUT_S)
    yield sock, path
    sock.close()


def recv(sock: socket.socket) -> bytes:
    return sock.recv(4096)


def assert_nothing_waiting(sock: socket.socket) -> None:
    sock.setblocking(False)
    try:
        with pytest.raises(BlockingIOError):
            sock.recv(4096)
    finally:
        sock.settimeout(RECV_TIMEOUT_S)


# ---------------------------------------------------------------- no manager


def test_without_notify_socket_every_call_is_a_quiet_no_op() -> None:
    n = Notifier.from_env({"WATCHDOG_USEC": "5000000"})
    assert not n.enabled
    assert n.ready("x") is False
    assert n.status("x") is False
    assert n.watchdog() is False
    assert n.reloading() is False
    assert n.stopping() is False
    n.close()
    n.close()


def test_unsupported_address_scheme_disables_notifications() -> None:
    n = Notifier("vsock:2:1234")
    assert not n.enabled
    assert n.ready() is False


def test_a_vanished_manager_is_logged_not_raised(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    n = Notifier(str(tmp_path / "nobody-listens-here"))
    with caplog.at_level(logging.DEBUG, logger="bridge.notify"):
        assert n.ready() is False
    assert any("not sent" in r.getMessage() for r in caplog.records)
    n.close()


# ---------------------------------------------------------------- exact datagrams


def test_datagrams_follow_the_sd_notify_syntax(listener: tuple[socket.socket, str]) -> None:
    sock, path = listener
    with Notifier.from_env({"NOTIFY_SOCKET": path}) as n:
        assert n.enabled
        # sd_notify(3): newline-separated KEY=VALUE assignments in one datagram.
        assert n.ready()
        assert recv(sock) == b"READY=1"
        assert n.ready("venue harbour-hall, 2 channels")
        assert recv(sock) == b"READY=1\nSTATUS=venue harbour-hall, 2 channels"
        assert n.status("waiting for board\nsecond line")
        # A newline inside STATUS would start a new assignment; it is folded to a space.
        assert recv(sock) == b"STATUS=waiting for board second line"
        assert n.stopping()
        assert recv(sock) == b"STOPPING=1"
    assert_nothing_waiting(sock)


def test_reloading_carries_the_monotonic_clock(listener: tuple[socket.socket, str]) -> None:
    sock, path = listener
    n = Notifier(path)
    before = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
    assert n.reloading()
    after = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
    lines = recv(sock).split(b"\n")
    assert lines[0] == b"RELOADING=1"
    m = re.fullmatch(rb"MONOTONIC_USEC=(\d+)", lines[1])
    assert m is not None and len(lines) == 2
    assert before <= int(m.group(1)) <= after  # sd_notify(3): CLOCK_MONOTONIC in microseconds
    n.close()


def test_abstract_namespace_address() -> None:
    name = f"fieldbridge-test-{uuid.uuid4().hex}"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(b"\0" + name.encode())  # Linux unix(7): abstract names start with a NUL byte
    sock.settimeout(RECV_TIMEOUT_S)
    try:
        n = Notifier.from_env({"NOTIFY_SOCKET": "@" + name})  # sd_notify(3): '@' means abstract
        assert n.ready()
        assert recv(sock) == b"READY=1"
        n.close()
    finally:
        sock.close()


def test_the_socket_reopens_after_close(listener: tuple[socket.socket, str]) -> None:
    sock, path = listener
    n = Notifier(path)
    assert n.status("one")
    n.close()
    assert n.status("two")
    assert [recv(sock), recv(sock)] == [b"STATUS=one", b"STATUS=two"]
    n.close()


@pytest.mark.peer
@pytest.mark.parametrize(
    ("args", "ours"),
    [
        (["--ready"], lambda n: n.ready()),
        (["--ready", "--status=calibrated"], lambda n: n.ready("calibrated")),
        (["--status=waiting for board"], lambda n: n.status("waiting for board")),
        (["WATCHDOG=1"], lambda n: n.watchdog(force=True)),
        (["STOPPING=1"], lambda n: n.stopping()),
    ],
)
def test_same_bytes_as_the_reference_client(
    listener: tuple[socket.socket, str], args: list[str], ours: object
) -> None:
    tool = need("systemd-notify")
    sock, path = listener
    # --no-block: do not wait for a barrier reply that our stand-in socket never sends.
    subprocess.run(
        [tool, "--no-block", *args],
        env={**os.environ, "NOTIFY_SOCKET": path},
        check=True,
        timeout=10,
    )
    reference = recv(sock)
    n = Notifier(path, watchdog_s=5.0)
    assert callable(ours) and ours(n)
    assert recv(sock) == reference  # reference: the sd_notify client shipped with the manager
    n.close()


# ---------------------------------------------------------------- watchdog


def test_watchdog_interval_reads_usec_and_honours_the_pid() -> None:
    # sd_watchdog_enabled(3): WATCHDOG_USEC in microseconds; WATCHDOG_PID names the pinger.
    assert watchdog_interval({"WATCHDOG_USEC": "5000000"}) == 5.0
    assert watchdog_interval({"WATCHDOG_USEC": "2500000", "WATCHDOG_PID": str(os.getpid())}) == 2.5
    assert watchdog_interval({"WATCHDOG_USEC": "5000000", "WATCHDOG_PID": str(os.getpid() + 1)}) is None
    assert watchdog_interval({}) is None
    assert watchdog_interval({"WATCHDOG_USEC": "0"}) is None
    assert watchdog_interval({"WATCHDOG_USEC": "soon"}) is None


def test_watchdog_pings_at_most_every_half_timeout(listener: tuple[socket.socket, str]) -> None:
    sock, path = listener
    clock = FakeClock()
    n = Notifier.from_env({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "5000000"}, clock=clock)
    assert n.watchdog_s == 5.0
    sent = []
    # sd_watchdog_enabled(3) recommends pinging at half the timeout: here every 2.5 s.
    for t in (0.0, 1.0, 2.49, 2.5, 3.0, 4.99, 5.0, 20.0):
        clock.now = 100.0 + t
        sent.append(n.watchdog())
    assert sent == [True, False, False, True, False, False, True, True]
    assert [recv(sock) for _ in range(4)] == [b"WATCHDOG=1"] * 4
    assert_nothing_waiting(sock)
    n.close()


def test_no_watchdog_pings_when_the_manager_is_not_watching(
    listener: tuple[socket.socket, str],
) -> None:
    sock, path = listener
    n = Notifier.from_env({"NOTIFY_SOCKET": path})
    assert n.watchdog() is False
    assert n.ready()
    assert recv(sock) == b"READY=1"  # the first datagram to arrive is READY, no ping before it
    n.close()


# ---------------------------------------------------------------- logging


@pytest.fixture
def clean_root_logger() -> Iterator[None]:
    root = logging.getLogger()
    handlers, level = root.handlers[:], root.level
    yield
    for h in root.handlers[:]:
        if h not in handlers:
            root.removeHandler(h)
    root.setLevel(level)


def _record(msg: str, *args: object, level: int = logging.WARNING, **extra: object) -> logging.LogRecord:
    rec = logging.LogRecord("bridge.sources", level, __file__, 1, msg, args, None)
    rec.__dict__.update(extra)
    return rec


def test_repeat_filter_holds_back_identical_warnings_and_counts_them() -> None:
    clock = FakeClock()
    f = RepeatFilter(10.0, clock=clock)
    assert f.filter(_record("board lost on %s", "/dev/ttyACM0"))
    for t in (1.0, 2.0, 9.99):
        clock.now = 100.0 + t
        # Same template, other argument: still the same warning.
        assert not f.filter(_record("board lost on %s", "/dev/ttyACM1"))
    clock.now = 110.0
    rec = _record("board lost on %s", "/dev/ttyACM0")
    assert f.filter(rec)
    assert rec.getMessage() == (
        "board lost on /dev/ttyACM0 (repeated 3 more times in the last 10 s, not shown)"
    )
    clock.now = 111.0
    assert not f.filter(_record("board lost on %s", "x"))
    clock.now = 120.0
    rec = _record("board lost on %s", "y")
    assert f.filter(rec)
    assert rec.getMessage() == "board lost on y (repeated 1 more time in the last 10 s, not shown)"


def test_repeat_filter_passes_other_messages_levels_and_keys() -> None:
    clock = FakeClock()
    f = RepeatFilter(10.0, clock=clock)
    assert f.filter(_record("a"))
    assert f.filter(_record("b"))
    assert f.filter(_record("a", level=logging.ERROR))  # another level is another key
    assert f.filter(_record("a", level=logging.INFO))  # below WARNING: never held back
    assert f.filter(_record("a", level=logging.INFO))
    assert not f.filter(_record("a"))
    assert f.filter(_record("a", repeat_key="port 1"))
    assert not f.filter(_record("a", repeat_key="port 1"))
    assert f.filter(_record("a", repeat_key="port 2"))


def test_repeat_filter_memory_is_bounded() -> None:
    clock = FakeClock()
    f = RepeatFilter(10.0, clock=clock, max_keys=8)
    for i in range(100):
        assert f.filter(_record(f"message {i}"))
    assert len(f._seen) <= 8


def test_journal_style_has_priority_prefix_and_no_timestamp(clean_root_logger: None) -> None:
    out = io.StringIO()
    configure_logging("info", journald=True, stream=out)
    logging.getLogger("bridge.sources").warning("board lost on %s", "/dev/ttyACM0")
    logging.getLogger("bridge.daemon").info("ready")
    logging.getLogger("bridge.daemon").debug("hidden at info level")
    logging.getLogger("bridge.daemon").error("sink failed")
    # sd-daemon(3) prefixes with RFC 5424 severities: warning 4, info 6, error 3.
    assert out.getvalue().splitlines() == [
        "<4>bridge.sources: board lost on /dev/ttyACM0",
        "<6>bridge.daemon: ready",
        "<3>bridge.daemon: sink failed",
    ]


def test_terminal_style_has_timestamps_and_repeat_filter(clean_root_logger: None) -> None:
    out = io.StringIO()
    configure_logging(logging.DEBUG, journald=False, stream=out)
    log = logging.getLogger("bridge.sources")
    for _ in range(5):
        log.warning("no frames for %d s", 3)
    lines = out.getvalue().splitlines()
    assert len(lines) == 1
    assert re.fullmatch(
        r"\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d{3} WARNING bridge\.sources: no frames for 3 s", lines[0]
    )


def test_configure_twice_keeps_one_handler(clean_root_logger: None) -> None:
    root = logging.getLogger()
    before = len(root.handlers)
    first = configure_logging("warning", journald=False, stream=io.StringIO())
    second = configure_logging("debug", journald=True, stream=io.StringIO())
    assert first not in root.handlers and second in root.handlers
    assert len(root.handlers) == before + 1
    assert root.level == logging.DEBUG
    with pytest.raises(ValueError, match="unknown log level"):
        configure_logging("loud")


def test_journal_detection_compares_device_and_inode(tmp_path: Path) -> None:
    with open(tmp_path / "out", "w") as stream, open(tmp_path / "other", "w") as other:
        st = os.fstat(stream.fileno())
        # systemd.exec(5): JOURNAL_STREAM is "<device>:<inode>" of the journal connection.
        env = {"JOURNAL_STREAM": f"{st.st_dev}:{st.st_ino}"}
        assert running_under_journal(stream, env)
        assert not running_under_journal(other, env)
        assert not running_under_journal(stream, {})
        assert not running_under_journal(stream, {"JOURNAL_STREAM": "garbage"})
        assert not running_under_journal(io.StringIO(), env)  # no file descriptor


def test_journal_style_is_detected_from_the_environment(
    tmp_path: Path, clean_root_logger: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    with open(tmp_path / "out", "w+") as stream:
        st = os.fstat(stream.fileno())
        monkeypatch.setenv("JOURNAL_STREAM", f"{st.st_dev}:{st.st_ino}")
        configure_logging("info", stream=stream)
        logging.getLogger("bridge.daemon").info("ready")
        stream.flush()
        stream.seek(0)
        assert stream.read() == "<6>bridge.daemon: ready\n"
