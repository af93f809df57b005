"""Faults with a real peer: the JACK server stopped and started again under the daemon.

A private dummy JACK server (``jackd --no-realtime -d dummy``, started by
tests/e2e/jack.py under a name no other test uses) carries the daemon's MIDI output to
``jack_midi_dump``; a simulated board plays a held note through a real pseudo-terminal.
The server is then stopped (as when a session's audio server crashes or is restarted)
and started again under the same name.

What is promised: the daemon keeps running through the outage and after it, frames keep
flowing, the other outputs keep playing and end their notes, and shutdown is clean; the
loss shows in the MIDI output's port errors, and its port comes back by itself on the
restarted server, where a peer hears the next note.
"""

from __future__ import annotations

import subprocess
import tempfile
import uuid
from collections.abc import Iterator
from typing import Any

import pytest

try:  # tests/e2e/jack.py and peers.py: how the other peer tests reach them
    from .jack import JackServer, MidiDump, start_jack
    from .peers import require
except ImportError:
    from jack import JackServer, MidiDump, start_jack  # type: ignore[no-redef]
    from peers import require  # type: ignore[no-redef]

from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.outputs.midiports import open_ports

pytestmark = pytest.mark.peer


def restart(server: JackServer, timeout: float = 15.0) -> JackServer:
    """Start jackd again under the stopped server's name, with the same settings."""
    log = tempfile.TemporaryFile()  # noqa: SIM115 - closed by JackServer.stop
    proc = subprocess.Popen(
        [require("jackd"), "--no-realtime", "-d", "dummy", "-r", "48000", "-p", "256"],
        env=server.env, stdout=log, stderr=subprocess.STDOUT,
    )
    new = JackServer(server.name, proc, server.env, log)
    ready = new.run(require("jack_wait"), "-w", "-t", str(int(timeout)), timeout=timeout + 5)
    if ready.returncode != 0 or proc.poll() is not None:
        new.stop()
        raise AssertionError(f"jackd did not start again as {server.name!r}: {ready.stderr}")
    return new


@pytest.fixture
def private_jack(monkeypatch: pytest.MonkeyPatch) -> Iterator[dict[str, JackServer]]:
    """A JACK server for this test alone (it will be stopped and restarted); this process
    talks to it through JACK_DEFAULT_SERVER, set only for the test."""
    server = start_jack()
    monkeypatch.setenv("JACK_DEFAULT_SERVER", server.name)
    monkeypatch.setenv("JACK_NO_START_SERVER", "1")  # never start a server by accident
    box = {"server": server}
    try:
        yield box
    finally:
        box["server"].stop()


def has_note_on(msgs: list[bytes]) -> bool:
    """MIDI 1.0: status 0x9n with velocity > 0 is a note-on."""
    return any(m[0] >> 4 == 0x9 and len(m) == 3 and m[2] > 0 for m in msgs)


def _start(private_jack: dict[str, JackServer], demo_cal: Any, boards: Any, setup_for: Any,
           run_daemon: Any, recording_port: Any, held: Any) -> tuple[Any, MidiSink, str, Any]:
    server = private_jack["server"]
    client = f"fbfault{uuid.uuid4().hex[:6]}"
    settings = MidiSettings(api="jack", client_name=client, port_name="out")
    # Our JACK port and, beside it, the in-memory port: the sink writes to both.
    sink = MidiSink(settings, [*open_ports(settings), recording_port])
    ours = f"{client}:out"
    board = boards.pty(demo_cal.sim, held(rest_s=0.1))
    setup = setup_for(board.path)
    setup.source = setup.source.model_copy(update={"backoff_start_s": 0.01,
                                                   "backoff_max_s": 0.05})
    run = run_daemon(setup, [sink], run_for_s=120.0)
    dump = MidiDump(server)
    dump.start()
    try:
        server.wait_port(ours)
        server.connect(ours, dump.port)
        got: list[bytes] = []
        while not has_note_on(got):  # the held note reaches the JACK peer
            got.extend(dump.take(1, timeout=10.0))
    finally:
        dump.stop()
    return run, sink, ours, board


def test_daemon_survives_the_jack_server_stopping_and_starting_again(
    private_jack: dict[str, JackServer], demo_cal: Any, boards: Any, setup_for: Any,
    run_daemon: Any, recording_port: Any, held: Any,
) -> None:
    run, sink, _ours, board = _start(private_jack, demo_cal, boards, setup_for, run_daemon,
                                     recording_port, held)
    private_jack["server"].stop()  # the MIDI system goes away under a sounding note
    recording_port.mark("jack-down")
    run.wait_frames(100)  # the loop goes on: about a second of frames at 100 frames/s
    assert not run.done.is_set() and run.thread.is_alive()
    # The other port kept playing; then the board is unplugged and the note still ends.
    assert len(recording_port.since("jack-down")) > 0
    board.unplug()
    recording_port.wait_for(lambda m: recording_port.sounding(m) == {}, 5.0,
                            "note ended while JACK was down")
    recording_port.mark("replug")
    board.replug()
    recording_port.wait_for(lambda m: has_note_on(m[recording_port.marks["replug"]:]), 10.0,
                            "a note-on after the replug, JACK still down")
    private_jack["server"] = restart(private_jack["server"])
    frames = run.daemon.counters.frames
    run.wait_frames(50)  # and on, with the server back
    assert run.daemon.counters.frames >= frames + 50
    counters = run.stop()  # closing a port whose server went away neither hangs nor raises
    assert counters.sink_errors == 0
    assert recording_port.sounding(recording_port.snapshot()) == {}
    assert recording_port.snapshot()[-1] == bytes.fromhex("B07B00")  # All Notes Off, CC 123


def test_midi_comes_back_on_a_restarted_jack_server(
    private_jack: dict[str, JackServer], demo_cal: Any, boards: Any, setup_for: Any,
    run_daemon: Any, recording_port: Any, held: Any,
) -> None:
    run, sink, ours, board = _start(private_jack, demo_cal, boards, setup_for, run_daemon,
                                    recording_port, held)
    private_jack["server"].stop()
    run.wait_frames(50)
    # The loss is visible in the sink's counters (rtmidi itself reports nothing).
    assert sink.port_errors, "sends to the vanished JACK server were not counted as errors"
    server = private_jack["server"] = restart(private_jack["server"])
    run.wait_frames(100)
    server.wait_port(ours, timeout=5.0)  # our port is registered again
    assert sink.reopened == 1
    dump = MidiDump(server)
    dump.start()
    try:
        server.connect(ours, dump.port)
        # The note that restarted with the port sounded before the dump listened: lift the
        # hand (unplug, the outputs fall silent) and play again (replug) for a fresh note.
        board.unplug()
        recording_port.wait_for(lambda m: recording_port.sounding(m) == {}, 5.0, "silence")
        board.replug()
        got: list[bytes] = []
        while not has_note_on(got):
            got.extend(dump.take(1, timeout=5.0))
    finally:
        dump.stop()
    run.stop()
