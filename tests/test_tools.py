"""bridge/tools.py, checks.py, monitor.py and replay.py in-process: recording names, the checks, the monitor's updates, replay.

Real parts throughout: pseudo-terminals for serial devices, real files and sockets, the
real control server, a JACK server for the JACK check (a peer, skipped without jackd
unless FIELDBRIDGE_REQUIRE_PEERS=1), and mido (an independent MIDI file parser) to read
back what a replay wrote.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import socket
import subprocess
import sys
import threading
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import tomlkit

from bridge.commands import setup_for
from bridge.control import ControlServer
from bridge.errors import ConfigError, DeviceError
from bridge.frames import encode_text
from bridge.outputs.midi import MidiSettings
from bridge.outputs.osc import OscSettings
from bridge.profiles import Store
from bridge.recording import RecordingHeader, RecordingWriter
from bridge.sim import Performance, SimBoard, scenario
from bridge.checks import (
    Finding,
    check_control,
    check_exit_code,
    check_files,
    check_midi,
    check_osc,
    check_serial,
)
from bridge.monitor import _bar, engine_updates, snapshot
from bridge.replay import replay_recording
from bridge.tools import END_OF_FEED, Feed, recording_path, split_note

PROFILES = Path(__file__).resolve().parents[1] / "profiles"


@pytest.fixture
def store(tmp_path: Path) -> Store:
    """A copy of the repository's example store (rig, three venues, none active)."""
    root = tmp_path / "store"
    shutil.copytree(PROFILES, root)
    return Store(root)


# ---------------------------------------------------------------------- recording names


def test_a_bare_name_lives_in_the_recordings_folder(store: Store) -> None:
    folder = store.root / "recordings"
    assert recording_path(store, "friday-set") == folder / "friday-set.rec"
    assert recording_path(store, "Friday-Set") == folder / "friday-set.rec"  # folded, as venues
    assert recording_path(store, "take.2025") == folder / "take.2025"  # a suffix is kept


def test_a_name_with_a_folder_is_used_as_given(store: Store, tmp_path: Path) -> None:
    assert recording_path(store, str(tmp_path / "a.rec")) == tmp_path / "a.rec"
    assert recording_path(store, "./a.rec") == Path("./a.rec")
    assert recording_path(store, "takes/b") == Path("takes/b")


@pytest.mark.parametrize("bad", ["..", ".hidden", "a..b", "nul", "", "  ", "semi;colon",
                                 "x" * 65])
def test_unsafe_bare_names_are_refused(store: Store, bad: str) -> None:
    with pytest.raises(ConfigError):
        recording_path(store, bad)


def test_a_link_out_of_the_recordings_folder_is_refused(store: Store, tmp_path: Path) -> None:
    folder = store.root / "recordings"
    folder.mkdir()
    (folder / "escape.rec").symlink_to(tmp_path / "elsewhere.rec")
    with pytest.raises(ConfigError, match="outside"):
        recording_path(store, "escape")


# ---------------------------------------------------------------------- note names


@pytest.mark.parametrize(
    ("note", "name", "cents"),
    [
        (69.0, "A4", 0.0),  # ISO 16:1975: A4 = 440 Hz is MIDI note 69 (MIDI 1.0 spec)
        (60.0, "C4", 0.0),  # MIDI 1.0 spec: note 60 is middle C, C4 in scientific pitch notation
        (21.0, "A0", 0.0),  # 27.5 Hz, the lowest piano key [CRC Handbook table, DOMAIN.md 5]
        (108.0, "C8", 0.0),  # 4186.009 Hz [same table]
        (69.12, "A4", 12.0),
        (68.6, "A4", -40.0),
        (0.0, "C-1", 0.0),  # note 0 is C-1 when 60 is C4 (common practice)
    ],
)
def test_split_note(note: float, name: str, cents: float) -> None:
    got_name, got_cents = split_note(note)
    assert got_name == name
    assert got_cents == pytest.approx(cents, abs=1e-9)


def test_split_note_of_a_non_number() -> None:
    assert split_note(math.nan)[0] == "?"


# ---------------------------------------------------------------------- serial checks


@pytest.fixture
def pty_device() -> Iterator[str]:
    """A pseudo-terminal: a real character device like a USB serial port."""
    master, slave = os.openpty()
    path = os.ttyname(slave)
    yield path
    os.close(master)
    os.close(slave)


def test_a_usable_serial_device_passes(pty_device: str) -> None:
    f = check_serial(pty_device)
    assert f.ok, f
    assert "readable and writable" in f.detail


