"""What the MIDI output means, heard: record held pitches (with pitch bend and one moved
note) to a Standard MIDI File, render it with a software synthesizer, track the pitch of
the audio with an independent pitch tracker, and compare with the intended pitch.

Reference: f = 440 * 2^((n - 69)/12) (ISO 16:1975; DOMAIN.md section 5), which both the
synthesizer's tuning and the tracker's "-u midi" output follow; bend values from the
MIDI 1.0 Detailed Specification with RPN 0 = 12 semitones.
"""

from __future__ import annotations

import statistics
import subprocess
from dataclasses import dataclass, field
from pathlib import Path

import mido
import pytest

try:
    from .peers import peers_required, require
except ImportError:
    from peers import peers_required, require  # type: ignore[no-redef]

from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.outputs.midifile import MidiFileRecorder

pytestmark = pytest.mark.peer

SOUNDFONT = Path("/usr/share/sounds/sf2/TimGM6mb.sf2")
# General MIDI program 81 (80 counted from 0), a square-wave lead: steady, no vibrato, and
# it tracked best of the sustained programs tried (flute, clarinet, strings, organ, choir).
PROGRAM = 80
SEGMENT_S = 1.0
FRAME_S = 0.01  # readings at 100 Hz, like a sensor board
EDGE_S = 0.15  # attack and transitions: skip this much at each end of a segment
# Held pitches (fractional MIDI notes). With bend range 12 and no move margin:
# 69 plain, +6 and +12 by bend (16383, the top value), then 84.3 is 15.3 above the held
# 69, so the note moves (to 84, +0.3 bend), then bends down from there.
TARGETS = [69.0, 75.0, 81.0, 84.3, 79.5, 76.7]
# 15 cents: about 1.5 times the 10-cent melodic just-noticeable difference (Hill & Summers,
# JASA 2007). It has to absorb the renderer too: its default pitch-wheel modulator
# scales the bend by 127/128 (SoundFont 2.01 default modulators, from memory), about 0.8
# cents short per semitone of bend, so 9 cents at +12.
TOLERANCE_CENTS = 15.0


@dataclass
class Voice:
    name: str = "lead"
    note: float = 69.0
    hz: float = 440.0
    level: float = 0.5
    present: bool = True


@dataclass
class Reading:
    seq: int = 0
    t: float = 0.0
    channels: list[object] = field(default_factory=list)
    voices: list[Voice] = field(default_factory=lambda: [Voice()])


def soundfont() -> Path:
    if SOUNDFONT.exists():
        return SOUNDFONT
    reason = f"sound font {SOUNDFONT} is missing (Debian package timgm6mb-soundfont)"
    if peers_required():
        pytest.fail(f"{reason}; FIELDBRIDGE_REQUIRE_PEERS=1 forbids skipping")
    pytest.skip(reason)


def record(path: Path) -> None:
    settings = MidiSettings(
        mode="slide",
        bend_range=12,
        move_margin=0.0,
        program=PROGRAM,
        level_out="cc7",
        controller=7,
        ramp_s=0.0,
        velocity=100,
    )
    sink = MidiSink(settings, [MidiFileRecorder(path)])
    reading = Reading()
    steps = round(SEGMENT_S / FRAME_S)
    with sink:
        for k, target in enumerate(TARGETS):
            for i in range(steps):
                reading.t = k * SEGMENT_S + i * FRAME_S
                reading.voices[0].note = target
                sink.send(reading)
        reading.voices[0].level = 0.0  # release, then a quiet tail
        for i in range(50):
            reading.t = len(TARGETS) * SEGMENT_S + i * FRAME_S
            sink.send(reading)


def test_rendered_pitch_matches_intended_pitch(tmp_path: Path) -> None:
    fluidsynth = require("fluidsynth")
    aubiopitch = require("aubiopitch")
    sf2 = soundfont()
    mid, wav = tmp_path / "held.mid", tmp_path / "held.wav"
    record(mid)

    notes = [m.note for m in mido.MidiFile(mid) if m.type == "note_on" and m.velocity > 0]
    assert notes == [69, 84]  # one note held through three segments, then moved

    # -R 0 -C 0: no reverb or chorus, so each segment is one clean pitch.
    render = subprocess.run(
        [
            fluidsynth,
            "-ni",
            "-R",
            "0",
            "-C",
            "0",
            "-F",
            str(wav),
            "-r",
            "44100",
            str(sf2),
            str(mid),
        ],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert render.returncode == 0 and wav.exists(), render.stderr
    track = subprocess.run(
        [aubiopitch, "-i", str(wav), "-p", "yinfft", "-u", "midi"],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert track.returncode == 0, track.stderr
    rows = [tuple(map(float, line.split())) for line in track.stdout.splitlines() if line.strip()]

    report = []
    for k, target in enumerate(TARGETS):
        start, end = k * SEGMENT_S + EDGE_S, (k + 1) * SEGMENT_S - EDGE_S
        pitches = [p for t, p in rows if start <= t <= end]
        assert len(pitches) > 50, f"segment {k}: only {len(pitches)} tracker frames"
        median_cents = (statistics.median(pitches) - target) * 100
        within = sum(abs(p - target) * 100 <= TOLERANCE_CENTS for p in pitches) / len(pitches)
        report.append(f"{target}: {median_cents:+.1f} cents, {within:.0%} of frames within")
        assert abs(median_cents) <= TOLERANCE_CENTS, report
        # Pitch trackers slip an octave now and then; most frames must still agree.
        assert within >= 0.75, report
