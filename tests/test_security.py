"""Security: who may talk to the daemon, what it accepts, what it runs, where it writes.

Promises checked here (docs/reliability.md, "Security"):

* the control socket is 0600 in a 0700 folder, whatever the umask, and a second local
  user cannot use it (as root: a forked child that drops to uid 65534 tries);
* control messages are validated against a schema and limited in size; a malformed one
  gets an error reply and changes nothing (same profile, frames still flowing, the held
  note still held);
* no eval, exec, pickle, marshal, shell=True or os.system anywhere in bridge/ (a scan of
  the syntax trees);
* the OSC output and every listener stay on 127.0.0.1 unless told otherwise;
* profile names and the recording files cannot lead out of their folder (hostile names,
  planted symbolic links).

The daemon runs in a thread on a simulated board behind a real pseudo-terminal; requests
go over the real Unix socket. Nothing here asserts speed.
"""

from __future__ import annotations

import ast
import json
import os
import shutil
import socket
import stat
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bridge.commands import setup_for as store_setup
from bridge.control import (
    MAX_REQUEST,
    Activate,
    ControlClient,
    OscControl,
    Rebase,
    Reload,
    Status,
    Watch,
    parse_request,
    socket_path,
)
from bridge.daemon import Setup
from bridge.errors import ConfigError, ControlError
from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.outputs.midifile import MidiFileRecorder
from bridge.outputs.osc import OscSettings, OscSink, parse_destination
from bridge.pipeline import Reading, VoiceView
from bridge.profiles import ControlSettings, Store, load_rig
from bridge.recording import RecordingWriter
from bridge.sim import Performance
from bridge.sources import SocketBoard
from bridge.tools import RECORDINGS_DIR, recording_path

REPO = Path(__file__).resolve().parents[1]
BRIDGE = REPO / "bridge"
EXAMPLES = REPO / "profiles"
NOBODY = 65534  # the unprivileged "nobody" account of Debian-family systems (common practice)
LOOPBACK = {"127.0.0.1", "::1", "localhost"}


def has_note_on(msgs: list[bytes]) -> bool:
    return any(m[0] >> 4 == 0x9 and m[2] > 0 for m in msgs)


def raw_exchange(path: Path, line: bytes, timeout: float = 5.0) -> bytes:
    """Send one raw line on a new connection; return the reply line (b"" if hung up)."""
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(timeout)
        s.connect(str(path))
        s.sendall(line)
        try:
            return s.makefile("rb").readline(1 << 20)
        except ConnectionResetError:
            return b""


# =============================================================================================
# The control socket: owner only
# =============================================================================================


