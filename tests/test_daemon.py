"""Tests for bridge/daemon.py: the live loop, in-process and as the ``fieldbridge`` command.

The daemon runs in a thread and reads a simulated board through a real pseudo-terminal
(PtyBoard); MIDI goes to an in-memory RawPort (conftest.RecordingPort) through the real
MidiSink, OSC to a real UDP socket read back with python-osc, control requests over the
real Unix control socket. Waits are on conditions with timeouts; nothing asserts speed.
"""

from __future__ import annotations

import os
import queue
import re
import shutil
import signal
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any

import pytest

from bridge.control import ControlClient
from bridge.daemon import STOP_GRACE_S, Setup
from bridge.errors import ConfigError
from bridge.frames import DROP_REASONS
from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.outputs.osc import OscSettings, OscSink
from bridge.pipeline import ChannelSettings

OLD_LOW, NEW_LOW, SPAN = 48.0, 60.0, 36.0  # the two profiles' pitch ranges (semitones)
LEVEL_CC = 11  # MidiSettings default controller: expression (MIDI 1.0 spec, CC 11)

# MIDI 1.0 Detailed Specification, RPN 0 (pitch-bend sensitivity) = 12 semitones on
# channel 1, then RPN null (DOMAIN.md section 6 lists exactly these bytes).
RPN_BEND_12 = bytes.fromhex("B06500 B06400 B0060C B02600 B0657F B0647F".replace(" ", ""))
BEND_CENTRE = bytes.fromhex("E00040")  # value 8192, the spec's centre


def midi_and_osc(port: Any, osc: Any) -> list[Any]:
    return [MidiSink(MidiSettings(), [port]), OscSink(OscSettings(destinations=[osc.destination]))]


def has_note_on(msgs: list[bytes]) -> bool:
    return any(m[0] >> 4 == 0x9 and m[2] > 0 for m in msgs)


# --------------------------------------------------------------------------- frames flow


def test_frames_flow_to_midi_and_osc(
    demo_cal, boards, setup_for, run_daemon, recording_port, osc_listener, held
) -> None:
    port, osc = recording_port, osc_listener
    board = boards.pty(demo_cal.sim, held())
    run = run_daemon(setup_for(board.path), midi_and_osc(port, osc))

    port.wait_for(has_note_on, 10.0, "a note-on")
    port.wait_for(lambda m: len(port.bends(m)) >= 20, 10.0, "pitch bends after the note-on")
    level = "/fieldbridge/voice/lead/level"
    osc.wait_for(lambda rs: any(r.address == level and r.args[0] > 0 for r in rs), 10.0,
                 "an OSC level above zero")
    counters = run.stop()
    d = run.daemon
    msgs = port.snapshot()

    # Start-up: RPN 0 = 12 semitones, then the bend centred, then the level at zero.
    assert b"".join(msgs[:6]) == RPN_BEND_12
    assert msgs[6] == BEND_CENTRE
    assert msgs[7] == bytes((0xB0, LEVEL_CC, 0))
    # The note-on is inside the profile's range and comes after the set-up.
    on = [e for e in port.notes(msgs) if e.on]
    assert on and on[0].index > 7
    assert all(OLD_LOW <= e.note <= OLD_LOW + SPAN and 1 <= e.velocity <= 127 for e in on)
    # MIDI 1.0 bend convention v = 8192 + round(8192 * s / R) with R = 12 (DOMAIN.md 6):
    # the last key plus the last bend is the pitch of the last frame the engine played.
    last_on = on[-1]
    bends_after = port.bends(msgs[last_on.index:])
    assert bends_after, "no bend after the last note-on"
    sounding = last_on.note + (bends_after[-1] - 8192) * 12.0 / 8192.0
    assert d.engine is not None
    assert sounding == pytest.approx(d.engine.reading.voices[0].note, abs=12.0 / 8192.0)
    # Every way out ends held notes: nothing left on, All Notes Off (B0 7B 00) at close.
    assert port.sounding(msgs) == {}, f"left on; note messages: {port.notes(msgs)}"
    assert msgs[-1] == bytes.fromhex("B07B00")
    assert port.closed and port.close_calls == 1
    # OSC: the last level sent is silence (the listener may still be reading it), and
    # notes stay in the range.
    osc.wait_for(lambda rs: [r.args[0] for r in rs if r.address == level][-1] == 0.0, 5.0,
                 "OSC level 0 at shutdown")
    assert max(osc.values(level)) > 0.0
    assert all(OLD_LOW <= n <= OLD_LOW + SPAN for n in osc.values("/fieldbridge/voice/lead/note"))
    assert osc.errors == []
    assert counters.frames > 20 and counters.sink_errors == 0


