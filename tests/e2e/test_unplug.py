"""A board unplugged in the middle of a held note, then plugged back in, with the daemon live.

Whole-pipeline runs on real transports: a simulated board behind a pseudo-terminal reached
through a stable link path (as /dev/serial/by-id), or behind a TCP server (socket:// URL);
the real daemon loop; the real MidiSink writing to an in-memory RawPort; real OSC datagrams
read back with python-osc. DOMAIN.md section 1: "a lost USB cable must not leave a note
droning at full volume". Section 11: device numbers change on replug, so the link is
resolved again at each reconnect.
"""

from __future__ import annotations

from typing import Any

import pytest

from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.outputs.osc import OscSettings, OscSink
from bridge.sources import LinkState

QUIET_S = 0.5  # SourceSettings.quiet_after_s for these runs (the default)
# Scheduling allowance on a shared, busy test machine. The bound checked is the quiet
# timeout from the settings (a safety property), not how fast anything ran.
GRACE_S = 1.0
LEVEL_CC = 11  # MidiSettings default level controller (expression)
LEVEL = "/fieldbridge/voice/lead/level"


def _ended_and_muted(port: Any, key: tuple[int, int], mark: str):  # noqa: ANN202
    """Predicate: since ``mark`` the held note got its note-off and the level went to 0."""

    def pred(msgs: list[bytes]) -> bool:
        after = msgs[port.marks[mark]:]
        off = any(not e.on and (e.channel, e.note) == key for e in port.notes(after))
        return off and 0 in port.controller(after, LEVEL_CC)

    return pred


@pytest.mark.parametrize("how", ["pty-unplug", "socket-restart", "pty-quiet"])
def test_lost_board_silences_then_replug_resumes_without_restart(
    how: str, demo_cal, boards, setup_for, run_daemon, recording_port, osc_listener, held
) -> None:
    port, osc = recording_port, osc_listener
    if how == "socket-restart":
        board: Any = boards.tcp(demo_cal.sim, held())
        url = board.url
    else:
        board = boards.pty(demo_cal.sim, held(), link=True)
        url = board.path
        assert url == board.link_path  # the stable link, not the pty's own name
    sinks = [MidiSink(MidiSettings(), [port]),
             OscSink(OscSettings(destinations=[osc.destination]))]
    run = run_daemon(setup_for(url, quiet_after_s=QUIET_S), sinks)
    d = run.daemon

    # A note is held: hand in, glide finished.
    port.wait_for(lambda m: any(e.on for e in port.notes(m)), 10.0, "a note-on")
    run.wait_frames(100)
    sounding = port.sounding(port.snapshot())
    assert len(sounding) == 1
    key = next(iter(sounding))
    osc.wait_for(lambda rs: any(r.address == LEVEL and r.args[0] > 0 for r in rs), 5.0,
                 "a sounding OSC level")

    # Pull the cable (or stop the server, or let the sensor go quiet).
    osc_from = osc.count()
    port.mark("gone")
    if how == "pty-unplug":
        board.unplug()
    elif how == "socket-restart":
        board.stop()
    else:
        board.pause()  # still plugged in, but no frames: the quiet timeout must act
    port.wait_for(_ended_and_muted(port, key, "gone"), QUIET_S + GRACE_S,
                  "note-off and level 0 after the board went away")
    osc.wait_for(lambda rs: any(r.address == LEVEL and r.args[0] == 0.0
                                for r in rs[osc_from:]), QUIET_S + GRACE_S, "OSC level 0")
    assert d.source is not None
    expected = LinkState.QUIET if how == "pty-quiet" else LinkState.LOST
    assert d.source.state in (expected, LinkState.CONNECTING)
    assert port.sounding(port.snapshot()) == {}

    # Plug back in: playing resumes in the same daemon, no restart.
    gen = d.source.generation
    port.mark("back")
    if how == "pty-unplug":
        board.replug()
    elif how == "socket-restart":
        board.start()
    else:
        board.resume()
    port.wait_for(lambda m: any(e.on for e in port.notes(m[port.marks["back"]:])), 10.0,
                  "a new note-on after the replug")
    assert not run.done.is_set() and run.thread.is_alive()
    if how == "pty-quiet":
        assert d.source.generation == gen  # the port never closed
    else:
        assert d.source.generation > gen and d.source.stats.reconnects >= 1
    # Nothing played while the board was away.
    away = port.snapshot()[port.marks["gone"]:port.marks["back"]]
    assert not any(e.on for e in port.notes(away))
    osc_back = osc.count()
    osc.wait_for(lambda rs: any(r.address == LEVEL and r.args[0] > 0 for r in rs[osc_back:]),
                 5.0, "OSC level above zero again")

    run.stop()
    msgs = port.snapshot()
    assert port.sounding(msgs) == {}, "a note was left on at the end"
    assert msgs[-1] == bytes.fromhex("B07B00")  # All Notes Off, MIDI 1.0 spec (CC 123)