@pytest.fixture
def live(demo_cal: Any, boards: Any, setup_for: Any, run_daemon: Any, recording_port: Any,
         held: Any, short_dir: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[Any]:
    """A daemon playing a held note, its control socket in the default place
    (FIELDBRIDGE_RUNTIME), and a loader that would accept any name it is given."""
    monkeypatch.setenv("FIELDBRIDGE_RUNTIME", str(short_dir / "runtime"))
    board = boards.pty(demo_cal.sim, held(rest_s=0.1))
    asked: list[str | None] = []

    def loader(name: str | None) -> Setup:
        asked.append(name)
        return setup_for(board.path, profile=name or "reloaded")

    old = os.umask(0)  # the most permissive umask: the modes must not depend on it
    try:
        path = socket_path()
        run = run_daemon(setup_for(board.path), [MidiSink(MidiSettings(), [recording_port])],
                         loader=loader, control_path=path)
        recording_port.wait_for(has_note_on, 10.0, "a note-on")
    finally:
        os.umask(old)
    run.asked = asked
    run.path = path
    run.port = recording_port
    yield run
    run.stop()


def test_control_socket_is_0600_in_a_0700_folder_even_with_umask_000(live: Any) -> None:
    path: Path = live.path
    folder = path.parent
    assert path == Path(os.environ["FIELDBRIDGE_RUNTIME"]) / "control.sock"
    st_dir, st_sock = folder.lstat(), path.lstat()
    assert stat.S_ISDIR(st_dir.st_mode) and stat.S_IMODE(st_dir.st_mode) == 0o700
    assert stat.S_ISSOCK(st_sock.st_mode) and stat.S_IMODE(st_sock.st_mode) == 0o600
    assert st_dir.st_uid == os.getuid() and st_sock.st_uid == os.getuid()
    assert ControlClient(path).request({"op": "status"})["ok"] is True


def _connect_as_nobody(path: Path) -> int:
    """Fork a child that drops to uid/gid 65534 and tries the control socket.

    Exit codes: 10 refused with PermissionError at connect, 11 connected but hung up on
    without a reply, 12 got a reply (a failure of the promise), 13 anything else."""
    pid = os.fork()
    if pid == 0:  # only os/socket calls in the child, then _exit: never back into pytest
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
                    s.sendall(b'{"op": "activate", "name": "intruder"}\n')
                    code = 12 if s.recv(4096) else 11
                except (ConnectionResetError, BrokenPipeError):
                    code = 11
        except BaseException:  # noqa: BLE001 - any surprise is reported as code 13
            code = 13
        finally:
            os._exit(code)
    _, status = os.waitpid(pid, 0)
    return os.waitstatus_to_exitcode(status)


@pytest.mark.skipif(os.getuid() != 0, reason="needs root to act as a second local user "
                    "(fork, then setuid to 65534); run the suite as root to check this")
def test_second_local_user_cannot_use_the_daemon(live: Any, short_dir: Path) -> None:
    os.chmod(short_dir, 0o711)  # others may pass through the test folder, not the runtime one
    assert _connect_as_nobody(live.path) == 10  # EACCES at the 0700 folder
    # With the folder and socket opened up by mistake, the peer-uid check still refuses.
    os.chmod(live.path.parent, 0o711)
    os.chmod(live.path, 0o666)
    assert _connect_as_nobody(live.path) == 11
    assert live.asked == []  # no request from the other user reached the loop
    live.wait_frames(10)
    status = ControlClient(live.path).request({"op": "status"})
    assert status["profile"] == "tin-lantern" and status["switches"] == 0


# =============================================================================================
# Control messages: schema, size, and "changes nothing"
# =============================================================================================

HOSTILE_LINES = [
    b"not json at all\n",
    b"\xff\xfe\x00garbage\n",
    b"[]\n",
    b"{}\n",
    b"null\n",
    b'"activate"\n',
    b'{"op": "shutdown"}\n',
    b'{"op": "activate"}\n',
    b'{"op": "activate", "name": ""}\n',
    b'{"op": "activate", "name": 5}\n',
    b'{"op": "activate", "name": ["a"]}\n',
    b'{"op": "activate", "name": "' + b"x" * 65 + b'"}\n',
    b'{"op": "activate", "name": "harbour", "then": "rm -rf /"}\n',
    b'{"op": "status", "verbose": true}\n',
    b'{"op": "rebase", "baselines": {"pitch": 1}}\n',
    b'{"op": "watch", "every": 0}\n',
    b'{"op": "watch", "every": 1e400}\n',
    b'{"op": "watch", "every": NaN}\n',
    b'{"op": "activate", "name": "a", "op": "reload", "op": "status", "x": 1}\n',
    b'{"__class__": "os.system", "op": "reload", "args": ["id"]}\n',
    b'{"op": "activate", "name": "' + b"[" * 400 + b'"}\n',
    b"[" * 400 + b"]" * 400 + b"\n",
]


def test_malformed_requests_get_an_error_reply_and_change_nothing(live: Any) -> None:
    port = live.port
    live.wait_frames(100)  # the hand has glided in and now holds still: one note, held
    port.mark("hostile")
    frames = live.daemon.counters.frames
    for line in HOSTILE_LINES:
        reply = json.loads(raw_exchange(live.path, line))
        assert reply["ok"] is False and reply["error"], line
    # Over the size limit: an error reply, then the server hangs up on that connection.
    reply = json.loads(raw_exchange(live.path, b'{"op": "status", "pad": "' + b" " * 5000
                                    + b'"}\n'))
    assert reply["ok"] is False and str(MAX_REQUEST) in reply["error"]
    # Exactly at the limit, a valid request is served.
    line = b'{"op": "status"' + b" " * (MAX_REQUEST - 16) + b"}"
    assert len(line) == MAX_REQUEST
    assert json.loads(raw_exchange(live.path, line + b"\n"))["ok"] is True
    live.wait_frames(20)
    status = ControlClient(live.path).request({"op": "status"})
    assert status["profile"] == "tin-lantern" and status["switches"] == 0
    assert status["frames"] >= frames + 20  # frames kept flowing
    assert live.asked == []  # no request got as far as the profile loader
    # Nothing was silenced: the note held before the requests is still held.
    assert [e for e in port.notes(port.since("hostile")) if not e.on] == []
    assert len(port.sounding(port.snapshot())) == 1


def test_deeply_nested_request_gets_an_error_reply(live: Any) -> None:
    line = b"[" * 1500 + b"]" * 1500 + b"\n"  # 3001 bytes: inside the size limit
    assert len(line) <= MAX_REQUEST
    try:
        reply = raw_exchange(live.path, line, timeout=1.0)
    except socket.timeout:
        reply = b""
    assert reply, "the server hung up without an error reply"
    assert json.loads(reply)["ok"] is False


json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=80),
    lambda inner: st.lists(inner, max_size=4)
    | st.dictionaries(st.sampled_from(["op", "name", "every", "raw", "x"]) | st.text(max_size=8),
                      inner, max_size=5),
    max_leaves=20,
)
ops = st.sampled_from(["status", "activate", "rebase", "reload", "watch", "dance", ""])