# --------------------------------------------------------------------------- control


def test_status_and_watch_over_the_control_socket(
    demo_cal, boards, setup_for, run_daemon, recording_port, osc_listener, held, short_dir,
    until,
) -> None:
    board = boards.pty(demo_cal.sim, held())
    path = short_dir / "run" / "control.sock"
    run = run_daemon(setup_for(board.path), midi_and_osc(recording_port, osc_listener),
                     control_path=path)
    recording_port.wait_for(has_note_on, 10.0, "a note-on")
    client = ControlClient(path)

    first = client.request({"op": "status"})
    run.wait_frames(10)
    second = client.request({"op": "status"})
    assert first["ok"] is True and second["ok"] is True
    assert second["profile"] == "tin-lantern"
    assert second["frames"] >= first["frames"] + 10
    assert second["link"] == "streaming"
    assert second["switches"] == 0 and second["sink_errors"] == 0
    voice = second["voices"][0]
    assert voice["name"] == "lead" and voice["present"] is True and voice["level"] > 0.0
    assert OLD_LOW <= voice["note"] <= OLD_LOW + SPAN
    assert set(second["decoder_drops"]) == set(DROP_REASONS)
    # The live rate is filled in once a second by the loop.
    until(lambda: client.request({"op": "status"})["frames_per_s"] > 0, 5.0, "a frame rate")

    # watch: a stream of reading lines, every n-th frame of the engine's own counter.
    items: list[dict[str, Any]] = []
    for item in client.watch(every=5):
        items.append(item)
        if len(items) == 3:
            break
    assert [i["frame"] % 5 for i in items] == [0, 0, 0]
    assert items[1]["frame"] - items[0]["frame"] == 5
    assert all(i["profile"] == "tin-lantern" and i["voices"][0]["name"] == "lead"
               for i in items)
    raws = []
    for item in client.watch(every=1, raw=True):
        raws.append(item)
        if len(raws) == 2:
            break
    assert {"frame", "raw"} <= set(raws[0]) and len(raws[0]["raw"]) == 3
    run.stop()
    assert not path.exists()  # the socket goes away with the daemon


def _switch_rig(demo_cal, boards, setup_for, frames_per_write: int):  # noqa: ANN202
    board = boards.pty(demo_cal.sim, _held_high(), frames_per_write=frames_per_write)
    return board, setup_for(board.path)


def _held_high():  # noqa: ANN202
    from bridge.sim import Performance

    # 0.15 m: about 0.74 of the range, note ~74.8 in the old profile (48..84) and ~86.8 in
    # the new one (60..96): a key above 84 can only come from the new profile.
    return Performance(3, tremor_m=0.0003).silence(0.5).glide(0.4, pitch=0.15,
                                                              volume=0.3).hold(3600.0)


def _activate_and_check(run: Any, port: Any, path: Path) -> dict[str, Any]:
    port.wait_for(has_note_on, 10.0, "a note-on under the first profile")
    run.wait_frames(100)  # the glide is over: the hand holds still
    before = run.daemon.counters.frames
    reply = ControlClient(path).request({"op": "activate", "name": "harbour-chapel"})
    assert reply["ok"] is True and reply["profile"] == "harbour-chapel", reply
    # Handled between two frames by the loop thread itself: no frame passes while the
    # new profile is loaded and swapped in. Measured from this thread, one more frame may
    # have been counted before the request was queued, hence <= 2.
    assert run.daemon.counters.switch_frames[-1] <= 1
    assert reply["frame"] - before <= 2
    port.wait_for(lambda m: any(e.on for e in port.notes(m[port.marks["switch"]:])), 10.0,
                  "a note-on under the new profile")
    return reply


