"""A whole evening in one test: soundcheck through the running daemon, the monitor stream,
and venue switches while a note is held.

Real parts throughout: the simulated board speaks through a pseudo-terminal, the daemon
reads it with pyserial, the capture reads the daemon's control socket, profiles are real
TOML files in a real store, and OSC control messages are real UDP datagrams.
"""

from __future__ import annotations

import shutil
import socket
import threading
import time
from pathlib import Path

import mido
import numpy as np
import pytest

from bridge.commands import setup_for
from bridge.control import ControlClient
from bridge.daemon import Daemon
from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.outputs.osc import encode_message
from bridge.profiles import Store, VenueProfile
from bridge.sim import SimBoard
from bridge.soundcheck import Hold, default_steps, fit_rig, paced_performance
from bridge.sources import PtyBoard

REPO = Path(__file__).resolve().parents[2]
MOVE_S, SETTLE_S, HOLD_S = 1.0, 0.5, 2.0


class Collector:
    """A MIDI port that keeps every message it is sent (with the daemon's frame count)."""

    name = "collector"

    def __init__(self) -> None:
        self.messages: list[bytes] = []
        self.lock = threading.Lock()

    def send(self, data: bytes) -> None:
        with self.lock:
            self.messages.append(bytes(data))

    def close(self) -> None:
        pass


def sounding(messages: list[bytes]) -> set[tuple[int, int]]:
    """(channel, note) pairs left sounding after these messages (mido parses them)."""
    on: set[tuple[int, int]] = set()
    for raw in messages:
        msg = mido.Message.from_bytes(list(raw))
        if msg.type == "note_on" and msg.velocity > 0:
            on.add((msg.channel, msg.note))
        elif msg.type in ("note_off", "note_on"):
            on.discard((msg.channel, msg.note))
        elif msg.type == "control_change" and msg.control == 123:  # All Notes Off
            on = {x for x in on if x[0] != msg.channel}
    return on


def wait_for(cond, timeout: float = 10.0) -> None:
    end = time.monotonic() + timeout
    while not cond():
        if time.monotonic() > end:
            raise AssertionError("condition not met in time")
        time.sleep(0.01)


@pytest.fixture
def store(tmp_path: Path) -> Store:
    home = tmp_path / "home"
    shutil.copytree(REPO / "profiles", home)
    s = Store(home)
    s.activate("tin-lantern")
    return s


def test_soundcheck_through_daemon_then_switch_with_held_notes(store: Store, tmp_path: Path):
    rig = store.load_rig()
    assert rig.sim is not None and rig.sim.text_seq, "the example rig's simulator sends seq"
    window = rig.sim.window_s
    steps = default_steps(0.5, 0.03, [0.25])
    perf = paced_performance(steps, move_s=MOVE_S, settle_s=SETTLE_S, hold_s=HOLD_S, seed=4)
    # After the soundcheck the performer plays and holds a note near the pitch antenna.
    perf.glide(0.5, pitch=0.12, volume=0.3).hold(30.0, label="play")
    board = SimBoard(rig.sim, perf)
    link = str(tmp_path / "board")
    pty = PtyBoard(board.next_bytes, window, link_path=link)

    setup = setup_for(store)
    setup.source = setup.source.model_copy(update={"url": link, "quiet_after_s": 2.0})
    port = Collector()
    midi = MidiSink(MidiSettings(mode="slide", ramp_s=0.0, on_level=0.001, off_level=0.0005),
                    [port])
    sock = tmp_path / "run" / "control.sock"
    osc_in = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    osc_in.bind(("127.0.0.1", 0))
    osc_port = osc_in.getsockname()[1]
    osc_in.close()
    daemon = Daemon(setup, [midi], loader=lambda name: setup_for(store, name),
                    control_path=sock, osc_control=f"127.0.0.1:{osc_port}")
    runner = threading.Thread(target=daemon.run, daemon=True)
    pty.start()
    runner.start()
    try:
        wait_for(lambda: sock.exists() and daemon.counters.frames > 0)
        client = ControlClient(sock)

        # --- capture through the daemon: raw frames by sequence number = simulator frame
        rows: dict[int, list[int]] = {}
        last_mark = max(m.end for m in perf.marks if m.label != "play")
        for line in client.watch(every=1, raw=True):
            rows[line["seq"]] = line["raw"]
            if line["seq"] * window > last_mark:
                break
        holds = []
        for m in perf.marks:
            if m.label == "play":
                continue
            i0 = int((m.start + MOVE_S * 0 + SETTLE_S) / window) + 1
            i1 = int(m.end / window) - 1
            seqs = [i for i in range(i0, i1) if i in rows]
            assert len(seqs) > 0.9 * (i1 - i0), f"frames missing from the {m.label} hold"
            dist = None if m.label == "away" else m.d_pitch
            holds.append(Hold(m.label, np.array([rows[i] for i in seqs], float), dist))
        cal = fit_rig(rig.channels, holds, rate_hz=1.0 / window)
        # The simulator's law is a power law: three points must recover it closely.
        assert cal.channels["pitch"].model == "power"
        assert cal.channels["pitch"].fit_error < 0.02
        store.save_venue("evening-test", VenueProfile.from_calibration(cal, notes="e2e"))
        store.activate("evening-test")
        reply = client.request({"op": "activate", "name": "evening-test"})
        assert reply["ok"], reply
        assert daemon.setup.profile == "evening-test"

        # --- monitor stream: readings with the new profile, a note sounding
        seen = []
        for obj in client.watch(every=2):
            seen.append(obj)
            if obj["voices"][0]["level"] > 0 and obj["voices"][0]["present"]:
                break
        assert seen[-1]["profile"] == "evening-test"
        assert {c["name"] for c in seen[-1]["channels"]} == {"pitch", "volume", "ref"}
        wait_for(lambda: sounding(port.messages))  # a note is held now

        # --- switches while the note is held: through the socket and through OSC
        for name in ("saltmarsh-chapel", "tin-lantern"):
            before = len(port.messages)
            held = sounding(port.messages)
            assert held, "a note must be held before the switch"
            reply = client.request({"op": "activate", "name": name})
            assert reply["ok"], reply
            # within one frame period, counted on the frame counter, not wall time
            assert daemon.counters.switch_frames[-1] <= 1
            # the held notes ended before anything new started
            after = port.messages[before:]
            def is_off(m: bytes) -> bool:
                return m[0] & 0xF0 == 0x80 or (m[0] & 0xF0 == 0x90 and m[2] == 0)

            first_on = next((i for i, m in enumerate(after) if m[0] & 0xF0 == 0x90 and m[2]),
                            len(after))
            ended_first = {(m[0] & 0x0F, m[1]) for m in after[:first_on] if is_off(m)}
            assert held <= ended_first, "a held note was not ended before the next note on"
            wait_for(lambda: sounding(port.messages))  # playing resumed under the new profile

        # an invalid request changes nothing
        reply = client.request({"op": "activate", "name": "no-such-room"})
        assert not reply["ok"] and daemon.setup.profile == "tin-lantern"

        # OSC control input (a phone app would send this): switch back by OSC
        tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        tx.sendto(encode_message("/fieldbridge/control/activate", "evening-test", types="s"),
                  ("127.0.0.1", osc_port))
        tx.close()
        wait_for(lambda: daemon.setup.profile == "evening-test")
    finally:
        daemon.request_stop()
        runner.join(timeout=5)
        pty.stop()
    assert not runner.is_alive()
    assert sounding(port.messages) == set(), "a note was left on"
