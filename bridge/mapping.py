"""Hand position (0..1) to music: pitch as a fractional MIDI note, volume as linear gain.

Pitch: position maps linearly to semitones over a chosen span, because players think in
intervals per hand movement; an optional pull draws the note toward the degrees of a
scale, with hysteresis so a hand resting on a boundary does not flip between two notes::

    pm = PitchMap(PitchSettings(lowest_note=48, span_semitones=36, scale="major", pull=0.6))
    n = pm.note(0.5)          # fractional MIDI note, e.g. 66.1
    pm.hz(n)                  # 440 * 2**((n - 69) / 12)

Volume: position maps linearly to decibels between a floor and 0 dB, then to gain; the
quiet end of the travel is true silence::

    lm = LevelMap(LevelSettings(floor_db=-60))
    g = lm.level(0.8)         # 0..ceiling
    gain_to_cc7(g)            # 0..127 for a synth whose volume controller follows 40 log10

Both maps return finite values inside their range for any input, NaN and infinities
included, so nothing downstream has to check.
"""

from __future__ import annotations

import bisect
import logging
import math
from typing import Literal, get_args

from pydantic import BaseModel, ConfigDict, Field, field_validator

log = logging.getLogger(__name__)

# --- equal temperament --------------------------------------------------------------------
# f = a4 * 2**((n - 69) / 12): MIDI note 69 is A4, tuned to 440 Hz by ISO 16:1975.

_LN2_OVER_12 = math.log(2.0) / 12.0

NOTE_NAMES = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")

# Spellings accepted for a scale root; flats map to the same pitch class as their sharp.
_PITCH_CLASS = {name: i for i, name in enumerate(NOTE_NAMES)}
_PITCH_CLASS.update({"Db": 1, "Eb": 3, "Gb": 6, "Ab": 8, "Bb": 10})


def note_to_hz(n: float, a4: float = 440.0) -> float:
    """Frequency of (fractional) MIDI note `n` in equal temperament, A4 = note 69 = `a4` Hz."""
    return a4 * math.exp((n - 69.0) * _LN2_OVER_12)


def hz_to_note(f: float, a4: float = 440.0) -> float:
    """Fractional MIDI note of frequency `f` (Hz); the inverse of `note_to_hz`."""
    if not f > 0.0:
        raise ValueError(f"a frequency must be positive, got {f!r}")
    return 69.0 + 12.0 * math.log2(f / a4)


def cents(f1: float, f2: float) -> float:
    """Interval from `f1` up to `f2` in cents: 1200 * log2(f2 / f1)."""
    if not (f1 > 0.0 and f2 > 0.0):
        raise ValueError("cents need two positive frequencies")
    return 1200.0 * math.log2(f2 / f1)


def note_name(n: float) -> str:
    """Nearest note name with octave and the remainder in cents: 69.12 -> 'A4 +12c'.

    MIDI note 60 is C4 (so note 0 is C-1). The cents are rounded; a value that rounds to
    +50 or -50 keeps the nearest note chosen by rounding the note number.
    """
    if not math.isfinite(n):
        return "?"
    k = math.floor(n + 0.5)
    c = round((n - k) * 100.0)
    return f"{NOTE_NAMES[k % 12]}{k // 12 - 1} {c:+d}c"


# --- scales -------------------------------------------------------------------------------
# Semitone offsets from the root within one octave [common practice, music theory].

ScaleName = Literal[
    "chromatic", "major", "minor", "harmonic_minor", "melodic_minor", "dorian",
    "mixolydian", "pentatonic", "minor_pentatonic", "blues", "whole_tone",
]

SCALES: dict[str, tuple[int, ...]] = {
    "chromatic": (0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11),
    "major": (0, 2, 4, 5, 7, 9, 11),
    "minor": (0, 2, 3, 5, 7, 8, 10),            # natural minor
    "harmonic_minor": (0, 2, 3, 5, 7, 8, 11),
    "melodic_minor": (0, 2, 3, 5, 7, 9, 11),    # ascending form
    "dorian": (0, 2, 3, 5, 7, 9, 10),
    "mixolydian": (0, 2, 4, 5, 7, 9, 10),
    "pentatonic": (0, 2, 4, 7, 9),              # major pentatonic
    "minor_pentatonic": (0, 3, 5, 7, 10),
    "blues": (0, 3, 5, 6, 7, 10),
    "whole_tone": (0, 2, 4, 6, 8, 10),
}
assert set(SCALES) == set(get_args(ScaleName)), "SCALES and ScaleName must list the same names"


def _clamp01(position: float) -> float:
    """Position as a plain float in [0, 1]; NaN and -inf go to 0, +inf to 1."""
    p = float(position)  # numpy scalars become plain floats here
    if p >= 0.0:
        return min(p, 1.0)
    return 0.0  # negative, -inf or NaN (every comparison with NaN is false)


# --- pitch ----------------------------------------------------------------------------------