def test_a_link_to_the_device_is_followed(pty_device: str, tmp_path: Path) -> None:
    link = tmp_path / "usb-board-if00"
    link.symlink_to(pty_device)
    f = check_serial(str(link))
    assert f.ok and pty_device in f.detail


def test_a_missing_device_says_to_plug_it_in(tmp_path: Path) -> None:
    url = str(tmp_path / "by-id" / "usb-board-if00")
    f = check_serial(url)
    assert not f.ok and f.area == "device"
    assert url in f.detail and url in f.fix and "plug" in f.fix


def test_a_dangling_link_is_named_as_such(tmp_path: Path) -> None:
    link = tmp_path / "usb-board-if00"
    link.symlink_to(tmp_path / "ttyACM9")
    f = check_serial(str(link))
    assert not f.ok and "gone" in f.detail


def test_a_regular_file_is_not_a_serial_device(tmp_path: Path) -> None:
    p = tmp_path / "notes.txt"
    p.write_text("hello")
    f = check_serial(str(p))
    assert not f.ok and "not a device" in f.detail


# Imports first: this machine's Python may live where the other user cannot read.
_AS_OTHER_USER = """
import json, os, sys
from bridge.checks import check_serial
os.setgroups([]); os.setgid(65534); os.setuid(65534)
print(json.dumps(check_serial(sys.argv[1]).as_dict()))
"""


def _check_as_nobody(path: str) -> dict[str, Any]:
    """check_serial in a child process that runs as the unprivileged user 65534."""
    done = subprocess.run([sys.executable, "-c", _AS_OTHER_USER, path], capture_output=True,
                          text=True, timeout=60, check=False, cwd="/")
    assert done.returncode == 0, done.stderr
    result: dict[str, Any] = json.loads(done.stdout)
    return result


@pytest.mark.skipif(os.geteuid() != 0, reason="needs root to run a child as another user")
def test_a_device_of_a_group_we_are_not_in_says_usermod(pty_device: str) -> None:
    import grp

    gid = grp.getgrnam("dialout").gr_gid if "dialout" in {g.gr_name for g in grp.getgrall()} \
        else 20
    os.chown(pty_device, 0, gid)
    os.chmod(pty_device, 0o660)  # the usual mode of a USB serial device (common practice)
    f = _check_as_nobody(pty_device)
    assert f["ok"] is False
    group = grp.getgrgid(gid).gr_name
    assert f"sudo usermod -aG {group} $USER" in f["fix"] and "log out" in f["fix"]


def test_a_device_we_own_but_may_not_use_says_chmod(pty_device: str) -> None:
    if os.geteuid() == 0:  # root may open anything: check as an ordinary user that owns it
        os.chown(pty_device, 65534, 65534)
        os.chmod(pty_device, 0o000)
        f = _check_as_nobody(pty_device)
        ok, fix = f["ok"], f["fix"]
    else:
        os.chmod(pty_device, 0o000)
        found = check_serial(pty_device)
        ok, fix = found.ok, found.fix
    assert ok is False and f"chmod u+rw {pty_device}" in fix


def test_network_and_test_urls() -> None:
    assert check_serial("loop://").ok
    assert check_serial("socket://127.0.0.1:7000").ok
    # RFC 6761 section 6.4: names under .invalid never resolve.
    f = check_serial("socket://board.invalid:7000")
    assert not f.ok and "board.invalid" in f.detail
    assert not check_serial("socket://:7000").ok


# ---------------------------------------------------------------------- MIDI, OSC, daemon


def test_osc_destinations_are_resolved() -> None:
    found = check_osc(OscSettings(destinations=["127.0.0.1:9300", "synth.invalid:9000"]))
    by = {f.check: f for f in found}
    assert by["OSC 127.0.0.1:9300"].ok
    bad = by["OSC synth.invalid:9000"]  # RFC 6761: .invalid never resolves
    assert not bad.ok and "synth.invalid" in bad.detail and bad.fix
    assert check_osc(None)[0].ok


def test_no_midi_output_is_fine() -> None:
    assert check_midi(None)[0].ok


def test_the_alsa_check_matches_this_machine() -> None:
    found = check_midi(MidiSettings(api="alsa"))[0]
    usable = os.path.exists("/dev/snd/seq") and os.access("/dev/snd/seq", os.R_OK | os.W_OK)
    assert found.ok == usable
    if not found.ok:
        assert "/dev/snd/seq" in found.detail and found.fix


