"""Tests for bridge/outputs/midi.py and midiports.py: bytes against the MIDI 1.0 Detailed
Specification (MMA) and MPE RP-053, parsed back with mido (an independent MIDI library),
and property tests for the invariants a stage needs (no stuck notes, values in range).
"""

from __future__ import annotations

import math
import subprocess
import sys
import threading
from dataclasses import dataclass, field

import mido
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from bridge.errors import ConfigError, DeviceError
from bridge.outputs import make_sink, midiports, sink_class
from bridge.outputs.midi import (
    CC,
    DIN_MESSAGES_PER_S,
    MESSAGES,
    MidiSettings,
    MidiSink,
    MidiVoice,
    bend_message,
    bend_value,
    cc,
    channel_message,
    rpn,
    stream_rate,
)
from bridge.outputs.midiports import NullPort, bare_name, match_port
from bridge.pipeline import Reading, VoiceView


def h(text: str) -> list[bytes]:
    """'B0 65 00 B0 64 00' -> [b'\\xb0\\x65\\x00', b'\\xb0\\x64\\x00'] (split at status bytes)."""
    raw = bytes.fromhex(text)
    out: list[bytearray] = []
    for b in raw:
        if b & 0x80:
            out.append(bytearray())
        out[-1].append(b)
    return [bytes(m) for m in out]


def hx(msgs: list[bytes]) -> str:
    return " ".join(m.hex(" ").upper() for m in msgs)


def voice(**kw: object) -> MidiVoice:
    base: dict[str, object] = {"ramp_s": 0.0, "max_rate_hz": 1e9, "setup_refresh_s": None}
    base.update(kw)
    return MidiVoice(MidiSettings(**base))  # type: ignore[arg-type]


def bends_of(msgs: list[bytes]) -> list[int]:
    return [m[1] | m[2] << 7 for m in msgs if m[0] >> 4 == 0xE]


# ----------------------------------------------------------------------------- table


@pytest.mark.parametrize("name", sorted(MESSAGES))
def test_message_table_agrees_with_mido(name: str) -> None:
    # mido builds its own table from the MIDI 1.0 spec; every row of ours must parse to
    # the same type, channel and length there.
    spec = MESSAGES[name]
    data = [5] * (spec.size - 1)
    raw = channel_message(name, 9, *data)
    assert len(raw) == spec.size
    msg = mido.Message.from_bytes(raw)
    assert msg.type == name
    assert msg.channel == 9
    assert bytes(msg.bytes()) == raw


def test_controller_numbers() -> None:
    # MIDI 1.0 Detailed Specification, controller table; MPE RP-053 for CC74.
    assert (CC["volume"], CC["volume"] + CC["lsb_offset"]) == (7, 39)
    assert (CC["expression"], CC["expression"] + CC["lsb_offset"]) == (11, 43)
    assert (CC["data_entry"], CC["data_entry_lsb"]) == (6, 38)
    assert (CC["rpn_msb"], CC["rpn_lsb"]) == (101, 100)
    assert CC["timbre"] == 74
    assert (CC["all_sound_off"], CC["reset_controllers"], CC["all_notes_off"]) == (120, 121, 123)


def test_rpn0_twelve_semitones_channel_1() -> None:
    # MIDI 1.0 Detailed Specification, RPN 0 pitch-bend sensitivity, then RPN null
    # (DOMAIN.md section 6 check value).
    assert (
        hx(rpn(0, "bend_range", 12, 0)) == "B0 65 00 B0 64 00 B0 06 0C B0 26 00 B0 65 7F B0 64 7F"
    )


def test_start_sends_rpn0_with_the_configured_range() -> None:
    v = voice(bend_range=12, channel=1)
    out = v.start()
    # MIDI 1.0 Detailed Specification: RPN 0 = 12 semitones on channel 1, then null.
    assert out[:6] == h("B0 65 00 B0 64 00 B0 06 0C B0 26 00 B0 65 7F B0 64 7F")
    # centred bend (E0 00 40) and level 0 on CC11 follow
    assert out[6:] == h("E0 00 40 B0 0B 00")


@pytest.mark.parametrize(
    ("semitones", "bend_range", "value"),
    [
        # DOMAIN.md section 6 convention v = 8192 + round(8192*s/R), clamped (MIDI 1.0 spec
        # range 0..16383, centre 8192).
        (+1.0, 2, 12288),
        (+0.5, 2, 10240),
        (-2.0, 2, 0),
        (+2.0, 2, 16383),
        (0.0, 2, 8192),
        (+1.0, 48, 8363),
        (-5.0, 2, 0),  # beyond the range: clamped
        (+5.0, 2, 16383),
    ],
)
def test_bend_values(semitones: float, bend_range: int, value: int) -> None:
    assert bend_value(semitones, bend_range) == value


