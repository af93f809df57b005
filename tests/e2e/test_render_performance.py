"""The whole chain, heard: a simulated performer plays held notes on the simulated board;
the frames go through calibration, drift tracking, smoothing and mapping; the MIDI
output is recorded to a Standard MIDI File, rendered by a software synthesizer and
tracked by an independent pitch tracker. Where the hand is steady, the tracked pitch must
follow the intended pitch (linear in hand distance) within 15 cents.

References: f = 440 * 2^((n - 69)/12) (ISO 16:1975, DOMAIN.md section 5), followed by the
synthesizer's tuning and by the tracker's "-u midi" output; 15 cents is about 1.5 times
the 10-cent melodic just-noticeable difference (Hill & Summers, JASA 2007).
"""

from __future__ import annotations

import statistics
import subprocess
from pathlib import Path

import mido
import numpy as np
import pytest

try:
    from .peers import require
    from .test_render_pitch import PROGRAM, soundfont
except ImportError:  # run from inside tests/e2e
    from peers import require  # type: ignore[no-redef]
    from test_render_pitch import PROGRAM, soundfont  # type: ignore[no-redef]

from bridge.mapping import PitchMap, PitchSettings
from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.outputs.midifile import MidiFileRecorder
from bridge.pipeline import ChannelSettings, Engine, VoiceSettings
from bridge.sim import Performance, SimBoard, SimSettings
from bridge.soundcheck import fit_rig, simulated_holds

pytestmark = pytest.mark.peer

TOLERANCE_CENTS = 15.0
DISTANCES = [0.40, 0.25, 0.15, 0.09, 0.05]  # metres from the pitch antenna
HOLD_S, MOVE_S, SETTLE_S = 1.2, 0.3, 0.4


def perform(path: Path) -> list[tuple[float, float, float]]:
    """Play the performance into a MIDI file; returns (start, end, intended note) per hold."""
    s = SimSettings(seed=11, window_s=0.01, kind="period", with_reference=True)
    names = s.names
    roles = {"pitch": "pitch", "volume": "volume", "ref": "reference"}
    channels = [ChannelSettings(name=n, role=roles[n], kind="period") for n in names]
    cal = fit_rig(channels, simulated_holds(s, names, seed=11, marks=(0.25,)), rate_hz=100.0)
    pitch = PitchSettings(lowest_note=48, span_semitones=36)
    voice = VoiceSettings(pitch_channel="pitch", volume_channel="volume", pitch=pitch)
    engine = Engine(channels, [voice], cal.channels, rate_hz=100.0,
                    reference_base=cal.reference_base)

    perf = Performance(5, tremor_m=0.0002).silence(1.0)
    for d in DISTANCES:
        perf.glide(MOVE_S, pitch=d, volume=0.45).hold(HOLD_S, label=f"{d:.2f}")
    perf.leave(1.0)
    board = SimBoard(s.model_copy(update={"seed": 12}), perf)
    n = int(round(perf.duration / s.window_s))
    values, truth = board.run(n)

    # Bend range 2 (the General MIDI default, from memory): the held note moves legato and
    # bends stay small, so the renderer's own bend scaling (about 0.8 cents short per
    # semitone of bend, see test_render_pitch.py) stays under 2 cents.
    settings = MidiSettings(mode="slide", bend_range=2, program=PROGRAM, level_out="cc7",
                            controller=7, ramp_s=0.0, velocity=100, on_level=0.0001,
                            off_level=0.00005)
    with MidiSink(settings, [MidiFileRecorder(path)]) as sink:
        for i, row in enumerate(values.tolist()):
            reading = engine.process(row, i, i * s.window_s)
            sink.send(reading)

    ideal = PitchMap(pitch)
    windows = []
    for m in perf.marks:
        start, end = m.start + SETTLE_S, m.end - 0.1
        sel = (truth.t >= start) & (truth.t <= end)
        intended = float(np.mean([ideal.note(p) for p in truth.pos_pitch[sel]]))
        windows.append((start, end, intended))
    return windows


def test_tracked_pitch_follows_the_simulated_performance(tmp_path: Path) -> None:
    fluidsynth = require("fluidsynth")
    aubiopitch = require("aubiopitch")
    sf2 = soundfont()
    mid, wav = tmp_path / "performance.mid", tmp_path / "performance.wav"
    windows = perform(mid)
    assert any(m.type == "note_on" for m in mido.MidiFile(mid))

    render = subprocess.run(
        [fluidsynth, "-ni", "-R", "0", "-C", "0", "-F", str(wav), "-r", "44100", str(sf2),
         str(mid)],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert render.returncode == 0 and wav.exists(), render.stderr
    track = subprocess.run(
        [aubiopitch, "-i", str(wav), "-p", "yinfft", "-u", "midi"],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert track.returncode == 0, track.stderr
    rows = [tuple(map(float, line.split())) for line in track.stdout.splitlines() if line.strip()]

    report = []
    for start, end, intended in windows:
        pitches = [p for t, p in rows if start <= t <= end and p > 0]
        assert len(pitches) > 40, f"{start:.1f} s: only {len(pitches)} tracker frames"
        median_cents = (statistics.median(pitches) - intended) * 100
        within = sum(abs(p - intended) * 100 <= TOLERANCE_CENTS for p in pitches) / len(pitches)
        report.append(f"{intended:.2f}: {median_cents:+.1f} cents, {within:.0%} within")
    for (start, end, intended), line in zip(windows, report):
        median = float(line.split(":")[1].split("cents")[0])
        assert abs(median) <= TOLERANCE_CENTS, report
        # octave slips of the tracker aside, most frames agree
        assert float(line.split(",")[1].split("%")[0]) >= 75, report
