"""No stuck notes: whatever happens between frames, every note-on is ended.

A property test (hypothesis) plays random scripts through the MIDI output the daemon
uses (:class:`bridge.outputs.midi.MidiSink` with its pure :class:`MidiVoice` logic):

* frames of note, level and presence values, sane or not (NaN, infinities, notes far
  outside 0..127, levels below 0 and above 1), at irregular times;
* mode changes (slide, steps, MPE; another level controller): the running sink is
  silenced and closed and a new one plays on, as when the rig is restarted with other
  MIDI settings;
* profile switches (silence, then play on; the new profile may have more or fewer voices);
* sensor losses (silence);
* shutdowns (close), after which a new sink starts, as a restarted daemon does.

Everything the sinks send goes, in order, to one receiver. The bytes are parsed with
mido (an independent MIDI 1.0 implementation); the test asserts that every byte forms a
valid message, that each note-on is ended by a note-off on the same channel and key
(MIDI 1.0: a note-on with velocity 0 is a note-off), that nothing sounds after any
silence, switch, loss or shutdown, and that a receiver's level ends at zero.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import mido
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.pipeline import Reading, VoiceView
from conftest import RecordingPort  # tests/conftest.py: the in-memory RawPort

LEVEL_CC = 11  # MidiSettings.controller default: expression (MIDI 1.0, CC 11; LSB CC 43)

note_st = st.one_of(
    st.floats(-20.0, 150.0, allow_nan=False),
    st.sampled_from([math.nan, math.inf, -math.inf, 0.0, 127.0, 60.49, 60.51]),
)
level_st = st.one_of(
    st.floats(-0.5, 1.5, allow_nan=False),
    st.sampled_from([math.nan, math.inf, 0.0, 0.002, 0.004, 1.0]),
)
mode_st = st.tuples(
    st.sampled_from(["slide", "steps", "mpe"]),
    st.sampled_from(["cc7", "cc14", "pressure", "velocity-only"]),
    st.sampled_from([20.0, 500.0]),  # max_rate_hz: a cap that holds values back, or not
)
ops_st = st.lists(
    st.one_of(
        st.tuples(st.just("frame"), note_st, level_st, st.booleans(),
                  st.sampled_from([0.0, 0.001, 0.01, 0.05, 0.3])),
        st.tuples(st.just("frame"), note_st, level_st, st.just(True), st.just(0.01)),
        # A hand playing: sane values, so that notes start and move (bends, legato moves).
        st.tuples(st.just("frame"), st.floats(30.0, 90.0), st.floats(0.05, 1.0), st.just(True),
                  st.sampled_from([0.005, 0.01, 0.02])),
        st.tuples(st.just("frame"), st.floats(30.0, 90.0), st.floats(0.05, 1.0), st.just(True),
                  st.sampled_from([0.005, 0.01, 0.02])),
        st.tuples(st.just("mode"), mode_st),
        st.tuples(st.just("switch"), st.integers(1, 3)),
        st.tuples(st.just("lost")),
        st.tuples(st.just("close")),
    ),
    max_size=80,
)


@dataclass
class Receiver:
    """What a synth holds after the messages so far (parsed by mido)."""

    held: dict[tuple[int, int], int] = field(default_factory=dict)
    level: dict[int, int] = field(default_factory=dict)  # channel -> level value (any law)
    ons: int = 0

    def take(self, msg: mido.Message) -> None:
        if msg.type == "note_on" and msg.velocity > 0:
            key = (msg.channel, msg.note)
            assert key not in self.held, f"second note-on for a sounding note: {msg}"
            self.held[key] = 1
            self.ons += 1
        elif msg.type in ("note_on", "note_off"):
            self.held.pop((msg.channel, msg.note), None)
        elif msg.type == "control_change" and msg.control == LEVEL_CC:
            self.level[msg.channel] = msg.value << 7  # a new MSB clears the LSB (MIDI 1.0)
        elif msg.type == "control_change" and msg.control == LEVEL_CC + 32:
            self.level[msg.channel] = (self.level.get(msg.channel, 0) & ~0x7F) | msg.value
        elif msg.type == "aftertouch":
            self.level[msg.channel] = msg.value


class Wire:
    """The receiver's one input: every sink's port, in the order the sinks played."""

    def __init__(self) -> None:
        self.ports: list[RecordingPort] = []
        self.receiver = Receiver()
        self.parsed = 0
        self._parser = mido.Parser()
        self._fed: list[int] = []

    def port(self) -> RecordingPort:
        p = RecordingPort(f"port{len(self.ports)}")
        self.ports.append(p)
        self._fed.append(0)
        return p

    def catch_up(self) -> Receiver:
        """Parse what arrived since the last call; every message must parse whole."""
        for i, p in enumerate(self.ports):
            new = p.snapshot()[self._fed[i]:]
            self._fed[i] += len(new)
            for raw in new:
                assert raw[0] & 0x80 and all(b < 0x80 for b in raw[1:]), raw.hex(" ")
                self._parser.feed(raw)
                msgs = list(self._parser)
                # mido's parser drops bytes that do not make a message: one in, one out.
                assert len(msgs) == 1, f"{raw.hex(' ')} parsed as {msgs}"
                self.receiver.take(msgs[0])
                self.parsed += 1
        return self.receiver


def settings_for(mode: tuple[str, str, float]) -> MidiSettings:
    name, level_out, rate = mode
    return MidiSettings(mode=name, level_out=level_out, max_rate_hz=rate,  # type: ignore[arg-type]
                        ramp_s=0.02, mpe_members=6)


def reading(voices: int, note: float, level: float, present: bool, t: float) -> Reading:
    views = []
    for i in range(voices):
        v = VoiceView(f"voice{i}", note, 440.0)
        v.note = note + 5.0 * i if math.isfinite(note) else note
        v.level, v.present = level, present
        views.append(v)
    r = Reading([], views)
    r.t = t
    return r


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(ops=ops_st, first=mode_st, voices=st.integers(1, 3))
def test_every_note_on_is_ended_whatever_happens(
    ops: list[tuple[Any, ...]], first: tuple[str, str, float], voices: int
) -> None:
    wire = Wire()
    mode = first
    sink: MidiSink | None = None
    t = 0.0

    def silent_now(what: str) -> None:
        held = wire.catch_up().held
        assert held == {}, f"notes still sounding after {what}: {held}"

    for op in ops:
        kind = op[0]
        if kind == "frame":
            _, note, level, present, dt = op
            t += dt
            if sink is None:  # (re)start: a new sink on a new port, as a restarted daemon
                sink = MidiSink(settings_for(mode), [wire.port()])
                sink.open()
            sink.send(reading(voices, note, level, present, t))
            # At most one note per voice sounds between frames.
            assert len(wire.catch_up().held) <= voices
        elif kind == "mode":
            if sink is not None:
                sink.silence("mode change")
                silent_now("silence before a mode change")
                sink.close()
                sink = None
            mode = op[1]
        elif kind == "switch":
            if sink is not None:
                sink.silence("profile switch")
                silent_now("a profile switch")
            voices = op[1]  # the new profile may play another number of voices
        elif kind == "lost":
            if sink is not None:
                sink.silence("sensor lost")
                sink.silence("sensor lost")  # a second silence is harmless
                silent_now("a sensor loss")
        elif kind == "close":
            if sink is not None:
                sink.close()
                sink.close()  # safe twice
                silent_now("a shutdown")
                sink = None
    if sink is not None:
        sink.close()
    receiver = wire.catch_up()
    assert receiver.held == {}  # MIDI 1.0: every note-on matched by a note-off
    event(f"note-ons: {min(receiver.ons, 10)}{'+' if receiver.ons >= 10 else ''}")
    # Every sink released its port exactly once, however many times it was closed.
    assert all(p.closed and p.close_calls == 1 for p in wire.ports)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    frames=st.lists(st.tuples(note_st, level_st, st.booleans()), min_size=1, max_size=60),
    mode=mode_st,
)
def test_last_level_heard_is_zero_after_close_outside_mpe(
    frames: list[tuple[float, float, bool]], mode: tuple[str, str, float]
) -> None:
    """After a shutdown the synth's level controller (or channel pressure) is at zero on
    every channel that played, so a note started later by hand does not blare."""
    if mode[0] == "mpe":
        mode = ("slide", mode[1], mode[2])
    wire = Wire()
    sink = MidiSink(settings_for(mode), [wire.port()])
    sink.open()
    for i, (note, level, present) in enumerate(frames):
        sink.send(reading(2, note, level, present, 0.01 * i))
    sink.close()
    receiver = wire.catch_up()
    assert receiver.held == {}
    if mode[1] != "velocity-only":
        for ch, value in receiver.level.items():
            assert value == 0, f"channel {ch + 1} left at level {value}"