def test_no_jack_server_is_a_problem_with_a_fix(monkeypatch: pytest.MonkeyPatch) -> None:
    name = f"fbt-none-{uuid.uuid4().hex[:8]}"  # a server name nobody runs
    monkeypatch.setenv("JACK_DEFAULT_SERVER", name)
    found = check_midi(MidiSettings(api="jack"))
    assert len(found) == 1 and not found[0].ok
    assert name in found[0].detail and "jackd" in found[0].fix


@pytest.mark.peer
def test_a_running_jack_server_passes() -> None:
    sys.path.insert(0, str(Path(__file__).parent / "e2e"))
    try:
        from jack import start_jack
    finally:
        sys.path.pop(0)
    server = start_jack()
    saved = os.environ.get("JACK_DEFAULT_SERVER")
    os.environ["JACK_DEFAULT_SERVER"] = server.name
    try:
        found = check_midi(MidiSettings(api="jack", connect=["no-such-synth:in"]))
        assert found[0].ok, found[0]
        assert server.name in found[0].detail
        port = found[1]
        assert port.check == "MIDI port no-such-synth:in" and not port.ok
    finally:
        if saved is None:
            os.environ.pop("JACK_DEFAULT_SERVER", None)
        else:
            os.environ["JACK_DEFAULT_SERVER"] = saved
        server.stop()


def test_the_control_check(short_dir: Path) -> None:
    path = short_dir / "control.sock"
    none = check_control(path)
    assert none.ok and "none running" in none.detail
    status = {"ok": True, "profile": "tin-lantern", "frames_per_s": 50.0, "link": "streaming"}
    server = ControlServer(path, lambda req: status)
    server.start()
    try:
        running = check_control(path)
        assert running.ok and "tin-lantern" in running.detail and "streaming" in running.detail
    finally:
        server.stop()
    path.touch()  # a socket file left by a daemon that was killed
    stale = check_control(path)
    assert stale.ok and "stale" in stale.detail


# ---------------------------------------------------------------------- files and exit codes


def test_check_files_names_a_broken_venue(store: Store) -> None:
    rig, found = check_files(store)
    assert rig is not None
    by = {f.check: f for f in found}
    assert by["rig file"].ok
    assert all(by[f"venue {v}"].ok for v in ("tin-lantern", "saltmarsh-chapel", "ferry-shed"))
    assert not by["active venue"].ok and "fieldbridge use" in by["active venue"].fix
    path = store.venues_dir / "ferry-shed.toml"
    doc = tomlkit.parse(path.read_text())
    doc["channels"]["volume"]["model"] = "spline-of-doom"
    path.write_text(tomlkit.dumps(doc))
    store.activate("tin-lantern")
    _rig, found = check_files(store)
    by = {f.check: f for f in found}
    broken = by["venue ferry-shed"]
    assert not broken.ok and broken.area == "file"
    assert "channels.volume.model" in broken.detail and str(path) in broken.detail
    assert by["active venue"].ok
    assert check_exit_code(found) == 3


def test_check_exit_codes() -> None:
    ok = Finding("a", True, "fine")
    device = Finding("b", False, "gone", "plug it in", "device")
    file = Finding("c", False, "bad key", "edit it", "file")
    assert check_exit_code([ok]) == 0
    assert check_exit_code([ok, device]) == 4  # cli.py: 4 device
    assert check_exit_code([ok, device, file]) == 3  # cli.py: 3 bad file (a file first)


# ---------------------------------------------------------------------- monitor updates


def _sim_board(store: Store, perf: Performance) -> SimBoard:
    rig = store.load_rig()
    assert rig.sim is not None
    return SimBoard(rig.sim, perf)


def test_engine_updates_take_every_nth_frame_and_snapshot_them(store: Store) -> None:
    setup = setup_for(store, "tin-lantern")
    board = _sim_board(store, scenario("warmup", 1))
    frames = (board.next_values() for _ in range(200))
    updates = list(engine_updates(frames, setup.engine(), 4, setup.profile))
    assert [u["frame"] for u in updates] == list(range(4, 201, 4))
    snaps = [snapshot(u, i * 0.08, "simulated board") for i, u in enumerate(updates)]
    assert any(v["present"] for s in snaps for v in s["voices"])
    for s in snaps:
        assert s["profile"] == "tin-lantern"
        assert [c["name"] for c in s["channels"]] == ["pitch", "volume", "ref"]
        for v in s["voices"]:
            # ISO 16 (A4 = 440 Hz) and equal temperament: f = 440 * 2**((n - 69) / 12)
            assert v["hz"] == pytest.approx(440.0 * 2 ** ((v["note"] - 69.0) / 12.0), abs=2e-3)
            name, _cents = split_note(v["note"])
            assert v["note_name"] == name and abs(v["cents"]) <= 50.0
        json.dumps(s)  # plain data, one JSON line per update