def test_bend_message_layout() -> None:
    # MIDI 1.0 Detailed Specification: E0 LSB MSB; centre E0 00 40, lowest E0 00 00,
    # highest E0 7F 7F.
    assert bend_message(0, 8192) == bytes.fromhex("E00040")
    assert bend_message(0, 0) == bytes.fromhex("E00000")
    assert bend_message(0, 16383) == bytes.fromhex("E07F7F")
    # mido reports pitch relative to the centre (-8192..8191)
    for v in (0, 1, 127, 128, 8192, 12288, 16383):
        msg = mido.Message.from_bytes(bend_message(3, v))
        assert (msg.type, msg.channel, msg.pitch) == ("pitchwheel", 3, v - 8192)


# ----------------------------------------------------------------------------- MPE


def test_mpe_zone_configuration_15_members() -> None:
    v = voice(mode="mpe", mpe_members=15)
    out = v.start()
    # MPE RP-053: configuration message = RPN 6 on the manager channel (1), 15 members
    # (DOMAIN.md section 7 check value), then RPN null.
    assert hx(out[:3]) == "B0 65 00 B0 64 06 B0 06 0F"
    assert hx(out[3:5]) == "B0 65 7F B0 64 7F"
    # Then every member channel (2..16) gets RPN 0 = 48 semitones (RP-053 default for members).
    for ch in range(1, 16):
        block = rpn(ch, "bend_range", 48, 0)
        assert hx(block) in hx(out)
    assert hx(rpn(0, "bend_range", 48, 0)) not in hx(out)  # not on the manager channel


def test_mpe_notes_rotate_member_channels_with_own_bend_pressure_timbre() -> None:
    v = voice(mode="mpe", mpe_members=3, level_out="pressure", mpe_timbre=64, level_law="linear")
    v.start()
    first = v.update(70.0, 0.5, True, 0.0)
    # Member channel 2 (status nibble 1): pressure, CC74, bend (centre), then the note
    # (MPE RP-053: per-note controls on the member channel, set before note-on).
    assert hx(first) == "D1 40 B1 4A 40 91 46 40"
    up = v.update(71.0, 0.5, True, 0.01)
    # +1 semitone at the member bend range 48: 8192 + round(8192/48) = 8363 = LSB 0x2B,
    # MSB 0x41 (DOMAIN.md section 6 check value).
    assert hx(up) == "E1 2B 41"
    v.update(71.0, 0.0, True, 0.02)  # note off
    again = v.update(60.0, 0.5, True, 0.03)
    assert again[-1] == bytes.fromhex("923C40")  # next member channel (3)
    v.update(60.0, 0.0, True, 0.04)
    v.update(60.0, 0.5, True, 0.05)
    v.update(60.0, 0.0, True, 0.06)
    last = v.update(60.0, 0.5, True, 0.07)
    assert last[-1] == bytes.fromhex("913C40")  # round robin back to channel 2
    for m in first + up + again + last:
        mido.Message.from_bytes(m)  # every message valid for an independent parser


def test_mpe_move_uses_a_new_channel_and_sets_its_bend_first() -> None:
    v = voice(mode="mpe", mpe_members=4, level_out="pressure", move_margin=0.5)
    v.start()
    v.update(60.0, 0.5, True, 0.0)
    out = v.update(60.0 + 47.75, 0.5, True, 0.01)  # beyond 48 - 0.5: move
    kinds = [(m[0] >> 4, m[0] & 0xF) for m in out]
    on = kinds.index((0x9, 2))
    off = kinds.index((0x8, 1))
    bend = kinds.index((0xE, 2))
    assert bend < on < off  # bend for the new note, its note-on, then the old note-off
    assert out[on][1] == round(60.0 + 47.75)
    assert out[off][1] == 60


def test_mpe_timbre_can_follow_the_level() -> None:
    v = voice(
        mode="mpe", mpe_members=2, level_out="pressure", mpe_timbre="level", level_law="linear"
    )
    v.start()
    v.update(60.0, 0.5, True, 0.0)
    out = v.update(60.0, 1.0, True, 0.01)
    assert bytes.fromhex("B14A7F") in out  # CC74 = 127 at full level on member channel 2
    assert bytes.fromhex("D17F") in out