class PitchSettings(BaseModel):
    """How hand position becomes pitch.

    The hand's travel (position 0..1) covers `span_semitones` starting at `lowest_note`
    (a fractional MIDI note; 48 is C3). `pull` draws the note toward the degrees of
    `scale` built on `root`: 0 leaves the continuous glide, 1 snaps to the degrees. A
    note changes its target degree only once the hand is `hysteresis_cents` past the
    midpoint between two degrees.
    """

    model_config = ConfigDict(extra="forbid")

    lowest_note: float = Field(default=48.0, ge=0.0, le=127.0)
    span_semitones: float = Field(default=36.0, gt=0.0, le=96.0)
    higher_when_near: bool = Field(default=True, description="pitch rises as the hand nears the antenna")
    scale: ScaleName = "chromatic"
    root: str = Field(default="C", description="pitch class the scale is built on: C, C#, Db, ... B")
    pull: float = Field(default=0.0, ge=0.0, le=1.0, description="0 = free glide, 1 = fully on the scale")
    hysteresis_cents: float = Field(default=15.0, ge=0.0, le=50.0)
    a4_hz: float = Field(default=440.0, ge=200.0, le=1000.0, description="tuning of A4 (note 69)")

    @field_validator("root")
    @classmethod
    def _known_root(cls, v: str) -> str:
        v = v.strip()
        if v not in _PITCH_CLASS:
            raise ValueError(f"root must be one of {', '.join(_PITCH_CLASS)}; got {v!r}")
        return v

    @property
    def highest_note(self) -> float:
        return self.lowest_note + self.span_semitones


class PitchMap:
    """Position -> fractional MIDI note, with optional scale pull (stateful: hysteresis).

    `note(p)` is linear in p over the span when `pull` is 0. With pull it returns
    linear + pull * (target - linear), where target is the scale degree the note is
    currently assigned to. The target switches to the nearest degree only when the
    linear note is more than the hysteresis beyond a midpoint between degrees, so for a
    rising sweep the target never falls and the output never decreases (and likewise
    for a falling sweep). The result is always finite and within
    [lowest_note, lowest_note + span_semitones].
    """

    __slots__ = (
        "_a4",
        "_degrees",
        "_hyst",
        "_pull",
        "_rising",
        "_root",
        "_span",
        "_switch_down",
        "_switch_up",
        "_target",
        "high",
        "low",
        "settings",
    )

    def __init__(self, settings: PitchSettings) -> None:
        self.settings = settings
        self.low = float(settings.lowest_note)
        self.high = float(settings.lowest_note + settings.span_semitones)
        self._span = float(settings.span_semitones)
        self._rising = settings.higher_when_near
        self._pull = float(settings.pull)
        self._hyst = settings.hysteresis_cents / 100.0
        self._a4 = float(settings.a4_hz)
        self._root = _PITCH_CLASS[settings.root]
        # One octave of degrees plus a neighbour on each side, relative to the root.
        offs = SCALES[settings.scale]
        self._degrees = [offs[-1] - 12.0] + [float(o) for o in offs] + [offs[0] + 12.0]
        self._target = math.nan
        self._switch_down = math.inf  # forces a choice on the first call
        self._switch_up = -math.inf

    def reset(self) -> None:
        """Forget the current scale degree (the next note picks the nearest one)."""
        self._target = math.nan
        self._switch_down = math.inf
        self._switch_up = -math.inf

    def linear(self, position: float) -> float:
        """The unpulled note for `position` (clamped to 0..1; NaN counts as 0)."""
        p = _clamp01(position)
        if not self._rising:
            p = 1.0 - p
        return self.low + self._span * p

    def note(self, position: float) -> float:
        """Fractional MIDI note for hand position 0..1 (any float is accepted)."""
        x = self.linear(position)
        if self._pull == 0.0:
            return x
        if x > self._switch_up or x < self._switch_down:
            self._retarget(x)
        y = x + self._pull * (self._target - x)
        # The target degree can lie just outside the span; clamping keeps order.
        if y < self.low:
            return self.low
        if y > self.high:
            return self.high
        return y

    def _retarget(self, x: float) -> None:
        """Choose the degree nearest `x` and the two points where it will be left."""
        rel = x - self._root
        octave = math.floor(rel / 12.0)
        r = rel - 12.0 * octave  # 0 <= r < 12
        d = self._degrees
        i = bisect.bisect_left(d, r)  # d[i-1] < r <= d[i]; 1 <= i <= len(d) - 1
        if r - d[i - 1] <= d[i] - r:
            i -= 1
        base = self._root + 12.0 * octave
        # d[0] and d[-1] are copies of the last and first degree an octave away, so
        # their own outer neighbours are one step further into the next octave.
        below = d[i - 1] if i > 0 else d[-3] - 12.0
        above = d[i + 1] if i < len(d) - 1 else d[2] + 12.0
        target = base + d[i]
        self._target = target
        self._switch_down = (base + below + target) / 2.0 - self._hyst
        self._switch_up = (target + base + above) / 2.0 + self._hyst

    def hz(self, note: float) -> float:
        """Frequency of `note` at this map's tuning (A4 = a4_hz)."""
        return self._a4 * math.exp((note - 69.0) * _LN2_OVER_12)