def test_meter_bars() -> None:
    assert _bar(0.0, 10) == "\u00b7" * 10
    assert _bar(1.0, 10) == "\u2588" * 10
    assert _bar(2.0, 10) == "\u2588" * 10  # clamped
    assert _bar(math.nan, 10) == "\u00b7" * 10
    half = _bar(0.5, 10)
    assert len(half) == 10 and half.startswith("\u2588" * 5)


def test_a_feed_hands_over_items_and_the_producers_error() -> None:
    def produce() -> Iterator[int]:
        yield 1
        yield 2
        raise DeviceError("the board went away")

    feed = Feed(produce(), threading.Event(), "test-feed").start()
    assert feed.get(5.0) == 1
    assert feed.get(5.0) == 2
    with pytest.raises(DeviceError, match="went away"):
        feed.get(5.0)
    feed.stop()


def test_a_feed_stops_a_producer_that_keeps_going() -> None:
    stop = threading.Event()

    def produce() -> Iterator[int]:
        n = 0
        while not stop.is_set():
            n += 1
            yield n

    feed = Feed(produce(), stop, "test-feed").start()
    assert feed.get(5.0) == 1
    feed.stop()
    assert stop.is_set()
    item = feed.get(1.0)
    while isinstance(item, int):  # what was queued before the stop, then the end
        item = feed.get(1.0)
    assert item is END_OF_FEED


# ---------------------------------------------------------------------- replay


def _record(store: Store, path: Path, perf: Performance, seconds: float,
            gap_at: float | None = None, gap_s: float = 0.0) -> int:
    """Write a recording of the simulated board on simulated time; returns frames written."""
    rig = store.load_rig()
    board = _sim_board(store, perf)
    window = rig.board.window_s
    header = RecordingHeader(frame_format=rig.frames.format,
                             frame_settings=rig.frames.model_dump(mode="json"),
                             channels=[c.name for c in rig.channels],
                             kinds=[c.kind for c in rig.channels])
    n = round(seconds / window)
    with RecordingWriter(path, header) as w:
        for i in range(n):
            t = i * window
            if gap_at is not None and t >= gap_at:
                t += gap_s
            w.write(t, board.next_bytes())
    return n


def _midi_file_events(path: Path, t0: float) -> list[tuple[float, Any]]:
    """(seconds, message) for every non-meta message, as mido reads the file. The file's
    clock starts at its first message, which the replay sent at the first frame, ``t0``."""
    import mido

    t = t0
    out = []
    for m in mido.MidiFile(str(path)):  # iterating gives delta times in seconds
        t += m.time
        if not m.is_meta:
            out.append((t, m))
    return out