# ----------------------------------------------------------------------------- levels


def test_all_notes_off_on_stop() -> None:
    v = voice()
    v.start()
    v.update(69.0, 0.5, True, 0.0)
    out = v.stop()
    # MIDI 1.0 Detailed Specification: CC123 All Notes Off, value 0 (B0 7B 00), after the
    # note-off and level 0.
    assert hx(out) == "80 45 40 B0 0B 00 B0 7B 00"


@pytest.mark.parametrize(("controller", "lsb_cc"), [(7, 39), (11, 43)])
def test_14bit_level_pairs(controller: int, lsb_cc: int) -> None:
    # MIDI 1.0 Detailed Specification: controllers 0-31 carry the MSB, 32-63 the LSB.
    v = voice(level_out="cc14", controller=controller, level_law="linear")
    v.start()
    out = v.update(60.0, 0.5, True, 0.0)
    value = round(0.5 * 16383)  # 8192 -> MSB 64, LSB 0
    assert out[:2] == [cc(0, controller, value >> 7), cc(0, lsb_cc, value & 0x7F)]
    # A change within the same MSB needs the LSB alone (receivers keep the MSB; MIDI 1.0
    # Detailed Specification, "fine adjustment" of 14-bit controllers, from memory).
    out = v.update(60.0, 8200 / 16383, True, 0.01)
    assert out == [cc(0, lsb_cc, 8200 & 0x7F)]
    # A new MSB goes out with its LSB after it.
    out = v.update(60.0, 0.75, True, 0.02)
    value = round(0.75 * 16383)
    assert out == [cc(0, controller, value >> 7), cc(0, lsb_cc, value & 0x7F)]


def test_level_law_matches_the_40log_volume_response() -> None:
    # General MIDI recommended volume response gain_dB = 40*log10(v/127) (DOMAIN.md
    # section 5, from memory): v = 64 is -11.9 dB. The sqrt law must send 64 for that gain.
    gain = 10 ** (40 * math.log10(64 / 127) / 20)
    assert 20 * math.log10(gain) == pytest.approx(-11.9, abs=0.05)
    v = voice(level_out="cc7", controller=7)
    v.start()
    out = v.update(60.0, gain, True, 0.0)
    assert out[0] == bytes.fromhex("B00740")


def test_channel_pressure_level() -> None:
    v = voice(level_out="pressure", level_law="linear")
    v.start()
    out = v.update(60.0, 1.0, True, 0.0)
    assert out[0] == bytes.fromhex("D07F")  # MIDI 1.0: channel pressure D0 value
    assert mido.Message.from_bytes(out[0]).type == "aftertouch"


def test_velocity_from_level_at_onset_and_fixed() -> None:
    v = voice(level_law="sqrt")
    v.start()
    out = v.update(60.0, 0.25, True, 0.0)
    assert out[-1] == bytes.fromhex("903C40")  # sqrt(0.25) = 0.5 -> round(63.5) = 64
    v = voice(velocity=100)
    v.start()
    assert v.update(60.0, 0.01, True, 0.0)[-1] == bytes.fromhex("903C64")
    v = voice(level_out="velocity-only", on_level=0.0, off_level=0.0)
    v.start()
    # lowest audible level still gives velocity 1 (0 would mean note-off, MIDI 1.0 spec)
    assert v.update(60.0, 1e-9, True, 0.0) == [bytes.fromhex("903C01")]


def test_gate_hysteresis() -> None:
    v = voice(on_level=0.1, off_level=0.05)
    v.start()
    assert not any(m[0] >> 4 == 9 for m in v.update(60.0, 0.09, True, 0.0))
    assert v.update(60.0, 0.11, True, 0.01)[-1][0] == 0x90  # above on_level: note on
    assert not any(m[0] >> 4 == 8 for m in v.update(60.0, 0.06, True, 0.02))  # between: held
    assert v.note == 60
    assert v.update(60.0, 0.05, True, 0.03)[0] == bytes.fromhex("803C40")  # at off_level: off
    assert v.note is None


def test_presence_lost_ends_the_note_unless_told_otherwise() -> None:
    v = voice()
    v.start()
    v.update(60.0, 0.5, True, 0.0)
    assert v.update(60.0, 0.5, False, 0.01)[0] == bytes.fromhex("803C40")
    v = voice(off_when_absent=False)
    v.start()
    v.update(60.0, 0.5, True, 0.0)
    assert v.update(60.0, 0.5, False, 0.01) == []
    assert v.note == 60


