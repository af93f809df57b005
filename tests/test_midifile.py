"""Tests for bridge/outputs/midifile.py: the file is read back with mido (an independent
Standard MIDI File reader) and its header checked against the SMF 1.0 specification."""

from __future__ import annotations

import os
from pathlib import Path

import mido
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bridge.errors import DeviceError
from bridge.outputs import make_sink
from bridge.outputs.midifile import MidiFileRecorder, MidiFileSettings
from bridge.pipeline import Reading, VoiceView


def read_back(path: Path) -> list[tuple[float, bytes]]:
    """(seconds from the start, raw bytes) of every channel message, as mido plays them."""
    out = []
    now = 0.0
    for msg in mido.MidiFile(path):  # iteration converts delta ticks to seconds via tempo
        now += msg.time
        if not msg.is_meta:
            out.append((now, bytes(msg.bytes())))
    return out


def test_header_and_tempo(tmp_path: Path) -> None:
    path = tmp_path / "take.mid"
    rec = MidiFileRecorder(path, tempo_bpm=120, ticks_per_beat=960)
    rec.send(bytes.fromhex("903C40"), 0.0)
    rec.close()
    raw = path.read_bytes()
    # Standard MIDI File 1.0: "MThd", length 6, format 0, one track, division 960 ticks/beat.
    assert raw[:14] == b"MThd" + bytes.fromhex("00000006 0000 0001 03C0")
    assert raw[14:18] == b"MTrk"
    smf = mido.MidiFile(path)
    tempos = [m.tempo for m in smf.tracks[0] if m.type == "set_tempo"]
    assert tempos == [500_000]  # SMF: microseconds a quarter note; 120 bpm = 500,000 us


def test_times_within_a_tick_of_the_given_times(tmp_path: Path) -> None:
    path = tmp_path / "take.mid"
    rec = MidiFileRecorder(path, tempo_bpm=120, ticks_per_beat=960)
    sent = [
        (10.0, "B06500"),
        (10.0, "903C40"),
        (10.5, "E00060"),
        (11.25, "B00B7F"),
        (12.0004, "803C40"),
    ]
    for t, hx in sent:
        rec.send(bytes.fromhex(hx), t)
    assert not path.exists()  # nothing on disk before close
    rec.close()
    got = read_back(path)
    assert [g[1] for g in got] == [bytes.fromhex(hx) for _, hx in sent]
    tick = 1 / (960 * 2)  # 120 bpm: 2 beats a second
    for (t, _), (when, _) in zip(sent, got):
        assert when == pytest.approx(t - 10.0, abs=tick / 2 + 1e-9)


@settings(max_examples=40, deadline=None)
@given(
    gaps=st.lists(st.floats(0.0, 3.0), min_size=1, max_size=30),
    bpm=st.sampled_from([60.0, 90.0, 120.0, 133.0]),
    tpb=st.sampled_from([96, 480, 960]),
)
def test_timing_any_tempo(
    tmp_path_factory: pytest.TempPathFactory, gaps: list[float], bpm: float, tpb: int
) -> None:
    path = tmp_path_factory.mktemp("smf") / "t.mid"
    rec = MidiFileRecorder(path, tempo_bpm=bpm, ticks_per_beat=tpb, t0=0.0)
    t = 0.0
    times = []
    for g in gaps:
        t += g
        times.append(t)
        rec.send(bytes.fromhex("E00040"), t)
    rec.close()
    got = read_back(path)
    tempo = mido.bpm2tempo(bpm)
    tick_s = tempo / 1e6 / tpb
    assert len(got) == len(times)
    for want, (when, _) in zip(times, got):
        # rounded to the nearest tick; never cumulative drift
        assert when == pytest.approx(want, abs=tick_s / 2 + 1e-6)


def test_own_clock_when_no_time_is_given(tmp_path: Path) -> None:
    ticks = iter([5.0, 5.25, 6.0])
    rec = MidiFileRecorder(tmp_path / "c.mid", clock=lambda: next(ticks))
    for hx in ("903C40", "B00B10", "803C40"):
        rec.send(bytes.fromhex(hx))
    rec.close()
    assert [round(w, 4) for w, _ in read_back(tmp_path / "c.mid")] == [0.0, 0.25, 1.0]


def test_given_times_stay_on_their_clock(tmp_path: Path) -> None:
    # After times were given, a message without one (e.g. the note-offs of close())
    # lands at the last given time, not on an unrelated clock.
    rec = MidiFileRecorder(tmp_path / "g.mid", clock=lambda: 1e6)
    rec.send(bytes.fromhex("903C40"), 2.0)
    rec.send(bytes.fromhex("803C40"), 3.5)
    rec.send(bytes.fromhex("B07B00"))
    rec.close()
    assert [round(w, 4) for w, _ in read_back(tmp_path / "g.mid")] == [0.0, 1.5, 1.5]


def test_atomic_write_replaces_and_leaves_no_temp_files(tmp_path: Path) -> None:
    path = tmp_path / "take.mid"
    path.write_bytes(b"old")
    rec = MidiFileRecorder(path)
    rec.send(bytes.fromhex("903C40"), 0.0)
    assert path.read_bytes() == b"old"
    rec.close()
    rec.close()  # safe twice
    assert path.read_bytes()[:4] == b"MThd"
    assert sorted(os.listdir(tmp_path)) == ["take.mid"]
    with pytest.raises(DeviceError, match="already written"):
        rec.send(bytes.fromhex("903C40"), 1.0)


def test_unwritable_folder_is_a_device_error(tmp_path: Path) -> None:
    rec = MidiFileRecorder(tmp_path / "missing" / "take.mid")
    with pytest.raises(DeviceError, match="cannot write MIDI file"):
        rec.send(bytes.fromhex("903C40"), 0.0)  # the file is streamed: the first write fails
        rec.close()


def test_midifile_sink_records_what_the_midi_logic_plays(tmp_path: Path) -> None:
    path = tmp_path / "sink.mid"
    sink = make_sink("midifile", MidiFileSettings(path=path, ramp_s=0.0, program=19, bend_range=2))
    v = VoiceView("lead", 60.0, 261.63)
    v.level, v.present = 0.5, True
    r = Reading([], [v])
    with sink:
        for i in range(50):
            r.t = 100.0 + i * 0.02
            v.note = 60.0 + i * 0.01  # a slow upward glide
            sink.send(r)
        v.level = 0.0
        r.t = 101.5
        sink.send(r)
    got = read_back(path)
    msgs = [mido.Message.from_bytes(b) for _, b in got]
    # program change first (MIDI 1.0: C0 pp), RPN 0 = 2 semitones on the way
    assert msgs[0].type == "program_change" and msgs[0].program == 19
    ons = [(w, m) for (w, _), m in zip(got, msgs) if m.type == "note_on"]
    offs = [(w, m) for (w, _), m in zip(got, msgs) if m.type == "note_off"]
    assert len(ons) == 1 and ons[0][1].note == 60 and ons[0][0] == pytest.approx(0.0, abs=1e-3)
    assert len(offs) == 1 and offs[0][0] == pytest.approx(1.5, abs=1e-3)
    bends = [m.pitch for m in msgs if m.type == "pitchwheel"]
    # last bend: +0.49 semitone at R = 2 -> 8192*0.49/2 = 2007 above centre (DOMAIN.md section 6)
    assert bends[-1] == round(8192 * 0.49 / 2)
    assert msgs[-1].type == "control_change" and msgs[-1].control == 123  # All Notes Off
