"""Tests for bridge/control.py: request validation and a real control server on a Unix socket.

Every server test binds a real socket in a private temporary folder and talks to it with
real connections (ControlClient or a bare socket). The daemon side is a plain function that
records requests and returns dicts; the live daemon is in tests/test_daemon.py.
"""

from __future__ import annotations

import json
import os
import queue
import socket
import stat
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from bridge.control import (
    MAX_REQUEST,
    Activate,
    ControlClient,
    ControlServer,
    Rebase,
    Reload,
    Status,
    Watch,
    parse_request,
)
from bridge.errors import BridgeError, ControlError

NOBODY = 65534  # the unprivileged "nobody" account of Debian-family systems (common practice)


# --------------------------------------------------------------------------- parse_request


@pytest.mark.parametrize(
    ("line", "kind", "fields"),
    [
        (b'{"op": "status"}', Status, {}),
        (b'{"op": "activate", "name": "harbour-chapel"}', Activate, {"name": "harbour-chapel"}),
        (b'{"op":"rebase"}\n', Rebase, {}),
        (b'  {"op": "reload"}  ', Reload, {}),
        (b'{"op": "watch"}', Watch, {"every": 10, "raw": False}),
        (b'{"op": "watch", "every": 1, "raw": true}', Watch, {"every": 1, "raw": True}),
        ('{"op": "activate", "name": "caf\u00e9-n\u00ba2"}'.encode(), Activate,
         {"name": "caf\u00e9-n\u00ba2"}),
    ],
)
def test_parse_request_accepts_valid_requests(
    line: bytes, kind: type, fields: dict[str, Any]
) -> None:
    req = parse_request(line)
    assert type(req) is kind
    for k, v in fields.items():
        assert getattr(req, k) == v


@pytest.mark.parametrize(
    ("line", "needle"),
    [
        (b'{"op": ', "not JSON"),
        (b"\xff\xfe{}", "not JSON"),
        (b"", "not JSON"),
        (b"[]", "request"),
        (b"{}", "op"),
        (b'{"op": "dance"}', "dance"),
        (b'{"op": "status", "verbose": true}', "verbose"),
        (b'{"op": "activate"}', "name"),
        (b'{"op": "activate", "name": ""}', "name"),
        (b'{"op": "activate", "name": "' + b"x" * 65 + b'"}', "name"),
        (b'{"op": "watch", "every": 0}', "every"),
        (b'{"op": "watch", "every": 10001}', "every"),
        (b'{"op": "activate", "name": "' + b"x" * MAX_REQUEST + b'"}', str(MAX_REQUEST)),
    ],
    ids=["truncated", "not-utf8", "empty", "array", "no-op", "unknown-op", "extra-field",
         "missing-name", "empty-name", "long-name", "every-0", "every-huge", "oversized"],
)
def test_parse_request_rejects_with_a_reason(line: bytes, needle: str) -> None:
    with pytest.raises(ControlError) as e:
        parse_request(line)
    assert needle in str(e.value)
    assert isinstance(e.value, BridgeError)  # the CLI maps it to its exit code


# --------------------------------------------------------------------------- a real server


class FakeDaemon:
    """The daemon side of the server: a plain function that records what it was asked."""

    def __init__(self) -> None:
        self.calls: list[Any] = []

    def submit(self, req: Any) -> dict[str, Any]:
        self.calls.append(req)
        if isinstance(req, Status):
            return {"ok": True, "profile": "tin-lantern", "frames": 1234}
        if isinstance(req, Activate):
            return {"ok": True, "profile": req.name}
        return {"ok": False, "error": f"cannot {type(req).__name__.lower()} here"}


@pytest.fixture
def served(short_dir: Path) -> Iterator[tuple[ControlServer, FakeDaemon, Path]]:
    fake = FakeDaemon()
    path = short_dir / "run" / "control.sock"
    server = ControlServer(path, fake.submit)
    server.start()
    yield server, fake, path
    server.stop()


def talk(path: Path, *lines: bytes) -> list[dict[str, Any]]:
    """Send each line on one connection and read one reply line for each."""
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(5.0)
        s.connect(str(path))
        f = s.makefile("rb")
        out = []
        for line in lines:
            s.sendall(line)
            out.append(json.loads(f.readline()))
        return out


def test_socket_is_owner_only_in_an_owner_only_folder(served) -> None:
    _server, _fake, path = served
    st = os.stat(path)
    assert stat.S_ISSOCK(st.st_mode)
    assert stat.S_IMODE(st.st_mode) == 0o600
    folder = os.stat(path.parent)
    assert stat.S_IMODE(folder.st_mode) == 0o700
    assert folder.st_uid == os.getuid()