def test_ramp_in_after_start_and_after_silence() -> None:
    v = voice(ramp_s=1.0, level_law="linear")
    v.start()
    v.update(60.0, 1.0, True, 10.0)  # ramp starts at the first update
    out = v.update(60.0, 1.0, True, 10.5)
    assert out == [bytes.fromhex("B00B40")]  # round(127 * 0.5) = 64 (DOMAIN.md section 12: ramp in)
    out = v.update(60.0, 1.0, True, 11.5)
    assert out == [bytes.fromhex("B00B7F")]
    v.silence()
    v.update(60.0, 1.0, True, 20.0)
    out = v.update(60.0, 1.0, True, 20.25)
    assert out == [bytes.fromhex("B00B20")]  # fading in again: round(127 * 0.25) = 32


def test_ceiling_limits_the_level() -> None:
    v = voice(level_ceiling=0.5, level_law="linear")
    v.start()
    assert v.update(60.0, 1.0, True, 0.0)[0] == bytes.fromhex("B00B40")


# ----------------------------------------------------------------------------- pitch


def test_bend_range_is_repeated_before_a_note_after_a_while() -> None:
    v = voice(bend_range=12, setup_refresh_s=5.0)
    v.start()
    block = rpn(0, "bend_range", 12, 0)  # MIDI 1.0: RPN 0 = 12 semitones, then null
    first = v.update(60.0, 0.5, True, 100.0)
    assert first[:6] == block  # a synth connected after start learns the range first
    v.update(60.0, 0.0, True, 101.0)
    assert v.update(60.0, 0.5, True, 102.0)[:6] != block  # 2 s later: not again
    v.update(60.0, 0.0, True, 103.0)
    assert v.update(60.0, 0.5, True, 105.5)[:6] == block  # 5.5 s after the last: again


def test_slide_move_is_legato_with_bend_first() -> None:
    v = voice(bend_range=2, move_margin=0.5)
    v.start()
    v.update(60.0, 0.5, True, 0.0)
    v.update(61.0, 0.5, True, 0.01)
    out = v.update(61.75, 0.5, True, 0.02)  # 1.75 > 2 - 0.5: the held note moves to 62
    # order: bend re-centred for key 62 (-0.25 st at R=2: 8192 - 1024 = 7168), note-on 62,
    # note-off 60 (legato: new note before old note-off)
    assert hx(out) == "E0 00 38 90 3E 5A 80 3C 40"
    assert bend_value(-0.25, 2) == 7168


def test_slide_pitch_stays_continuous_across_a_move() -> None:
    r = 2.0
    v = voice(bend_range=2, move_margin=0.25)
    v.start()
    held: int | None = None
    bend = 8192
    target = 60.0
    while target < 72.0:
        for m in v.update(target, 0.5, True, target):
            kind = m[0] >> 4
            if kind == 0xE:
                bend = m[1] | m[2] << 7
            elif kind == 0x9:
                held = m[1]
        assert held is not None
        sounding = held + (bend - 8192) / 8192 * r
        assert sounding == pytest.approx(target, abs=r / 8192)  # within one bend step
        target += 0.07


def test_steps_hysteresis() -> None:
    v = voice(mode="steps", step_hysteresis_cents=20.0)
    v.start()
    assert v.update(69.0, 0.5, True, 0.0)[-1] == bytes.fromhex("90455A")  # sqrt(0.5)*127 = 90
    assert v.update(69.69, 0.5, True, 0.01) == []  # within 50 + 20 cents: stays
    out = v.update(69.71, 0.5, True, 0.02)  # past it: 70, new note before old note-off
    assert hx(out) == "90 46 5A 80 45 40"
    assert v.update(69.31, 0.5, True, 0.03) == []  # 69 cents below 70: stays on 70
    assert hx(v.update(69.29, 0.5, True, 0.04)) == "90 45 5A 80 46 40"
    assert not bends_of(out)  # steps mode never bends


def test_notes_clamped_to_midi_range() -> None:
    v = voice(mode="steps")
    v.start()
    assert v.update(140.0, 0.5, True, 0.0)[-1][1] == 127
    v = voice(mode="steps")
    v.start()
    assert v.update(-20.0, 0.5, True, 0.0)[-1][1] == 0


def test_non_finite_input_ends_the_note() -> None:
    v = voice()
    v.start()
    v.update(60.0, 0.5, True, 0.0)
    assert v.update(float("nan"), 0.5, True, 0.01)[0] == bytes.fromhex("803C40")
    v.update(60.0, 0.5, True, 0.02)
    assert v.update(60.0, float("inf"), True, 0.03)[0] == bytes.fromhex("803C40")