def test_replay_plays_the_recording_and_its_bends_carry_the_pitch(store: Store,
                                                                  tmp_path: Path) -> None:
    rec = tmp_path / "warmup.rec"
    n = _record(store, rec, scenario("warmup", 2), 8.0)
    rig = store.load_rig()
    setup = setup_for(store, "tin-lantern")
    mid = tmp_path / "warmup.mid"
    result = replay_recording(rec, rig, setup, every=1, midi_file=mid)
    # The decoder starts unsynchronised and drops everything up to the first line end:
    # the first frame, counted as one fragment (frames.py), then every other one.
    assert result.frames == n - 1 and result.drops == {"fragment": 1}
    assert len(result.records) == result.frames
    assert result.osc_datagrams >= result.frames
    assert result.duration_s == pytest.approx((n - 2) * rig.board.window_s, abs=1e-6)
    assert [s["t"] for s in result.seconds] == list(range(1, len(result.seconds) + 1))

    events = _midi_file_events(mid, result.t[0])
    kinds: dict[str, int] = {}
    for _t, m in events:
        kinds[m.type] = kinds.get(m.type, 0) + 1
    assert kinds == result.midi_counts and sum(kinds.values()) == result.midi_messages

    # Slide mode: the sounding pitch is the held note plus the bend. MIDI 1.0 pitch bend:
    # value (MSB<<7|LSB) in 0..16383, centre 8192, one step R/8192 semitones with the
    # sensitivity R set by RPN 0 (the rig's bend_range). mido reports value - 8192.
    assert rig.outputs.midi is not None and rig.outputs.midi.mode == "slide"
    bend_range = rig.outputs.midi.bend_range
    times = list(result.t)
    notes = list(result.voices[0].note)
    # Messages of one frame share its time; the synth sounds their combined effect (a
    # moved note's re-centred bend comes just before its note-on, by design).
    frames: dict[float, list[Any]] = {}
    for t, m in events:
        frames.setdefault(round(t, 4), []).append(m)
    held: int | None = None
    bend = 0
    checked = 0
    for t, msgs in frames.items():
        for m in msgs:
            if m.type == "note_on" and m.velocity > 0:
                held = m.note
            elif m.type in ("note_off", "note_on") and m.note == held:
                held = None
            elif m.type == "pitchwheel":
                bend = m.pitch
        if held is None or not any(m.type == "pitchwheel" for m in msgs):
            continue
        i = min(range(len(times)), key=lambda k: abs(times[k] - t))
        assert abs(times[i] - t) < 0.002, "MIDI sent between frames"
        sounding = held + bend * bend_range / 8192.0
        # rounding to the nearest step: at most half a step, 0.073 cents at R = 12
        assert abs(sounding - notes[i]) * 100.0 <= 50.0 * bend_range / 8192.0 + 1e-6
        checked += 1
    assert checked > 100, "too few bends to compare"


def test_a_gap_in_the_recording_ends_the_held_note(store: Store, tmp_path: Path) -> None:
    rec = tmp_path / "gap.rec"
    perf = Performance(4).silence(0.5).glide(0.4, pitch=0.4, volume=0.3).hold(60.0)
    _record(store, rec, perf, 4.0, gap_at=2.0, gap_s=1.5)
    rig = store.load_rig()
    mid = tmp_path / "gap.mid"
    result = replay_recording(rec, rig, setup_for(store, "tin-lantern"), midi_file=mid)
    assert result.silences == 1
    held: set[int] = set()
    after_gap: set[int] | None = None
    for t, m in _midi_file_events(mid, result.t[0]):
        if after_gap is None and t >= 2.0 + 1.5 - 1e-6:
            after_gap = set(held)  # what still sounded when playing resumed
        if m.type == "note_on" and m.velocity > 0:
            held.add(m.note)
        elif m.type in ("note_on", "note_off"):
            held.discard(m.note)
    assert after_gap == set(), "a note kept sounding across a lost stretch of recording"
    assert held == set(), "a note sounds after the end"


def test_replay_at_the_recorded_pace_gives_the_same_frames(store: Store, tmp_path: Path) -> None:
    rec = tmp_path / "short.rec"
    _record(store, rec, scenario("warmup", 3), 0.6)
    rig = store.load_rig()
    fast = replay_recording(rec, rig, setup_for(store, "tin-lantern"))
    paced = replay_recording(rec, rig, setup_for(store, "tin-lantern"), realtime=True)
    assert paced.frames == fast.frames
    assert paced.midi_counts == fast.midi_counts


def test_replay_sends_osc_to_a_given_receiver(store: Store, tmp_path: Path) -> None:
    rec = tmp_path / "osc.rec"
    _record(store, rec, scenario("warmup", 3), 1.0)
    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind(("127.0.0.1", 0))
    rx.settimeout(0.0)
    try:
        result = replay_recording(rec, store.load_rig(), setup_for(store, "tin-lantern"),
                                  osc_to=f"127.0.0.1:{rx.getsockname()[1]}")
        from pythonosc.osc_bundle import OscBundle  # an independent OSC 1.0 parser

        got = []
        while True:
            try:
                got.append(rx.recv(65536))
            except BlockingIOError:
                break
    finally:
        rx.close()
    assert len(got) == result.osc_datagrams > 0
    assert all(OscBundle.dgram_is_bundle(d) for d in got[:-1])  # the last may be a silence


def test_replay_refuses_a_recording_of_other_channels(store: Store, tmp_path: Path) -> None:
    rec = tmp_path / "other.rec"
    with RecordingWriter(rec, RecordingHeader(channels=["a", "b"], kinds=["count", "count"])) as w:
        w.write(0.0, encode_text([1, 2]))
    with pytest.raises(ConfigError, match="recorded channels"):
        replay_recording(rec, store.load_rig(), setup_for(store, "tin-lantern"))