# --- level ----------------------------------------------------------------------------------


class LevelSettings(BaseModel):
    """How hand position becomes volume.

    The quietest `mute_zone` of the travel is silence (gain 0). Beyond it the level rises
    linearly in decibels from `floor_db` to 0 dB ("decibel" taper), or linearly in gain
    ("linear" taper, muted where the gain is below the floor). Every level is multiplied
    by `ceiling`, the most the output may ever reach.

    Caution: a sudden loud tone can damage hearing. Set `ceiling` and the synth's own
    volume low before first use and raise them with the sound system playing quietly.
    """

    model_config = ConfigDict(extra="forbid")

    floor_db: float = Field(default=-60.0, ge=-120.0, le=-6.0, description="level just above silence")
    ceiling: float = Field(default=1.0, ge=0.0, le=1.0, description="maximum linear gain")
    taper: Literal["decibel", "linear"] = "decibel"
    louder_when_near: bool = Field(default=False, description="False: the hand nearer is quieter")
    mute_zone: float = Field(default=0.02, ge=0.0, le=0.5, description="silent part of the travel")


class LevelMap:
    """Position -> linear gain in [0, ceiling]; 0 inside the mute zone (or below the floor)."""

    __slots__ = (
        "_ceiling",
        "_db_taper",
        "_floor",
        "_floor_gain",
        "_k",
        "_loud_near",
        "_scale",
        "_zone",
        "settings",
    )

    # 10**(dB/20) written as exp(dB * ln(10)/20), which is cheaper to evaluate.
    _LN10_OVER_20 = math.log(10.0) / 20.0

    def __init__(self, settings: LevelSettings) -> None:
        self.settings = settings
        self._floor = float(settings.floor_db)
        self._ceiling = float(settings.ceiling)
        self._loud_near = settings.louder_when_near
        self._zone = float(settings.mute_zone)
        self._scale = 1.0 / (1.0 - self._zone)
        self._db_taper = settings.taper == "decibel"
        self._floor_gain = 10.0 ** (self._floor / 20.0)
        self._k = self._LN10_OVER_20

    def level(self, position: float) -> float:
        """Linear gain for hand position 0..1 (any float is accepted)."""
        p = _clamp01(position)
        if not self._loud_near:
            p = 1.0 - p
        if p <= self._zone:
            return 0.0
        q = (p - self._zone) * self._scale  # 0 at the edge of the mute zone, 1 at the loud end
        q = min(q, 1.0)
        if self._db_taper:
            return self._ceiling * math.exp(self._floor * (1.0 - q) * self._k)
        if q < self._floor_gain:
            return 0.0
        return self._ceiling * q


# --- decibels and volume controllers ---------------------------------------------------------

ControllerLaw = Literal["40log", "linear"]


def gain_to_db(gain: float) -> float:
    """20 log10(gain); -inf for 0 (and for anything not positive)."""
    return 20.0 * math.log10(gain) if gain > 0.0 else -math.inf


def db_to_gain(db: float) -> float:
    """10**(dB/20); 0 for -inf."""
    return 10.0 ** (db / 20.0) if db > -math.inf else 0.0


def cc_to_db(v: float, law: ControllerLaw = "40log", full: int = 127) -> float:
    """Gain in dB that a synth applies for controller value `v` out of `full`.

    "40log": gain_dB = 40 log10(v / full), the volume-controller response recommended for
    General MIDI synths (MIDI Manufacturers Association recommended practice, from
    memory). "linear": gain = v / full.
    """
    if v <= 0:
        return -math.inf
    ratio = v / full
    return 40.0 * math.log10(ratio) if law == "40log" else 20.0 * math.log10(ratio)


def _gain_to_controller(gain: float, law: ControllerLaw, full: int) -> int:
    if not gain > 0.0:  # 0, negative and NaN
        return 0
    if gain >= 1.0:
        return full
    # 40 log10(v/full) = 20 log10(gain)  =>  v = full * sqrt(gain)
    frac = math.sqrt(gain) if law == "40log" else gain
    return int(full * frac + 0.5)


def gain_to_cc7(gain: float, law: ControllerLaw = "40log") -> int:
    """Controller value 0..127 that makes a synth with volume law `law` play at `gain`."""
    return _gain_to_controller(gain, law, 127)


def gain_to_cc14(gain: float, law: ControllerLaw = "40log") -> int:
    """As `gain_to_cc7` for a 14-bit controller pair (MSB/LSB), 0..16383."""
    return _gain_to_controller(gain, law, 16383)