# ----------------------------------------------------------------------------- traffic


def test_rate_cap_coalesces_to_the_latest_value() -> None:
    v = MidiVoice(MidiSettings(ramp_s=0.0, max_rate_hz=100.0, bend_range=12))
    v.start()
    v.update(60.0, 0.5, True, 0.0)
    assert bends_of(v.update(61.0, 0.5, True, 0.001)) == [bend_value(1, 12)]
    assert v.update(62.0, 0.5, True, 0.002) == []  # within 10 ms: held back
    assert v.update(63.0, 0.5, True, 0.005) == []
    assert bends_of(v.flush(0.008)) == []  # still too soon
    # 10 ms after the last one: only the latest value goes out
    assert bends_of(v.flush(0.0111)) == [bend_value(3, 12)]
    assert v.flush(0.05) == []
    v.update(64.0, 0.5, True, 0.052)
    v.update(65.0, 0.5, True, 0.053)  # pending: +5
    assert bends_of(v.update(65.0, 0.5, True, 0.07)) == [
        bend_value(5, 12)
    ]  # a later update sends it
    # a value that returns to the one already sent is not repeated
    v.update(66.0, 0.5, True, 0.071)
    assert v.update(65.0, 0.5, True, 0.072) == []
    assert v.update(65.0, 0.5, True, 0.2) == []


def test_rate_cap_never_drops_or_reorders_notes() -> None:
    v = MidiVoice(MidiSettings(ramp_s=0.0, max_rate_hz=5.0, mode="steps"))
    v.start()
    seen: list[bytes] = []
    for i in range(200):
        t = i * 0.001
        level = 0.5 if i % 2 == 0 else 0.0
        seen += v.update(60.0 + (i % 7), level, True, t)
    notes = [m for m in seen if m[0] >> 4 in (0x8, 0x9)]
    assert len(notes) == 200  # 100 note-ons and 100 note-offs, at 1000 changes/s
    for on, off in zip(notes[::2], notes[1::2]):
        assert on[0] == 0x90 and off[0] == 0x80 and on[1] == off[1]


def test_din_budget() -> None:
    # MIDI 1.0 DIN link: 31,250 baud, 10 bits a byte, 3-byte messages: 1041.67 messages/s.
    assert DIN_MESSAGES_PER_S == pytest.approx(1041.67, abs=0.01)
    s = MidiSettings(din_link=True, max_rate_hz=1000.0, din_reserve=0.25)
    # bend + level share 75 % of the link: 390.6 updates/s each
    assert stream_rate(s, 1) == pytest.approx(1041.67 * 0.75 / 2, rel=1e-4)
    s14 = MidiSettings(din_link=True, max_rate_hz=1000.0, level_out="cc14")
    assert stream_rate(s14, 2) == pytest.approx(1041.67 * 0.75 / 6, rel=1e-4)  # 2 voices x (1 + 2)
    assert stream_rate(MidiSettings(max_rate_hz=250.0), 4) == 250.0  # no DIN: per-stream cap only


def test_din_budget_holds_in_play() -> None:
    s = MidiSettings(din_link=True, ramp_s=0.0, level_out="cc14", max_rate_hz=1e6)
    v = MidiVoice(s)
    v.start()
    sent = 0
    for i in range(2000):  # 2 s of wild input at 1 kHz
        t = i * 0.001
        sent += len(
            v.update(60.0 + 5 * math.sin(i * 0.37), 0.2 + 0.7 * abs(math.sin(i * 0.11)), True, t)
        )
    assert sent / 2.0 <= DIN_MESSAGES_PER_S * 0.75 * 1.02  # within the share (+ rounding)


# ----------------------------------------------------------------------------- invariants

ops = st.lists(
    st.one_of(
        st.tuples(
            st.just("u"),
            st.floats(-30.0, 160.0),
            st.one_of(st.floats(-0.2, 1.2), st.sampled_from([0.0, 1.0, math.nan])),
            st.booleans(),
            st.floats(0.0, 0.05),
        ),
        st.tuples(st.just("silence")),
        st.tuples(st.just("stop")),
        st.tuples(st.just("flush"), st.floats(0.0, 0.05)),
    ),
    max_size=60,
)


