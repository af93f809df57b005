"""Tests for bridge/mapping.py: tuning tables, pitch and level maps, controller laws."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from bridge.mapping import (
    NOTE_NAMES,
    SCALES,
    LevelMap,
    LevelSettings,
    PitchMap,
    PitchSettings,
    ScaleName,
    cc_to_db,
    cents,
    db_to_gain,
    gain_to_cc7,
    gain_to_cc14,
    gain_to_db,
    hz_to_note,
    note_name,
    note_to_hz,
)

any_float = st.floats(allow_nan=True, allow_infinity=True)
unit = st.floats(min_value=0.0, max_value=1.0)
scale_names = st.sampled_from(sorted(SCALES))
roots = st.sampled_from(list(NOTE_NAMES) + ["Db", "Eb", "Gb", "Ab", "Bb"])


# --- equal temperament -------------------------------------------------------------------


def test_a4_is_440() -> None:
    # ISO 16:1975: A4 = 440 Hz; MIDI note 69 is A4 (MIDI 1.0 spec).
    assert note_to_hz(69) == 440.0
    assert hz_to_note(440.0) == 69.0


@pytest.mark.parametrize(
    "n, hz, tol",
    [
        (57, 220.000, 5e-4),   # CRC Handbook, equal-tempered scale table (A3)
        (60, 261.6256, 5e-5),  # CRC Handbook (middle C, C4)
        (72, 523.2511, 5e-5),  # CRC Handbook (C5)
        (21, 27.5, 5e-5),      # CRC Handbook (A0, lowest piano key)
        (108, 4186.009, 5e-4),  # CRC Handbook (C8)
    ],
)
def test_equal_tempered_table(n: int, hz: float, tol: float) -> None:
    assert note_to_hz(n) == pytest.approx(hz, abs=tol)
    assert hz_to_note(hz) == pytest.approx(n, abs=1e-5)


def test_other_tunings_scale_every_note() -> None:
    # A4 = 415 Hz: every note is 1200*log2(440/415) = 101.3 cents lower (equal temperament).
    assert cents(note_to_hz(60, 415.0), note_to_hz(60)) == pytest.approx(101.27, abs=0.01)


def test_cents() -> None:
    # 1200 log2(441/440) = 3.930 cents (DOMAIN.md section 5, computed from the definition).
    assert cents(440.0, 441.0) == pytest.approx(3.930, abs=5e-4)
    # An octave is 1200 cents; an equal-tempered semitone 100 (definition of the cent).
    assert cents(220.0, 440.0) == pytest.approx(1200.0)
    assert cents(note_to_hz(60), note_to_hz(61)) == pytest.approx(100.0)
    with pytest.raises(ValueError):
        cents(0.0, 440.0)


@pytest.mark.parametrize(
    "n, name",
    [
        (60, "C4 +0c"),      # MIDI 1.0 spec: note 60 is middle C (C4 in scientific pitch)
        (69.12, "A4 +12c"),
        (68.75, "A4 -25c"),
        (61, "C#4 +0c"),
        (0, "C-1 +0c"),
        (127, "G9 +0c"),     # MIDI note 127 is G9 (MIDI 1.0 spec, from memory)
        (71.6, "C5 -40c"),
    ],
)
def test_note_name(n: float, name: str) -> None:
    assert note_name(n) == name


# --- pitch map ---------------------------------------------------------------------------


def test_linear_over_the_span() -> None:
    pm = PitchMap(PitchSettings(lowest_note=48.0, span_semitones=36.0))
    assert pm.note(0.0) == 48.0
    assert pm.note(1.0) == 84.0
    assert pm.note(0.5) == 66.0
    assert pm.note(0.25) == 57.0
    assert pm.hz(pm.note(0.25)) == pytest.approx(220.0)  # CRC Handbook: A3 = 220 Hz


def test_direction_can_be_reversed() -> None:
    pm = PitchMap(PitchSettings(higher_when_near=False))
    assert pm.note(1.0) == 48.0 and pm.note(0.0) == 84.0


@pytest.mark.parametrize("p, expected", [(math.nan, 48.0), (-math.inf, 48.0), (-3.0, 48.0),
                                         (math.inf, 84.0), (7.0, 84.0)])
def test_out_of_range_positions_clamp(p: float, expected: float) -> None:
    assert PitchMap(PitchSettings()).note(p) == expected


def test_numpy_positions_give_plain_floats() -> None:
    pm = PitchMap(PitchSettings(pull=0.5, scale="major"))
    lm = LevelMap(LevelSettings())
    for p in (np.float32(0.3), np.float64(0.7), np.float64(np.nan)):
        assert type(pm.note(p)) is float
        assert type(lm.level(p)) is float


def test_full_pull_snaps_to_the_scale() -> None:
    pm = PitchMap(PitchSettings(scale="major", root="C", pull=1.0))
    outs = {pm.note(i / 360.0) for i in range(361)}
    # C major = C D E F G A B [common practice]: pitch classes 0 2 4 5 7 9 11 only.
    assert {round(n) % 12 for n in outs} == {0, 2, 4, 5, 7, 9, 11}
    assert all(n == round(n) for n in outs)


def test_pull_strength_is_a_proportion() -> None:
    # linear 55.3 lies nearest degree 55 (G in C major): pull 0.5 moves it half way.
    s = PitchSettings(lowest_note=55.0, span_semitones=1.0, scale="major", pull=0.5)
    assert PitchMap(s).note(0.3) == pytest.approx(55.15)


def test_root_moves_the_scale() -> None:
    # A minor pentatonic = A C D E G [common practice].
    pm = PitchMap(PitchSettings(scale="minor_pentatonic", root="A", pull=1.0))
    outs = {round(pm.note(i / 720.0)) % 12 for i in range(721)}
    assert outs == {9, 0, 2, 4, 7}
    # A flat spelling means the same pitch class as its sharp.
    a = PitchMap(PitchSettings(scale="major", root="Bb", pull=1.0))
    b = PitchMap(PitchSettings(scale="major", root="A#", pull=1.0))
    assert [a.note(i / 50) for i in range(51)] == [b.note(i / 50) for i in range(51)]


def test_hysteresis_at_a_boundary() -> None:
    # Chromatic, 20 cents of hysteresis; notes 60 and 61 share the boundary 60.5.
    s = PitchSettings(lowest_note=60.0, span_semitones=1.0, pull=1.0, hysteresis_cents=20.0)
    pm = PitchMap(s)
    assert pm.note(0.0) == 60.0
    assert pm.note(0.65) == 60.0   # past the midpoint but inside the hysteresis
    assert pm.note(0.71) == 61.0   # beyond 60.5 + 0.2: switch up
    assert pm.note(0.35) == 61.0   # back below the midpoint, still inside: stay
    assert pm.note(0.29) == 60.0   # beyond 60.5 - 0.2: switch down
    pm.reset()
    assert pm.note(0.65) == 61.0   # fresh map: plain nearest degree


def test_hysteresis_across_the_octave_line() -> None:
    # C major: B4 (71) and C5 (72) are a semitone apart, boundary 71.5, 10 cents of
    # hysteresis; the degree above the root wraps into the next octave.
    s = PitchSettings(lowest_note=71.0, span_semitones=2.0, scale="major", pull=1.0,
                      hysteresis_cents=10.0)
    pm = PitchMap(s)
    assert pm.note(0.0) == 71.0
    assert pm.note(0.27) == 71.0   # linear 71.54: inside the hysteresis
    assert pm.note(0.31) == 72.0   # linear 71.62: switch to C5
    assert pm.note(0.27) == 72.0   # back to 71.54: stay
    assert pm.note(0.70) == 72.0   # linear 72.4: still nearer C than D (74)
    assert pm.note(1.0) == 72.0    # linear 73.0: the C-D midpoint, inside the hysteresis
    assert pm.note(0.18) == 71.0   # linear 71.36, below 71.5 - 0.1: back to B4


def test_unknown_root_and_typos_are_named() -> None:
    with pytest.raises(ValidationError, match="root"):
        PitchSettings(root="H")
    with pytest.raises(ValidationError):
        PitchSettings(scale="lydian-ish")  # type: ignore[arg-type, call-arg]
    with pytest.raises(ValidationError):
        PitchSettings(pul=0.5)  # type: ignore[call-arg]
    with pytest.raises(ValidationError):
        PitchSettings(pull=1.5)


@settings(max_examples=300, deadline=None)
@given(
    p=any_float,
    lowest=st.floats(0.0, 127.0),
    span=st.floats(0.01, 96.0),
    pull=unit,
    scale=scale_names,
    root=roots,
    rising=st.booleans(),
    hyst=st.floats(0.0, 50.0),
)
def test_note_always_finite_and_in_range(
    p: float, lowest: float, span: float, pull: float, scale: ScaleName, root: str, rising: bool,
    hyst: float,
) -> None:
    s = PitchSettings(lowest_note=lowest, span_semitones=span, pull=pull, scale=scale,
                      root=root, higher_when_near=rising, hysteresis_cents=hyst)
    pm = PitchMap(s)
    for q in (p, 0.5, p, -p):
        n = pm.note(q)
        assert math.isfinite(n)
        assert s.lowest_note <= n <= s.lowest_note + s.span_semitones
        assert math.isfinite(pm.hz(n)) and pm.hz(n) > 0.0


@settings(max_examples=150, deadline=None)
@given(
    positions=st.lists(unit, min_size=2, max_size=80),
    pull=unit,
    scale=scale_names,
    root=roots,
    hyst=st.floats(0.0, 50.0),
    span=st.floats(1.0, 48.0),
)
def test_monotone_sweep_gives_monotone_notes(
    positions: list[float], pull: float, scale: ScaleName, root: str, hyst: float, span: float
) -> None:
    # For a sweep in one direction the target degree only moves the same way, so the
    # note never turns back, whatever the pull (0 = linear, 1 = a staircase).
    s = PitchSettings(lowest_note=40.0, span_semitones=span, pull=pull, scale=scale, root=root,
                      hysteresis_cents=hyst)
    up = sorted(positions)
    pm = PitchMap(s)
    notes = [pm.note(p) for p in up]
    assert all(b >= a for a, b in itertools.pairwise(notes))
    down = sorted(positions, reverse=True)
    pm = PitchMap(s)
    notes = [pm.note(p) for p in down]
    assert all(b <= a for a, b in itertools.pairwise(notes))


@settings(max_examples=100, deadline=None)
@given(a=unit, b=unit, pull=st.floats(0.0, 0.99), scale=scale_names)
def test_strictly_increasing_with_partial_pull(
    a: float, b: float, pull: float, scale: ScaleName
) -> None:
    # With pull < 1 the glide term (1 - pull) * linear keeps every step upward visible.
    assume(b - a > 1e-6)
    pm = PitchMap(PitchSettings(pull=pull, scale=scale))
    n1, n2 = pm.note(a), pm.note(b)
    assert n2 > n1 or n2 == pm.high


# --- level map ---------------------------------------------------------------------------


def test_decibel_taper_values() -> None:
    s = LevelSettings(floor_db=-60.0, mute_zone=0.0, louder_when_near=True)
    lm = LevelMap(s)
    assert lm.level(1.0) == pytest.approx(1.0)
    # Halfway in dB is -30 dB = 10**(-30/20) = 0.031623 (definition of the decibel).
    assert lm.level(0.5) == pytest.approx(0.0316228, rel=1e-6)
    assert lm.level(0.9) == pytest.approx(10 ** (-6 / 20), rel=1e-9)


def test_nearer_is_quieter_by_default_and_zone_is_silent() -> None:
    lm = LevelMap(LevelSettings(floor_db=-60.0, mute_zone=0.1))
    assert lm.level(0.0) == pytest.approx(1.0)      # hand far: full level
    assert lm.level(1.0) == 0.0                     # hand at the antenna: silence
    assert lm.level(0.95) == 0.0                    # inside the mute zone
    just_out = lm.level(0.9 - 1e-9)
    # Just outside the zone the level is the floor: -60 dB = 0.001 (decibel definition).
    assert just_out == pytest.approx(0.001, rel=1e-6)


def test_ceiling_caps_the_output() -> None:
    lm = LevelMap(LevelSettings(ceiling=0.25, louder_when_near=True))
    assert lm.level(1.0) == pytest.approx(0.25)
    assert lm.level(math.inf) == pytest.approx(0.25)


def test_linear_taper_mutes_below_the_floor() -> None:
    lm = LevelMap(LevelSettings(taper="linear", floor_db=-20.0, mute_zone=0.0,
                                louder_when_near=True))
    assert lm.level(0.5) == pytest.approx(0.5)
    assert lm.level(0.05) == 0.0      # 0.05 is -26 dB, below the -20 dB floor
    assert lm.level(0.2) == pytest.approx(0.2)


@settings(max_examples=300, deadline=None)
@given(
    p=any_float,
    floor=st.floats(-120.0, -6.0),
    ceiling=unit,
    taper=st.sampled_from(["decibel", "linear"]),
    near=st.booleans(),
    zone=st.floats(0.0, 0.5),
)
def test_level_always_in_range(
    p: float, floor: float, ceiling: float, taper: str, near: bool, zone: float
) -> None:
    s = LevelSettings(floor_db=floor, ceiling=ceiling, taper=taper,  # type: ignore[arg-type]
                      louder_when_near=near, mute_zone=zone)
    g = LevelMap(s).level(p)
    assert math.isfinite(g) and 0.0 <= g <= ceiling
    # Anything not silent is at least the floor (relative to the ceiling).
    assert g == 0.0 or g >= ceiling * 10 ** (floor / 20) * (1 - 1e-9)


@settings(max_examples=100, deadline=None)
@given(ps=st.lists(unit, min_size=2, max_size=50))
def test_level_monotone_in_position(ps: list[float]) -> None:
    lm = LevelMap(LevelSettings(louder_when_near=True))
    gains = [lm.level(p) for p in sorted(ps)]
    assert all(b >= a for a, b in itertools.pairwise(gains))


# --- controller laws ---------------------------------------------------------------------


def test_gm_volume_law_check_value() -> None:
    # General MIDI recommended practice (from memory): gain_dB = 40 log10(v/127);
    # v = 64 -> -11.9 dB.
    assert cc_to_db(64) == pytest.approx(-11.9, abs=0.05)
    assert cc_to_db(127) == 0.0
    assert cc_to_db(0) == -math.inf


def test_gain_to_cc7_inverts_the_law() -> None:
    # v = 127 * 10**(dB/40) (inverse of the 40 log10 law above, from memory).
    assert gain_to_cc7(db_to_gain(-11.9)) == 64
    assert gain_to_cc7(1.0) == 127 and gain_to_cc7(2.0) == 127
    assert gain_to_cc7(0.0) == 0 and gain_to_cc7(math.nan) == 0 and gain_to_cc7(-1.0) == 0
    assert gain_to_cc7(0.25, law="linear") == 32
    assert gain_to_cc14(1.0) == 16383
    for v in range(1, 128):
        assert gain_to_cc7(db_to_gain(cc_to_db(v))) == v
        assert gain_to_cc7(db_to_gain(cc_to_db(v, "linear")), "linear") == v


def test_db_helpers() -> None:
    # Definition of the decibel for amplitude: 20 log10(gain).
    assert gain_to_db(0.5) == pytest.approx(-6.0206, abs=1e-4)
    assert gain_to_db(0.0) == -math.inf and db_to_gain(-math.inf) == 0.0
    assert db_to_gain(-20.0) == pytest.approx(0.1)