@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    value=st.one_of(
        json_values,
        st.fixed_dictionaries({"op": ops}, optional={"name": json_values, "every": json_values,
                                                      "raw": json_values, "extra": json_values}),
    )
)
def test_any_json_is_a_valid_request_or_a_control_error(value: Any) -> None:
    line = json.dumps(value).encode()
    try:
        req = parse_request(line)
    except ControlError as e:
        assert str(e)
        return
    assert type(req) in (Status, Activate, Rebase, Reload, Watch)
    # What passed the schema is exactly what the schema allows.
    assert isinstance(value, dict) and value["op"] == req.op
    assert set(value) <= set(type(req).model_fields)
    if isinstance(req, Activate):
        assert isinstance(req.name, str) and 1 <= len(req.name) <= 64
    if isinstance(req, Watch):
        assert 1 <= req.every <= 10_000 and isinstance(req.raw, bool)


@settings(max_examples=300, deadline=None)
@given(line=st.binary(max_size=MAX_REQUEST + 50))
def test_any_bytes_are_a_valid_request_or_a_control_error(line: bytes) -> None:
    try:
        parse_request(line)
    except ControlError:
        pass


# =============================================================================================
# Nothing evaluated, unpickled or given to a shell
# =============================================================================================

# input() is allowed: the soundcheck asks the performer to press Enter (nothing is
# evaluated; Python 3 input() returns text).
FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__", "breakpoint"}
FORBIDDEN_MODULES = {"pickle", "cPickle", "marshal", "shelve", "dill", "yaml", "telnetlib"}
FORBIDDEN_ATTRS = {
    ("os", "system"), ("os", "popen"), ("os", "execv"), ("os", "execve"), ("os", "execl"),
    ("os", "execlp"), ("os", "execvp"), ("os", "spawnl"), ("os", "spawnv"),
    ("tempfile", "mktemp"), ("subprocess", "getoutput"), ("subprocess", "getstatusoutput"),
}