@dataclass
class Heard:
    """A receiver's view: sounding (channel, key) pairs, bend and level per channel."""

    held: set[tuple[int, int]] = field(default_factory=set)
    bends: dict[int, int] = field(default_factory=dict)
    level: dict[int, int] = field(default_factory=dict)


def receiver(msgs: list[bytes]) -> Heard:
    """What a receiver holds after ``msgs`` (MIDI 1.0: note-on velocity 0 is a note-off)."""
    heard = Heard()
    held, bends, level = heard.held, heard.bends, heard.level
    for m in msgs:
        kind, ch = m[0] >> 4, m[0] & 0xF
        if kind == 0x9 and m[2] > 0:
            assert (ch, m[1]) not in held, f"note-on for a sounding note {hx([m])}"
            held.add((ch, m[1]))
        elif kind == 0x8 or kind == 0x9:
            held.discard((ch, m[1]))
        elif kind == 0xE:
            bends[ch] = m[1] | m[2] << 7
        elif kind == 0xB and m[1] in (7, 11):
            level[ch] = m[2]
    return heard


@settings(max_examples=250, deadline=None)
@given(
    script=ops,
    mode=st.sampled_from(["slide", "steps", "mpe"]),
    level_out=st.sampled_from(["cc7", "cc14", "pressure", "velocity-only"]),
    rate=st.sampled_from([20.0, 500.0, 1e6]),
    ramp=st.sampled_from([0.0, 0.05]),
    bend_range=st.sampled_from([2, 12]),
    members=st.integers(1, 15),
    voices=st.integers(1, 3),
)
def test_no_stuck_notes_and_all_values_in_range(
    script: list[tuple[object, ...]],
    mode: str,
    level_out: str,
    rate: float,
    ramp: float,
    bend_range: int,
    members: int,
    voices: int,
) -> None:
    s = MidiSettings(
        mode=mode,  # type: ignore[arg-type]
        level_out=level_out,  # type: ignore[arg-type]
        max_rate_hz=rate,
        ramp_s=ramp,
        bend_range=bend_range,
        mpe_members=max(members, voices),
        channel=1,
    )
    vs = [MidiVoice(s, index=i, count=voices) for i in range(voices)]
    sent: list[bytes] = []
    for v in vs:
        sent += v.start()
    t = 0.0
    for op in script:
        for i, v in enumerate(vs):
            if op[0] == "u":
                _, note, level, present, dt = op
                t += float(dt) / voices  # type: ignore[arg-type]
                sent += v.update(float(note) + i, float(level), bool(present), t)  # type: ignore[arg-type]
            elif op[0] == "silence":
                sent += v.silence()
                assert v.silence() == []  # idempotent
            elif op[0] == "stop":
                sent += v.stop()
            else:
                sent += v.flush(t + float(op[1]))  # type: ignore[arg-type]
        # one sounding note per voice at most, between calls
        assert len(receiver(sent).held) <= voices
    for v in vs:
        sent += v.stop()
    for m in sent:
        assert m[0] & 0x80 and all(b < 0x80 for b in m[1:]), hx([m])
        msg = mido.Message.from_bytes(m)  # mido validates every field's range
        assert len(m) == MESSAGES[msg.type].size
    state = receiver(sent)
    assert state.held == set()  # MIDI 1.0: every note-on matched by a note-off
    if mode != "mpe" and level_out in ("cc7", "cc14"):
        assert set(state.level.values()) <= {0}
    assert sent[-1][1:] == bytes((123, 0))  # the last message is All Notes Off


@settings(max_examples=100, deadline=None)
@given(
    targets=st.lists(st.floats(0.0, 127.0), min_size=1, max_size=40),
    bend_range=st.sampled_from([1, 2, 12, 24]),
    margin=st.sampled_from([0.0, 0.25, 0.5]),
)
def test_slide_sounding_pitch_equals_target(
    targets: list[float], bend_range: int, margin: float
) -> None:
    if margin >= bend_range:
        margin = 0.0
    v = voice(bend_range=bend_range, move_margin=margin)
    sent = v.start()
    for i, x in enumerate(targets):
        sent += v.update(x, 0.5, True, i * 0.01)
        heard = receiver(sent)
        ((ch, key),) = heard.held
        bend = heard.bends[ch]
        sounding = key + (bend - 8192) / 8192 * bend_range
        # one bend step of tolerance (the top value is 16383, not 16384)
        assert sounding == pytest.approx(x, abs=bend_range / 8192 * 1.01)


# ----------------------------------------------------------------------------- sink