def test_activate_ends_held_notes_then_plays_the_new_profile(
    demo_cal, boards, setup_for, run_daemon, recording_port, osc_listener, short_dir
) -> None:
    port = recording_port
    board, setup = _switch_rig(demo_cal, boards, setup_for, 1)
    asked: list[str | None] = []

    def loader(name: str | None) -> Setup:
        asked.append(name)
        port.mark("switch")  # everything after this was sent once the new profile loaded
        return setup_for(board.path, profile=name or "reloaded", lowest_note=NEW_LOW)

    path = short_dir / "run" / "control.sock"
    run = run_daemon(setup, midi_and_osc(port, osc_listener), loader=loader, control_path=path)
    _activate_and_check(run, port, path)

    held_then = port.sounding(port.snapshot()[: port.marks["switch"]])
    assert len(held_then) == 1, "a note was held when the switch came"
    after = port.notes(port.since("switch"))
    # The held note ends first; the next note-on is played by the new profile.
    assert not after[0].on and {(after[0].channel, after[0].note)} == set(held_then)
    first_on = next(e for e in after if e.on)
    assert first_on.note > OLD_LOW + SPAN
    status = ControlClient(path).request({"op": "status"})
    assert status["profile"] == "harbour-chapel" and status["switches"] == 1

    # reload asks the loader for the active profile (name None) and switches again.
    reply = ControlClient(path).request({"op": "reload"})
    assert reply["ok"] is True and reply["profile"] == "reloaded"
    assert asked == ["harbour-chapel", None]
    run.stop()
    assert port.sounding(port.snapshot()) == {}


def test_no_note_from_the_old_profile_after_a_switch_mid_chunk(
    demo_cal, boards, setup_for, run_daemon, recording_port, osc_listener, short_dir
) -> None:
    # Four frames per write: one read often carries several frames (a busy machine, a
    # board that sends in bursts, a USB adapter that buffers).
    port = recording_port
    board, setup = _switch_rig(demo_cal, boards, setup_for, 4)

    def loader(name: str | None) -> Setup:
        port.mark("switch")
        return setup_for(board.path, profile=name or "?", lowest_note=NEW_LOW)

    path = short_dir / "run" / "control.sock"
    run = run_daemon(setup, midi_and_osc(port, osc_listener), loader=loader, control_path=path)
    _activate_and_check(run, port, path)
    run.wait_frames(20)
    after_on = [e.note for e in port.notes(port.since("switch")) if e.on]
    assert all(n > OLD_LOW + SPAN for n in after_on), f"old-profile notes after it: {after_on}"


def test_invalid_profile_keeps_the_old_one_and_says_why(
    demo_cal, boards, setup_for, run_daemon, recording_port, osc_listener, held, short_dir
) -> None:
    port = recording_port
    board = boards.pty(demo_cal.sim, held())
    spare = [*demo_cal.channels, ChannelSettings(name="spare", role="unused", kind="period")]

    def loader(name: str | None) -> Setup:
        port.mark(str(name))
        if name == "nowhere":
            raise ConfigError("no profile named 'nowhere' in the store")
        s = setup_for(board.path, profile=str(name))
        s.channels = spare  # a different frame layout cannot be switched to live
        return s

    path = short_dir / "run" / "control.sock"
    run = run_daemon(setup_for(board.path), midi_and_osc(port, osc_listener), loader=loader,
                     control_path=path)
    port.wait_for(has_note_on, 10.0, "a note-on")
    run.wait_frames(100)  # the hand has glided in (moving the note) and now holds still
    client = ControlClient(path)
    sounding = port.sounding(port.snapshot())
    assert len(sounding) == 1

    bad = client.request({"op": "activate", "name": "nowhere"})
    assert bad == {"ok": False, "error": "no profile named 'nowhere' in the store",
                   "profile": "tin-lantern"}
    other = client.request({"op": "activate", "name": "five-antennas"})
    assert other["ok"] is False and "other channels" in other["error"]
    assert other["profile"] == "tin-lantern"
    run.wait_frames(30)
    status = client.request({"op": "status"})
    assert status["profile"] == "tin-lantern" and status["switches"] == 0
    # The held note played on untouched: no note-off since the refused requests.
    assert [e for e in port.notes(port.since("nowhere")) if not e.on] == []
    assert port.sounding(port.snapshot()) == sounding
    run.stop()


def test_activate_without_a_profile_store_is_refused(
    demo_cal, boards, setup_for, run_daemon, recording_port, osc_listener, held, short_dir
) -> None:
    board = boards.pty(demo_cal.sim, held())
    path = short_dir / "run" / "control.sock"
    run = run_daemon(setup_for(board.path), midi_and_osc(recording_port, osc_listener),
                     control_path=path)
    run.wait_frames(5)
    reply = ControlClient(path).request({"op": "activate", "name": "harbour-chapel"})
    assert reply["ok"] is False and "profile store" in reply["error"]
    run.stop()