def test_start_tightens_a_loose_folder_and_replaces_a_stale_socket(short_dir: Path) -> None:
    folder = short_dir / "run"
    folder.mkdir(mode=0o755)
    os.chmod(folder, 0o755)
    stale = folder / "control.sock"
    stale.write_bytes(b"left over from a crash")
    server = ControlServer(stale, FakeDaemon().submit)
    server.start()
    try:
        assert stat.S_IMODE(os.stat(folder).st_mode) == 0o700
        assert stat.S_ISSOCK(os.stat(stale).st_mode)
        assert ControlClient(stale).request({"op": "status"})["ok"] is True
    finally:
        server.stop()
    assert not stale.exists()  # stop removes the socket file


@pytest.mark.skipif(os.getuid() != 0, reason="needs root to give the folder to another user")
def test_start_refuses_a_folder_owned_by_someone_else(short_dir: Path) -> None:
    folder = short_dir / "run"
    folder.mkdir(mode=0o700)
    os.chown(folder, NOBODY, NOBODY)
    with pytest.raises(ControlError, match="not a folder owned by this user"):
        ControlServer(folder / "control.sock", FakeDaemon().submit).start()


def test_status_and_activate_round_trip(served) -> None:
    _server, fake, path = served
    client = ControlClient(path)
    assert client.request({"op": "status"}) == {"ok": True, "profile": "tin-lantern",
                                                "frames": 1234}
    assert client.request({"op": "activate", "name": "harbour-chapel"}) == {
        "ok": True, "profile": "harbour-chapel"}
    assert client.request({"op": "rebase"}) == {"ok": False, "error": "cannot rebase here"}
    assert [type(c) for c in fake.calls] == [Status, Activate, Rebase]
    assert fake.calls[1].name == "harbour-chapel"


def test_malformed_request_gets_an_error_and_the_server_keeps_serving(served) -> None:
    _server, fake, path = served
    bad, unknown, extra, good = talk(
        path,
        b"this is not json\n",
        b'{"op": "dance"}\n',
        b'{"op": "status", "x": 1}\n',
        b'{"op": "status"}\n',  # the same connection still works
    )
    assert bad["ok"] is False and "not JSON" in bad["error"]
    assert unknown["ok"] is False and "dance" in unknown["error"]
    assert extra["ok"] is False and "x" in extra["error"]
    assert good["ok"] is True
    assert [type(c) for c in fake.calls] == [Status]  # nothing malformed reached the daemon
    assert ControlClient(path).request({"op": "status"})["ok"] is True  # and a new one too


def test_oversized_line_is_refused_and_the_connection_closed(served) -> None:
    _server, fake, path = served
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(5.0)
        s.connect(str(path))
        s.sendall(b'{"op": "activate", "name": "' + b"y" * (2 * MAX_REQUEST) + b'"}\n')
        f = s.makefile("rb")
        reply = json.loads(f.readline())
        assert reply["ok"] is False and str(MAX_REQUEST) in reply["error"]
        # The server hung up on the flood: an end of stream, or a reset because the rest
        # of the flood was never read (Linux resets a Unix socket closed with unread data).
        try:
            rest = f.readline()
        except ConnectionResetError:
            rest = b""
        assert rest == b""
    assert fake.calls == []
    assert ControlClient(path).request({"op": "status"})["ok"] is True


def test_a_request_of_exactly_the_size_limit_is_served(served) -> None:
    _server, fake, path = served
    body = b'{"op": "status"}'
    line = body + b" " * (MAX_REQUEST - len(body))  # JSON allows trailing white space
    assert len(line) == MAX_REQUEST and isinstance(parse_request(line), Status)
    (reply,) = talk(path, line + b"\n")
    assert reply["ok"] is True
    assert [type(c) for c in fake.calls] == [Status]


def test_client_without_a_server_says_so(short_dir: Path) -> None:
    with pytest.raises(ControlError, match="no daemon is listening"):
        ControlClient(short_dir / "nothing.sock").request({"op": "status"})