class FailingPort(NullPort):
    """A port that breaks after ``good`` messages (like a JACK server that went away)."""

    def __init__(self, good: int) -> None:
        super().__init__("failing")
        self.good = good
        self.attempts: list[bytes] = []

    def send(self, data: bytes) -> None:
        self.attempts.append(data)
        if len(self.attempts) > self.good:
            raise OSError("port gone")
        super().send(data)


def reading(note: float, level: float, present: bool = True, t: float = 0.0, n: int = 1) -> Reading:
    vs = []
    for i in range(n):
        v = VoiceView(f"v{i}", note + i, 440.0)
        v.level, v.present = level, present
        vs.append(v)
    r = Reading([], vs)
    r.t = t
    return r


def test_sink_plays_each_voice_on_its_channel(recording_port) -> None:  # type: ignore[no-untyped-def]
    sink = MidiSink(MidiSettings(channel=3, ramp_s=0.0), [recording_port])
    with sink:
        sink.send(reading(60.0, 0.5, n=2, t=0.0))
        msgs = recording_port.snapshot()
        on = [m for m in msgs if m[0] >> 4 == 9]
        assert [(m[0] & 0xF, m[1]) for m in on] == [(2, 60), (3, 61)]  # channels 3 and 4
    msgs = recording_port.snapshot()
    assert recording_port.sounding(msgs) == {}
    assert cc(2, 123, 0) in msgs and cc(3, 123, 0) in msgs
    assert sink.counts["note_on"] == 2 and sink.counts["note_off"] == 2
    assert recording_port.closed


def test_sink_silence_and_close_are_safe_to_repeat(recording_port) -> None:  # type: ignore[no-untyped-def]
    sink = MidiSink(MidiSettings(ramp_s=0.0), [recording_port])
    sink.silence("before open")
    sink.open()
    sink.open()
    sink.send(reading(60.0, 0.5))
    sink.silence("sensor lost")
    n = len(recording_port.snapshot())
    sink.silence("again")
    assert len(recording_port.snapshot()) == n
    sink.close()
    sink.close()
    assert recording_port.close_calls == 1
    with pytest.raises(DeviceError):
        sink.send(reading(60.0, 0.5))


def test_failing_port_still_gets_note_offs_on_close(recording_port) -> None:  # type: ignore[no-untyped-def]
    bad = FailingPort(good=8)
    sink = MidiSink(MidiSettings(ramp_s=0.0), [bad, recording_port])
    with sink:
        sink.send(reading(60.0, 0.5, t=0.0))  # start (8 messages) fit; the note-on fails on `bad`
        sink.send(reading(62.5, 0.5, t=0.01))
    assert sink.port_errors["failing"] >= 1
    # the healthy port got everything, and ends clean
    assert recording_port.sounding(recording_port.snapshot()) == {}
    # the failing port was still offered the note-off and All Notes Off, one by one
    assert bytes.fromhex("803C40") in bad.attempts
    assert bad.attempts[-1] == bytes.fromhex("B07B00")


def test_sink_rebuilds_voices_when_their_number_changes(recording_port) -> None:  # type: ignore[no-untyped-def]
    sink = MidiSink(MidiSettings(ramp_s=0.0), [recording_port])
    with sink:
        sink.send(reading(60.0, 0.5, n=1))
        sink.send(reading(60.0, 0.5, n=2, t=0.01))
        assert recording_port.sounding(recording_port.snapshot()) == {(0, 60): 1, (1, 61): 1}
    assert recording_port.sounding(recording_port.snapshot()) == {}


def test_make_sink_imports_lazily() -> None:
    # A MIDI-only rig must not import the OSC library: check in a fresh interpreter.
    code = (
        "import sys\n"
        "from bridge.outputs import make_sink\n"
        "from bridge.outputs.midi import MidiSettings\n"
        "s = make_sink('midi', MidiSettings())\n"
        "assert type(s).__name__ == 'MidiSink'\n"
        "assert 'pythonosc' not in sys.modules, 'pythonosc imported'\n"
        "assert 'bridge.outputs.osc' not in sys.modules\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=False
    )
    assert done.returncode == 0, done.stderr
    assert sink_class("midifile").__name__ == "MidiFileSink"
    with pytest.raises(ConfigError, match="unknown output kind 'midy'"):
        make_sink("midy", MidiSettings())