def _problems(tree: ast.AST) -> list[str]:
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            f = node.func
            if isinstance(f, ast.Name) and f.id in FORBIDDEN_CALLS:
                found.append(f"{f.id}() at line {node.lineno}")
            if isinstance(f, ast.Attribute) and isinstance(f.value, ast.Name) and (
                    f.value.id, f.attr) in FORBIDDEN_ATTRS:
                found.append(f"{f.value.id}.{f.attr}() at line {node.lineno}")
            for kw in node.keywords:
                if kw.arg == "shell" and not (isinstance(kw.value, ast.Constant)
                                              and kw.value.value is False):
                    found.append(f"shell={ast.unparse(kw.value)} at line {node.lineno}")
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.split(".")[0] in FORBIDDEN_MODULES:
                    found.append(f"import {a.name} at line {node.lineno}")
        elif isinstance(node, ast.ImportFrom):
            if (node.module or "").split(".")[0] in FORBIDDEN_MODULES:
                found.append(f"from {node.module} import at line {node.lineno}")
    return found


def test_the_scan_finds_what_it_looks_for() -> None:
    """The scanner itself, on code that does every forbidden thing once."""
    bad = ast.parse(
        "import pickle\nfrom marshal import loads\nimport os, subprocess\n"
        "eval('1')\nexec('x=1')\nos.system('id')\nsubprocess.run('id', shell=True)\n"
        "__import__('os')\n"
    )
    assert len(_problems(bad)) == 7
    assert _problems(ast.parse("subprocess.run(['id'], shell=False)\n")) == []


def test_no_eval_exec_pickle_or_shell_in_the_package() -> None:
    files = sorted(BRIDGE.rglob("*.py"))
    assert len(files) > 15
    found = {}
    for path in files:
        problems = _problems(ast.parse(path.read_text(encoding="utf-8"), filename=str(path)))
        if problems:
            found[str(path.relative_to(REPO))] = problems
    assert found == {}


# =============================================================================================
# Network: loopback by default
# =============================================================================================


def _host(dest: str) -> str:
    return parse_destination(dest)[0]


def test_outputs_and_listeners_default_to_loopback() -> None:
    # The OSC output sends to this computer unless told otherwise.
    assert [_host(d) for d in OscSettings().destinations] == ["127.0.0.1"]
    # The OSC control input is off unless a rig names an address for it.
    assert ControlSettings().osc_listen is None
    # The example rig people copy keeps both on this computer.
    rig = load_rig(EXAMPLES / "rig.toml")
    if rig.outputs.osc is not None:
        assert {_host(d) for d in rig.outputs.osc.destinations} <= LOOPBACK
    if rig.control is not None and rig.control.osc_listen:
        assert _host(rig.control.osc_listen) in LOOPBACK
    # The simulated TCP board listens on loopback by default.
    board = SocketBoard(lambda: b"", 0.01)
    board.start()
    try:
        assert board.url.startswith("socket://127.0.0.1:")
        assert board._server is not None and board._server.getsockname()[0] == "127.0.0.1"
    finally:
        board.stop()


WILDCARDS = {"0.0.0.0", "::", "[::]", "0:0:0:0:0:0:0:0"}
BINDERS = {"bind", "create_server", "BlockingOSCUDPServer", "ThreadingOSCUDPServer",
           "AsyncIOOSCUDPServer", "TCPServer", "UDPServer"}