def test_watchers_get_every_nth_published_line(served, until) -> None:
    server, _fake, path = served
    got: dict[bool, queue.Queue[dict[str, Any]]] = {False: queue.Queue(), True: queue.Queue()}

    def watch(raw: bool) -> None:
        for item in ControlClient(path).watch(every=2 if not raw else 3, raw=raw):
            got[raw].put(item)

    threads = [threading.Thread(target=watch, args=(raw,), daemon=True) for raw in (False, True)]
    for t in threads:
        t.start()
    until(lambda: len(server._watchers) == 2, 5.0, "two watchers registered")
    built: list[tuple[int, bool]] = []

    def line_for(frame: int):  # noqa: ANN202
        def make(raw: bool) -> bytes:
            built.append((frame, raw))
            return json.dumps({"frame": frame, "raw": raw}).encode() + b"\n"
        return make

    for frame in range(1, 13):
        server.publish(frame, line_for(frame))
    plain = [got[False].get(timeout=5.0)["frame"] for _ in range(6)]
    raw = [got[True].get(timeout=5.0) for _ in range(4)]
    assert plain == [2, 4, 6, 8, 10, 12]
    assert [r["frame"] for r in raw] == [3, 6, 9, 12] and all(r["raw"] for r in raw)
    # Frame 6 and 12 go to both watchers, but each kind of line is built once per frame.
    assert sorted(built) == sorted({(f, False) for f in plain} | {(r["frame"], True) for r in raw})
    server.stop()
    for t in threads:
        t.join(timeout=5.0)
        assert not t.is_alive(), "a watch did not end when the server stopped"


def test_stop_does_not_fail_with_a_stalled_watcher(short_dir: Path, until) -> None:
    """A watcher that stops reading (a terminal paused, a pipe to a stopped pager) fills
    its queue; stopping the server must still work (it runs on every daemon shutdown)."""
    path = short_dir / "run" / "control.sock"
    server = ControlServer(path, FakeDaemon().submit)
    server.start()
    s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    s.settimeout(5.0)
    s.connect(str(path))
    try:
        s.sendall(b'{"op": "watch", "every": 1}\n')
        assert json.loads(s.makefile("rb").readline())["watching"] is True
        line = b"x" * 8191 + b"\n"
        for frame in range(1, 2048 + 2000):  # socket buffers fill, then the queue
            server.publish(frame, lambda raw: line)
        server.stop()  # must neither raise nor hang
        assert not path.exists()
    finally:
        s.close()  # unblocks the server's sender, which then drops the watcher
        until(lambda: not server.watching, 10.0, "the stalled watcher dropped")
        server.stop()


# --------------------------------------------------------------------------- other users


def _as_nobody(path: Path) -> int:
    """Fork a child that drops to uid/gid nobody and connects to ``path``.

    Exit codes: 10 connect refused with PermissionError, 11 connected and the server
    hung up without a reply, 12 connected and got a reply, 13 something else."""
    pid = os.fork()
    if pid == 0:  # child: only os/socket calls, then _exit, never back into pytest
        code = 13
        try:
            os.setgroups([])
            os.setgid(NOBODY)
            os.setuid(NOBODY)
            s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            s.settimeout(5.0)
            try:
                s.connect(str(path))
            except PermissionError:
                code = 10
            else:
                try:
                    s.sendall(b'{"op": "status"}\n')
                    code = 12 if s.recv(4096) else 11
                except (ConnectionResetError, BrokenPipeError):
                    code = 11  # hung up on (reset: it closed without reading our request)
        except BaseException:  # noqa: BLE001 - any surprise is reported as code 13
            code = 13
        finally:
            os._exit(code)
    _pid, status = os.waitpid(pid, 0)
    return os.waitstatus_to_exitcode(status)


@pytest.mark.skipif(os.getuid() != 0, reason="needs root to act as a second local user")
def test_another_local_user_cannot_connect(served, short_dir: Path) -> None:
    _server, fake, path = served
    os.chmod(short_dir, 0o711)  # others may pass through the test folder, not the runtime one
    assert _as_nobody(path) == 10  # EACCES at the 0700 runtime folder
    assert fake.calls == []


@pytest.mark.skipif(os.getuid() != 0, reason="needs root to act as a second local user")
def test_peer_uid_check_refuses_another_user_even_if_permissions_are_opened(
    served, short_dir: Path
) -> None:
    _server, fake, path = served
    # Someone loosened the folder and socket: the SO_PEERCRED check is the second line.
    os.chmod(short_dir, 0o711)
    os.chmod(path.parent, 0o711)
    os.chmod(path, 0o666)
    assert _as_nobody(path) == 11  # connected, then hung up on without a reply
    assert fake.calls == []
    assert ControlClient(path).request({"op": "status"})["ok"] is True  # root still served
