"""The MIDI sink on a real JACK MIDI port, checked by what jack_midi_dump receives.

Expected bytes are written out by hand from the MIDI 1.0 Detailed Specification (MMA),
using the pitch-bend convention v = 8192 + round(8192*s/R) of DOMAIN.md section 6, not
computed by the code under test.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import pytest

# jack_server and midi_dump are fixtures: importing them here makes pytest see them.
try:
    from .jack import JackServer, MidiDump, jack_server, midi_dump, require  # noqa: F401
except ImportError:
    from jack import (  # type: ignore[no-redef]  # noqa: F401
        JackServer,
        MidiDump,
        jack_server,
        midi_dump,
        require,
    )

from bridge.errors import DeviceError
from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.outputs.midiports import open_ports

pytestmark = pytest.mark.peer


@dataclass
class Voice:
    name: str = "v1"
    note: float = 69.0
    hz: float = 440.0
    level: float = 0.0
    present: bool = True


@dataclass
class Reading:
    seq: int = 0
    t: float = 0.0
    channels: list[object] = field(default_factory=list)
    voices: list[Voice] = field(default_factory=lambda: [Voice()])


def h(text: str) -> list[bytes]:
    """'B0 65 00, 90 45 40' -> one bytes object per comma-separated message."""
    return [bytes.fromhex(m) for m in text.split(",")]


# Scripted play: (t, note, level) and, for each, what the wire must carry.
# Settings: channel 1, slide mode, bend range 12, 14-bit expression (CC11/CC43), no ramp.
SCRIPT: list[tuple[float, float, float, str]] = [
    # The first note repeats RPN 0 (a synth connected after start missed it), then
    # level 0.25 -> sqrt law 0.5 -> 8192 of 16383 = MSB 0x40, LSB 0x00; velocity round(127*0.5)=64.
    (
        0.00,
        69.0,
        0.25,
        "B0 65 00, B0 64 00, B0 06 0C, B0 26 00, B0 65 7F, B0 64 7F, B0 0B 40, B0 2B 00, 90 45 40",
    ),
    # +6 semitones on key 69 at R=12: 8192 + 4096 = 12288 = E0 00 60.
    (0.01, 75.0, 0.25, "E0 00 60"),
    # -3 semitones: 8192 - 2048 = 6144 = LSB 0x00, MSB 0x30.
    (0.02, 66.0, 0.25, "E0 00 30"),
    # level 0.36 -> 0.6 -> round(0.6*16383) = 9830 = MSB 76 (0x4C), LSB 102 (0x66).
    (0.03, 66.0, 0.36, "B0 0B 4C, B0 2B 66"),
    # 9830 -> level 0.3610 -> 0.60083 -> 9843: same MSB, so only the LSB (0x73) goes out.
    (0.04, 66.0, 0.3610, "B0 2B 73"),
    # +12.5 is past 12 - 0.5 margin: bend re-centred for key 82 (81.5 -> -0.5:
    # 8192 - 341 = 7851 = LSB 0x2B MSB 0x3D), then note on 82, then note off 69 (legato).
    (0.05, 81.5, 0.3610, "E0 2B 3D, 90 52 4C, 80 45 40"),
    # Level at or below off_level: note off, level 0 (MSB changes: both bytes).
    (0.06, 81.5, 0.0, "80 52 40, B0 0B 00, B0 2B 00"),
]

START = (
    # RPN 0 = 12 semitones, 0 cents, then RPN null (MIDI 1.0 Detailed Specification).
    "B0 65 00, B0 64 00, B0 06 0C, B0 26 00, B0 65 7F, B0 64 7F,"
    # centred bend, 14-bit level 0
    " E0 00 40, B0 0B 00, B0 2B 00"
)


def settings(**kw: object) -> MidiSettings:
    base: dict[str, object] = {
        "api": "jack",
        "client_name": f"fbmidi{os.getpid()}",
        "port_name": "out",
        "mode": "slide",
        "bend_range": 12,
        "level_out": "cc14",
        "controller": 11,
        "ramp_s": 0.0,
        "max_rate_hz": 1e6,
    }
    base.update(kw)
    return MidiSettings(**base)  # type: ignore[arg-type]


def play(sink: MidiSink, dump: MidiDump, *, started: bool) -> None:
    """Play SCRIPT; ``started``: the sink sent its set-up at open (else with the first reading)."""
    reading = Reading()
    if started:
        assert dump.take(len(h(START))) == h(START)
    for i, (t, note, level, wire) in enumerate(SCRIPT):
        reading.t = t
        reading.voices[0].note = note
        reading.voices[0].level = level
        sink.send(reading)
        if i == 0 and not started:
            wire = f"{START}, {wire}"
        got = dump.take(len(h(wire)))
        assert got == h(wire), f"at t={t}: {[g.hex(' ') for g in got]}"
        for msg in got:  # every data byte of a MIDI 1.0 message is 0..127
            assert all(b < 0x80 for b in msg[1:])


def test_virtual_port_carries_setup_notes_bends_and_controllers(
    jack_server: JackServer, midi_dump: MidiDump
) -> None:
    s = settings()
    ports = open_ports(s)
    port = f"{s.client_name}:{s.port_name}"
    jack_server.wait_port(port)  # mido/rtmidi JACK virtual port is named client:port
    jack_server.connect(port, midi_dump.port)
    sink = MidiSink(s, ports, voices=1)
    with sink:
        play(sink, midi_dump, started=True)
        sink.send(Reading(t=0.07, voices=[Voice(note=70.0, level=0.25)]))
        # note on again: level first (MSB 0x40), then the bend for key 70 (centre), then the note
        assert midi_dump.take(4) == h("B0 0B 40, B0 2B 00, E0 00 40, 90 46 40")
    # close(): note off, level 0, then All Notes Off (CC123) - all delivered before the
    # port goes away.
    assert midi_dump.take(4) == h("80 46 40, B0 0B 00, B0 2B 00, B0 7B 00")
    assert midi_dump.quiet() == []
    assert sink.counts["note_on"] == 3 and sink.counts["note_off"] == 3


def test_named_port_is_found_without_full_name(
    jack_server: JackServer, midi_dump: MidiDump
) -> None:
    # The client name alone ("midi-monitor-xxxxxx" for "midi-monitor-xxxxxx:input"): the
    # matcher finds the port and rtmidi connects our output to it, no jack_connect needed.
    s = settings(virtual=False, connect=[midi_dump.client], client_name=f"fbnamed{os.getpid()}")
    sink = MidiSink(s)  # voices from the first reading: set-up goes out with the first note
    with sink:
        # JACK applies a new connection from the next process cycle: wait until another
        # client sees it before playing.
        jack_server.wait_connected(midi_dump.port)
        play(sink, midi_dump, started=False)
    assert midi_dump.take(1) == h("B0 7B 00")


def test_missing_jack_server_is_a_clear_device_error(
    jack_server: JackServer, monkeypatch: pytest.MonkeyPatch
) -> None:
    require("jackd")
    monkeypatch.setenv("JACK_DEFAULT_SERVER", f"absent-{os.getpid()}")
    monkeypatch.setenv("JACK_NO_START_SERVER", "1")
    with pytest.raises(DeviceError, match="JACK server"):
        open_ports(settings())