def test_rebase_takes_the_current_reading_as_hand_absent(
    demo_cal, boards, setup_for, run_daemon, recording_port, osc_listener, held, short_dir
) -> None:
    port, osc = recording_port, osc_listener
    board = boards.pty(demo_cal.sim, held(pitch=0.15))
    path = short_dir / "run" / "control.sock"
    run = run_daemon(setup_for(board.path), midi_and_osc(port, osc), control_path=path)
    port.wait_for(has_note_on, 10.0, "a note-on")
    run.wait_frames(100)  # the glide is over: the hand holds still at 0.15 m
    port.mark("rebase")
    reply = ControlClient(path).request({"op": "rebase"})
    assert reply["ok"] is True and set(reply["baselines"]) == {"pitch", "volume"}
    cal = demo_cal.calibration.channels["pitch"]
    # A hand at 0.15 m adds about 1 % to a period reading (sim.py: c = 0.1 (0.05/0.2)^1.5):
    # hundreds of noise units above the calibrated empty level.
    assert reply["baselines"]["pitch"] > cal.baseline + 50 * cal.noise
    # The held hand now reads as absent: its note ends and the level goes to zero.
    port.wait_for(lambda m: any(not e.on for e in port.notes(m[port.marks["rebase"]:])),
                  5.0, "a note-off after the rebase")
    run.wait_frames(10)
    status = ControlClient(path).request({"op": "status"})
    assert status["voices"][0]["present"] is False and status["voices"][0]["level"] == 0.0
    run.stop()


# --------------------------------------------------------------------------- SIGTERM


def _fieldbridge() -> list[str]:
    script = Path(sys.executable).parent / "fieldbridge"
    if script.exists():
        return [str(script)]
    found = shutil.which("fieldbridge")
    return [found] if found else [sys.executable, "-m", "bridge.cli"]


def test_sigterm_stops_the_demo_cleanly_with_every_note_ended(
    tmp_path: Path, osc_listener
) -> None:
    import mido

    env = dict(os.environ, FIELDBRIDGE_OUT=str(tmp_path), PYTHONUNBUFFERED="1")
    for k in ("NOTIFY_SOCKET", "WATCHDOG_USEC", "JACK_DEFAULT_SERVER"):
        env.pop(k, None)
    log = (tmp_path / "stderr.log").open("wb")
    proc = subprocess.Popen(
        [*_fieldbridge(), "demo", "--seconds", "30", "--osc", osc_listener.destination],
        stdout=subprocess.PIPE, stderr=log, env=env, cwd=tmp_path,
    )
    lines: queue.Queue[str] = queue.Queue()

    def read() -> None:
        assert proc.stdout is not None
        for raw in proc.stdout:
            lines.put(raw.decode(errors="replace"))

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    try:
        # Wait for a live line that shows a sounding level ("... frames/s ... level 0.03").
        live = re.compile(r"frames/s.*level (\d+\.\d+)")
        while True:
            line = lines.get(timeout=30.0)
            m = live.search(line)
            if m and float(m.group(1)) > 0.0:
                break
        proc.send_signal(signal.SIGTERM)
        # The daemon's graceful-shutdown limit (bridge/daemon.py STOP_GRACE_S).
        code = proc.wait(timeout=STOP_GRACE_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        log.close()
    assert code == 0, (tmp_path / "stderr.log").read_text()
    reader.join(timeout=5.0)

    midi = mido.MidiFile(tmp_path / "demo.mid")
    held: dict[tuple[int, int], int] = {}
    ons = 0
    for msg in midi:
        # MIDI 1.0: a note-on with velocity 0 is a note-off.
        if msg.type == "note_on" and msg.velocity > 0:
            ons += 1
            held[(msg.channel, msg.note)] = held.get((msg.channel, msg.note), 0) + 1
        elif msg.type in ("note_off", "note_on"):
            key = (msg.channel, msg.note)
            assert held.get(key, 0) > 0, f"note-off without a note-on: {msg}"
            held[key] -= 1
    assert ons >= 1, "the demo played no note before it was stopped"
    assert {k: v for k, v in held.items() if v} == {}