def test_no_wildcard_address_is_written_into_the_package() -> None:
    """No listener is bound to every interface by a literal in the code: no wildcard
    address anywhere, and no empty host ("" means every interface) given to a bind."""
    found = []
    for path in sorted(BRIDGE.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Constant) and node.value in WILDCARDS:
                found.append(f"{path.name}:{node.lineno} {node.value!r}")
            if isinstance(node, ast.Call):
                f = node.func
                name = f.attr if isinstance(f, ast.Attribute) else getattr(f, "id", "")
                if name in BINDERS and node.args and isinstance(node.args[0], ast.Tuple):
                    host = node.args[0].elts[0]
                    if isinstance(host, ast.Constant) and host.value == "":
                        found.append(f"{path.name}:{node.lineno} bind to ''")
    assert found == []


def _free_udp_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_osc_control_input_configured_on_loopback_listens_only_there() -> None:
    from bridge.outputs.osc import encode_message

    got: list[Any] = []
    came = threading.Event()

    def submit(req: Any) -> dict[str, Any]:
        got.append(req)
        came.set()
        return {"ok": True}

    ctl = OscControl(f"127.0.0.1:{_free_udp_port()}", submit)
    ctl.start()
    try:
        host, port = ctl._server.server_address
        assert host == "127.0.0.1" and port > 0
        # Reachable from this computer, through the same validation as the Unix socket:
        # a name over the schema's 64 characters and a number are refused, the rebase
        # (sent last, handled in order) comes through.
        with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
            s.sendto(encode_message("/fieldbridge/control/activate", "x" * 200), (host, port))
            s.sendto(encode_message("/fieldbridge/control/activate", 5), (host, port))
            s.sendto(encode_message("/fieldbridge/control/rebase"), (host, port))
        assert came.wait(5.0), "the rebase did not arrive"
        assert [type(r) for r in got] == [Rebase]
    finally:
        ctl.stop()


def test_osc_output_socket_is_not_reachable_from_other_hosts_with_loopback_destinations(
    osc_listener: Any,
) -> None:
    sink = OscSink(OscSettings(destinations=[osc_listener.destination]))
    sink.open()
    try:
        v = VoiceView("lead", 60.0, 261.6)
        v.level, v.present = 0.5, True
        r = Reading([], [v])
        sink.send(r)
        osc_listener.wait_for(lambda rs: len(rs) >= 1, 5.0, "the datagram")
        (sock,) = sink._socks.values()
        assert sock.getsockname()[0] == "127.0.0.1"
    finally:
        sink.close()


# =============================================================================================
# Paths: profile names and recordings stay in their folder
# =============================================================================================

HOSTILE_NAMES = [
    "../rig", "..", ".", "../../../../etc/passwd", "/etc/passwd", "venues/../rig",
    "a/b", "a\\b", ".hidden", "-rf", "nul", "CON", "lpt1.toml", "tin-lantern\x00.toml",
    "tin-lantern/../../rig", "\u2025", "tin\u2044lantern", "Tin-Lantern\n", " tin-lantern",
]


@pytest.fixture
def store(tmp_path: Path) -> Store:
    root = tmp_path / "store"
    shutil.copytree(EXAMPLES, root)
    s = Store(root)
    s.activate("tin-lantern")
    return s


def _tree(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes()
            for p in sorted(root.rglob("*")) if p.is_file() and not p.is_symlink()}