def test_settings_are_checked() -> None:
    with pytest.raises(ValidationError, match="off_level"):
        MidiSettings(on_level=0.01, off_level=0.02)
    with pytest.raises(ValidationError, match="cc14"):
        MidiSettings(level_out="cc14", controller=74)
    with pytest.raises(ValidationError, match="move_margin"):
        MidiSettings(bend_range=2, move_margin=2.0)
    with pytest.raises(ValidationError, match="(?i)extra"):
        MidiSettings(chanel=2)  # type: ignore[call-arg]
    with pytest.raises(ConfigError, match="channel 17"):
        MidiVoice(MidiSettings(channel=16), index=1, count=2)
    with pytest.raises(ConfigError, match="member channels"):
        MidiVoice(MidiSettings(mode="mpe", mpe_members=1), index=0, count=2)


def test_mpe_members_split_between_voices() -> None:
    s = MidiSettings(mode="mpe", mpe_members=15)
    chans = [MidiVoice(s, index=i, count=2).channels for i in range(2)]
    assert chans == [list(range(1, 9)), list(range(9, 16))]  # channels 2-9 and 10-16


# ----------------------------------------------------------------------------- ports

ALSA_NAMES = [
    "Midi Through:Midi Through Port-0 14:0",
    "Stage Synth:Stage Synth MIDI 1 24:0",
    "Stage Synth:Stage Synth MIDI 2 24:1",
    "softsynth:in 128:0",
]


def test_bare_name_strips_alsa_numbers() -> None:
    # ALSA sequencer names end in " client:port" (common practice, DOMAIN.md section 11).
    assert bare_name("Midi Through:Midi Through Port-0 14:0") == "midi through:midi through port-0"
    assert bare_name("midi-monitor:input") == "midi-monitor:input"  # JACK names have none


@pytest.mark.parametrize(
    ("wanted", "found"),
    [
        ("Midi Through:Midi Through Port-0 14:0", "Midi Through:Midi Through Port-0 14:0"),
        ("Midi Through:Midi Through Port-0", "Midi Through:Midi Through Port-0 14:0"),
        ("midi through:midi through port-0 20:0", "Midi Through:Midi Through Port-0 14:0"),
        ("Midi Through", "Midi Through:Midi Through Port-0 14:0"),
        ("softsynth", "softsynth:in 128:0"),
        ("Stage Synth:Stage Synth MIDI 2", "Stage Synth:Stage Synth MIDI 2 24:1"),
    ],
)
def test_match_port(wanted: str, found: str) -> None:
    assert match_port(wanted, ALSA_NAMES) == found


def test_match_port_ambiguous_or_missing() -> None:
    with pytest.raises(DeviceError, match="ambiguous.*MIDI 1 24:0.*MIDI 2 24:1"):
        match_port("Stage Synth", ALSA_NAMES)
    with pytest.raises(
        DeviceError, match="no MIDI port called 'nothing'; ports available: Midi Through"
    ):
        match_port("nothing", ALSA_NAMES)
    with pytest.raises(DeviceError, match="ports available: none"):
        match_port("x", [])


def test_missing_alsa_sequencer_is_a_clear_error(monkeypatch: pytest.MonkeyPatch, tmp_path) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.setattr(midiports, "ALSA_SEQUENCER", str(tmp_path / "seq"))
    with pytest.raises(DeviceError, match=r"ALSA sequencer is missing .*modprobe snd-seq"):
        midiports.open_ports(MidiSettings(api="alsa"))
    with pytest.raises(ConfigError, match="no port"):
        midiports.open_ports(MidiSettings(virtual=False))


def test_retry_gives_up_at_timeout_or_stop(monkeypatch: pytest.MonkeyPatch, tmp_path) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.setattr(midiports, "ALSA_SEQUENCER", str(tmp_path / "seq"))
    calls = []
    real = midiports.open_ports

    def counting(settings: MidiSettings) -> list[midiports.RawPort]:
        calls.append(1)
        return real(settings)

    monkeypatch.setattr(midiports, "open_ports", counting)
    with pytest.raises(DeviceError):
        midiports.open_ports_retry(MidiSettings(), timeout_s=0.05, first_delay_s=0.01)
    assert len(calls) >= 2
    stop = threading.Event()
    stop.set()
    calls.clear()
    with pytest.raises(DeviceError):
        midiports.open_ports_retry(MidiSettings(), stop=stop)
    assert len(calls) == 1
    # it succeeds as soon as the system appears
    (tmp_path / "seq").touch()
    monkeypatch.setattr(midiports, "open_ports", lambda s: [NullPort()])
    assert [p.name for p in midiports.open_ports_retry(MidiSettings(), timeout_s=1.0)] == ["null"]