def test_hostile_profile_names_over_the_control_socket_are_refused(
    store: Store, demo_cal: Any, boards: Any, run_daemon: Any, recording_port: Any,
    short_dir: Path, tmp_path: Path,
) -> None:
    from bridge.demo import demo_board_settings

    rig = store.load_rig()
    sim = demo_board_settings(3, rig.board.window_s)
    board = boards.pty(sim, Performance(4).silence(0.3).glide(0.4, pitch=0.12, volume=0.3)
                       .hold(3600.0))
    setup = store_setup(store, None)
    setup.source = setup.source.model_copy(update={"url": board.path})
    path = short_dir / "run" / "control.sock"
    run = run_daemon(setup, [MidiSink(MidiSettings(), [recording_port])],
                     loader=lambda name: store_setup(store, name), control_path=path)
    run.wait_frames(10)
    # A venue file that is a link to a file outside the store.
    outside = tmp_path / "outside.toml"
    outside.write_bytes(store.venue_path("ferry-shed").read_bytes())
    (store.venues_dir / "linked.toml").symlink_to(outside)
    before = _tree(tmp_path)
    client = ControlClient(path)
    for name in [*HOSTILE_NAMES, "linked"]:
        reply = client.request({"op": "activate", "name": name})
        assert reply["ok"] is False and reply["error"], name
        assert reply.get("profile", "tin-lantern") == "tin-lantern", name
    # An "active" marker that points out of the store is ignored, not followed.
    store.active_path.write_text("../../../../etc/passwd\n")
    reply = client.request({"op": "reload"})
    assert reply["ok"] is False and "active" in reply["error"]
    status = client.request({"op": "status"})
    assert status["profile"] == "tin-lantern" and status["switches"] == 0
    after = _tree(tmp_path)
    after.pop("store/active")
    before.pop("store/active")
    assert after == before  # nothing written or created anywhere
    run.stop()


@settings(max_examples=300, deadline=None, suppress_health_check=[
    HealthCheck.function_scoped_fixture])
@given(name=st.one_of(
    st.text(max_size=40).filter(lambda n: "/" not in n),
    st.sampled_from([n for n in HOSTILE_NAMES if "/" not in n]),
    st.sampled_from(["take", "take.rec", "Take-2", "a.b.c", "nul.rec", "x" * 64, "x" * 65]),
))
def test_a_bare_recording_name_stays_in_the_recordings_folder(store: Store, name: str) -> None:
    """A name without a folder part is a file in the store's recordings folder or a
    ConfigError (a name with a '/' is a path the user chose, used as given)."""
    folder = (store.root / RECORDINGS_DIR).resolve()
    try:
        path = recording_path(store, name)
    except ConfigError:
        return
    assert path.resolve().parent == folder
    assert not path.name.startswith(".")


def test_a_recording_name_linked_out_of_the_folder_is_refused(store: Store, tmp_path: Path
                                                              ) -> None:
    folder = store.root / RECORDINGS_DIR
    folder.mkdir()
    (folder / "take.rec").symlink_to(tmp_path / "victim.rec")
    with pytest.raises(ConfigError, match="outside"):
        recording_path(store, "take")
    assert recording_path(store, "other").parent == folder


def test_recording_refuses_to_write_through_a_planted_link(tmp_path: Path) -> None:
    victim = tmp_path / "victim.txt"
    victim.write_text("precious\n")
    take = tmp_path / "take.fbraw"
    take.symlink_to(victim)  # someone with write access to the folder planted a link
    with pytest.raises(ConfigError, match="exists already"):
        RecordingWriter(take, {"channels": ["pitch"], "kinds": ["count"]}).open()
    assert victim.read_text() == "precious\n"


def test_midi_file_recording_does_not_follow_a_link_planted_at_its_temporary_name(
    tmp_path: Path,
) -> None:
    """A link planted where an earlier version put its temporary file (the predictable
    '.NAME.<pid>.tmp'), pointing at a file elsewhere: the recording must not write
    through it (link following, CWE-59)."""
    victim = tmp_path / "elsewhere" / "victim.txt"
    victim.parent.mkdir()
    victim.write_bytes(b"precious\n")
    take = tmp_path / "out" / "demo.mid"
    take.parent.mkdir()
    (take.parent / f".{take.name}.{os.getpid()}.tmp").symlink_to(victim)
    rec = MidiFileRecorder(take)
    rec.send(bytes([0x90, 60, 100]), 0.0)
    rec.send(bytes([0x80, 60, 64]), 0.5)
    try:
        rec.close()
    finally:
        assert victim.read_bytes() == b"precious\n", "the planted link was followed"
    assert not take.is_symlink()
    assert take.read_bytes()[:4] == b"MThd"  # Standard MIDI File header chunk (SMF spec)
