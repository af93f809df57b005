"""The physics of a hand near an antenna, producing what a real sensor board would send.

Cheat sheet::

    from bridge.sim import SimBoard, SimSettings, Performance, scenario

    perf = Performance(seed=1).silence(1).glide(3, pitch=0.03, volume=0.2).leave(1)
    board = SimBoard(SimSettings(seed=7, window_s=0.01, with_reference=True), perf)
    board.next_values()        # [5127, 4664, 4852]  one frame; time advances by window_s
    board.truth                # FrameTruth: hand distances, ideal positions, true c, true Hz
    board.next_bytes()         # b"5127 4662 4850\\n"  the next frame as the board's bytes
    values, truth = board.run(100_000)   # vectorised: (n, channels) int64 + Truth arrays

The chain, one formula per step (DOMAIN.md section 2):

1. **Oscillator.** A relaxation oscillator runs at f = k / C. For the astable timer
   f = 1 / (ln2 * (RA + 2 RB) * C) (the standard astable formula, e.g. Horowitz & Hill,
   The Art of Electronics), so k = 1 / (ln2 * (RA + 2 RB)). Each channel is given either
   its resistors or its nominal frequency at C_fixed; either way k = f_nominal * C_fixed.
2. **Hand.** C = C_fixed + C_hand(d), with the plate/sphere-like law
   C_hand(d) = C_h0 * (d0 / (d + d0)) ** alpha: about 1/d**alpha close in, flat at
   contact, zero when the hand is gone (d = inf). With the defaults (C_fixed 20 pF,
   C_h0 2 pF, d0 5 cm, alpha 1.5) the hand adds 4.9 % at 3 cm and 0.27 % at 0.5 m, so the
   playing range moves the oscillator by about 4.6 % ("a few percent", DOMAIN.md).
   For scale: a hand-sized sphere (r = 5 cm) has 5.6 pF of self-capacitance
   (C = 4 pi eps0 r), of which a third couples to the antenna at contact.
3. **Drift.** C_fixed of each antenna drifts (temperature, humidity); the oscillator gain
   k drifts for every channel alike (supply, timing resistors), including an optional
   reference oscillator with no antenna, whose own C_fixed drifts only a little.
4. **Noise.** White frequency noise (the phase random-walks), phase jitter at the
   sampling instant, and mains hum as a sinusoidal frequency modulation. Integrated over
   a window of whole mains periods the hum cancels exactly.
5. **Board.** ``kind="count"``: a free-running counter is sampled every window, so the
   fractional cycle carries into the next window: N = floor(phase_end) - floor(phase_start),
   and the counts of any run of windows sum to the phase gained, within one count.
   ``kind="period"`` (reciprocal counting): a timer at ``clock_hz`` timestamps the last
   oscillator edge of each window; the board reports
   P = round(period_scale * ticks_between_last_edges / edges_between_them),
   the timer ticks of ``period_scale`` oscillator periods. P is proportional to C.

The board is pure computation: nothing sleeps, the caller paces it. Frames are computed in
fixed chunks of ``CHUNK`` frames whatever the caller asks for, so ``run(n)`` and ``n`` calls
of ``next_values()`` give identical numbers for the same seed, settings and performance.
A ``Performance`` is a script of both hands' distances over time, built from segments
(hold, glide, steps, vibrato, wander, leave, silence); its random parts come from its own
seed, and labelled holds are listed as ``marks`` for calibration demos.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import NDArray
from pydantic import BaseModel, ConfigDict, Field, model_validator

from bridge.errors import ConfigError

log = logging.getLogger(__name__)

FloatArray = NDArray[np.float64]

# Vacuum permittivity, F/m (CODATA 2018 recommended value).
EPS0 = 8.8541878128e-12
LN2 = math.log(2.0)

#: Frames computed per internal step; fixed so that any way of reading gives equal frames.
CHUNK = 1024
#: Where a leaving hand is taken to before it counts as gone (then distance is inf).
AWAY_M = 2.0
ABSENT = math.inf


# --------------------------------------------------------------------------- physics


def astable_frequency(ra: float, rb: float, c: float) -> float:
    """Frequency (Hz) of the astable timer with resistors RA, RB (ohm) and capacitor C (F).

    High time ln2*(RA+RB)*C plus low time ln2*RB*C gives f = 1 / (ln2 * (RA + 2 RB) * C)
    (the standard astable formula, e.g. Horowitz & Hill, The Art of Electronics).
    """
    if ra < 0 or rb <= 0 or c <= 0:
        raise ConfigError(f"astable needs RA >= 0, RB > 0, C > 0 (got {ra}, {rb}, {c})")
    return 1.0 / (LN2 * (ra + 2.0 * rb) * c)


def sphere_capacitance(r: float) -> float:
    """Capacitance (F) of an isolated conducting sphere of radius r (m): C = 4 pi eps0 r."""
    return 4.0 * math.pi * EPS0 * r


def plate_capacitance(area: float, gap: float) -> float:
    """Capacitance (F) of parallel plates of area (m^2) at gap (m), fringing ignored: eps0 A / d."""
    if gap <= 0:
        raise ConfigError(f"plate gap must be > 0 m (got {gap})")
    return EPS0 * area / gap


def hand_capacitance(d: float | FloatArray, c_h0: float, d0: float, alpha: float) -> FloatArray:
    """C_hand(d) = c_h0 * (d0 / (d + d0)) ** alpha, in the unit of c_h0; d = inf gives 0.

    Near the antenna it falls roughly as 1/d**alpha (plate-like for alpha near 1, steeper
    for a hand that is more sphere than plate), at contact it is bounded by c_h0.
    """
    dd = np.maximum(np.asarray(d, dtype=np.float64), 0.0)
    return c_h0 * (d0 / (dd + d0)) ** alpha


def ideal_position(d: float | FloatArray, d_near: float, d_far: float) -> FloatArray:
    """The intended normalised hand position: 0 at the far playing position, 1 at the near one.

    Linear in distance and clipped to 0..1, so an absent hand (inf) is 0. A benchmark that
    maps this linearly to semitones gets the pitch a perfect calibration would play.
    """
    dd = np.asarray(d, dtype=np.float64)
    return np.clip((d_far - dd) / (d_far - d_near), 0.0, 1.0)


def distance_for_position(pos: float, d_near: float, d_far: float) -> float:
    """Inverse of ideal_position for 0 <= pos <= 1."""
    return d_far - pos * (d_far - d_near)


# --------------------------------------------------------------------------- settings


Hand = Literal["pitch", "volume", "none"]


class ChannelSpec(BaseModel):
    """One oscillator: its antenna (which hand it senses, if any) and its timing parts."""

    model_config = ConfigDict(extra="forbid")

    name: str = Field(min_length=1)
    hand: Hand = "none"
    f_nominal_hz: float | None = Field(default=None, gt=0)
    ra_ohm: float | None = Field(default=None, ge=0)
    rb_ohm: float | None = Field(default=None, gt=0)
    c_fixed_pf: float = Field(default=20.0, gt=0)
    hand_pf: float = Field(default=2.0, ge=0)
    hand_d0_m: float = Field(default=0.05, gt=0)
    hand_alpha: float = Field(default=1.5, gt=0)

    @model_validator(mode="after")
    def _needs_a_frequency(self) -> ChannelSpec:
        if self.f_nominal_hz is None and (self.ra_ohm is None or self.rb_ohm is None):
            raise ValueError("give f_nominal_hz, or both ra_ohm and rb_ohm")
        return self

    def nominal_hz(self) -> float:
        """Frequency with no hand and no drift (C = C_fixed)."""
        if self.f_nominal_hz is not None:
            return self.f_nominal_hz
        assert self.ra_ohm is not None and self.rb_ohm is not None
        return astable_frequency(self.ra_ohm, self.rb_ohm, self.c_fixed_pf * 1e-12)

    def hand_ratio(self, d: float | FloatArray) -> FloatArray:
        """C_hand(d) / C_fixed: the relative capacitance the hand adds (0 for no antenna)."""
        if self.hand == "none":
            return np.zeros_like(np.asarray(d, dtype=np.float64))
        return hand_capacitance(d, self.hand_pf / self.c_fixed_pf, self.hand_d0_m, self.hand_alpha)


def _default_channels() -> list[ChannelSpec]:
    # 4.7 k / 68 k / 20 pF -> 512.6 kHz; 4.7 k / 75 k -> 466.2 kHz: two nearby but
    # distinct frequencies, as two hand-built oscillators would have.
    return [
        ChannelSpec(name="pitch", hand="pitch", ra_ohm=4700, rb_ohm=68000),
        ChannelSpec(name="volume", hand="volume", ra_ohm=4700, rb_ohm=75000),
    ]


class NoiseSettings(BaseModel):
    """Electrical noise of the oscillators."""

    model_config = ConfigDict(extra="forbid")

    #: White frequency noise: relative std of the mean frequency over a 10 ms window, in ppm.
    #: Scaled by sqrt(0.01 / window_s) for other windows, as white noise averages.
    freq_ppm: float = Field(default=30.0, ge=0)
    #: Jitter of the counted phase at each sampling instant, std in oscillator cycles.
    phase_cycles: float = Field(default=0.1, ge=0)


class HumSettings(BaseModel):
    """Mains hum picked up by the antennas: f(t) = f * (1 + ppm*1e-6 * sin(2 pi hz t + phase))."""

    model_config = ConfigDict(extra="forbid")

    hz: float = Field(default=50.0, gt=0)
    ppm: float = Field(default=100.0, ge=0)
    phase_rad: float = 0.0


class DriftSettings(BaseModel):
    """Slow drift of each antenna's C_fixed and of the common oscillator gain.

    ``ramp``: linear, reaching the given percent after ``duration_s`` and going on.
    ``sine``: (1 - cos(pi t / duration_s)) / 2 times the percent: there and back in 2 durations.
    ``walk``: a smooth random wander whose std after ``duration_s`` is the percent (sign
    random). The drift *rate* random-walks and the drift integrates it (integrated Brownian
    motion), so the level changes smoothly over seconds as thermal drift does, instead of
    jittering from frame to frame.
    """

    model_config = ConfigDict(extra="forbid")

    mode: Literal["off", "ramp", "sine", "walk"] = "walk"
    c_fixed_percent: float = 0.2
    gain_percent: float = 0.1
    duration_s: float = Field(default=600.0, gt=0)
    #: The reference oscillator has no antenna: its C_fixed drifts this fraction as much.
    ref_fraction: float = Field(default=0.1, ge=0)


class SimSettings(BaseModel):
    """Everything about the simulated board. Defaults: two antennas, 100 frames/s, counts."""

    model_config = ConfigDict(extra="forbid")

    window_s: float = Field(default=0.01, gt=0, le=1.0)
    kind: Literal["count", "period"] = "count"
    clock_hz: float = Field(default=48e6, gt=0)
    period_scale: int = Field(default=4096, ge=1)
    format: Literal["text", "binary"] = "text"
    text_seq: bool = False
    text_names: bool = False
    channels: list[ChannelSpec] = Field(default_factory=_default_channels, min_length=1)
    with_reference: bool = False
    reference: ChannelSpec = Field(
        default_factory=lambda: ChannelSpec(name="ref", hand="none", ra_ohm=4700, rb_ohm=72000)
    )
    noise: NoiseSettings = Field(default_factory=NoiseSettings)
    hum: HumSettings = Field(default_factory=HumSettings)
    drift: DriftSettings = Field(default_factory=DriftSettings)
    seed: int | None = None
    #: The playing range used for the ground-truth positions.
    d_near_m: float = Field(default=0.03, gt=0)
    d_far_m: float = Field(default=0.5, gt=0)

    @model_validator(mode="after")
    def _check(self) -> SimSettings:
        names = [c.name for c in self.all_channels()]
        if len(set(names)) != len(names):
            raise ValueError(f"channel names must differ: {names}")
        if self.reference.hand != "none":
            raise ValueError("the reference oscillator has no antenna: hand must be 'none'")
        if not self.d_near_m < self.d_far_m:
            raise ValueError("d_near_m must be less than d_far_m")
        return self

    def all_channels(self) -> list[ChannelSpec]:
        return [*self.channels, self.reference] if self.with_reference else list(self.channels)

    @property
    def names(self) -> list[str]:
        return [c.name for c in self.all_channels()]


# --------------------------------------------------------------------------- performance


SegmentFn = Callable[[FloatArray], "tuple[FloatArray, FloatArray]"]


@dataclass(frozen=True)
class Mark:
    """A labelled stretch of a performance where the hands hold still (for calibration demos)."""

    label: str
    start: float
    end: float
    d_pitch: float
    d_volume: float


@dataclass(frozen=True)
class _Segment:
    start: float
    seconds: float
    fn: SegmentFn
    end: tuple[float, float]  # where the hands are after it (inf stays inf)


def _ease(u: FloatArray, shape: str) -> FloatArray:
    u = np.clip(u, 0.0, 1.0)
    if shape == "linear":
        return u
    return 0.5 - 0.5 * np.cos(np.pi * u)  # raised cosine: a hand starts and stops softly


def _finite(d: float) -> float:
    return AWAY_M if math.isinf(d) else d


def _between(a: float, b: float, w: FloatArray) -> FloatArray:
    a, b = _finite(a), _finite(b)
    return a + (b - a) * w


class Performance:
    """A script of both hands' distances (m) over time; ``inf`` means the hand is gone.

    Build it by chaining segments; each starts where the previous one left the hands::

        Performance(seed=3).silence(2).glide(1, pitch=0.4, volume=0.2).vibrato(2).leave(1)

    After its end the hands stay where the last segment left them, or the whole script
    repeats if ``loop`` is true. ``tremor_m`` adds a small physiological tremor (8-12 Hz)
    to a present hand. Random segments (wander) and tremor come from ``seed``.
    """

    def __init__(self, seed: int | None = 0, *, loop: bool = False, tremor_m: float = 0.0) -> None:
        self._rng = np.random.default_rng(seed)
        self.loop = loop
        self._segments: list[_Segment] = []
        self._starts: list[float] = []
        self.marks: list[Mark] = []
        self._cur: tuple[float, float] = (ABSENT, ABSENT)
        self.duration = 0.0
        self._tremor_m = tremor_m
        # Two incommensurate components with random phases, so the tremor never repeats exactly.
        self._tremor = (self._rng.uniform(8.0, 12.0, 2), self._rng.uniform(0, 2 * np.pi, 2))

    # ---- building

    def _add(
        self, seconds: float, fn: SegmentFn, end: tuple[float, float], label: str | None
    ) -> Performance:
        if not seconds > 0 or math.isinf(seconds):
            raise ConfigError(
                f"a performance segment needs a finite duration > 0 s (got {seconds})"
            )
        self._segments.append(_Segment(self.duration, seconds, fn, end))
        self._starts.append(self.duration)
        if label is not None:
            self.marks.append(Mark(label, self.duration, self.duration + seconds, *end))
        self.duration += seconds
        self._cur = end
        return self

    def _targets(self, pitch: float | None, volume: float | None) -> tuple[float, float]:
        return (
            self._cur[0] if pitch is None else pitch,
            self._cur[1] if volume is None else volume,
        )

    def hold(
        self,
        seconds: float,
        pitch: float | None = None,
        volume: float | None = None,
        *,
        label: str | None = None,
    ) -> Performance:
        """Hands still at the given distances (None keeps a hand where it is)."""
        p, v = self._targets(pitch, volume)

        def fn(tau: FloatArray) -> tuple[FloatArray, FloatArray]:
            return np.full(tau.shape, p), np.full(tau.shape, v)

        return self._add(seconds, fn, (p, v), label)

    def glide(
        self,
        seconds: float,
        pitch: float | None = None,
        volume: float | None = None,
        *,
        shape: Literal["smooth", "linear"] = "smooth",
        label: str | None = None,
    ) -> Performance:
        """Move from the current distances to the targets. An absent hand enters from 2 m;
        a target of inf moves the hand out to 2 m, where it is gone."""
        p0, v0 = self._cur
        p1, v1 = self._targets(pitch, volume)

        def fn(tau: FloatArray) -> tuple[FloatArray, FloatArray]:
            w = _ease(tau / seconds, shape)
            return _between(p0, p1, w), _between(v0, v1, w)

        if (math.isinf(p0) and math.isinf(p1)) or (math.isinf(v0) and math.isinf(v1)):
            inner = fn

            def fn(tau: FloatArray) -> tuple[FloatArray, FloatArray]:
                p, v = inner(tau)
                if math.isinf(p0) and math.isinf(p1):
                    p = np.full(tau.shape, ABSENT)
                if math.isinf(v0) and math.isinf(v1):
                    v = np.full(tau.shape, ABSENT)
                return p, v

        return self._add(seconds, fn, (p1, v1), label)

    def steps(
        self,
        seconds_each: float,
        pitch: Sequence[float],
        volume: float | None = None,
        *,
        move_s: float = 0.05,
    ) -> Performance:
        """Jump the pitch hand through distances, holding each for ``seconds_each``
        (each jump takes ``move_s``: a quick but not infinitely fast hand)."""
        for d in pitch:
            if move_s > 0:
                self.glide(min(move_s, seconds_each / 2), pitch=d, volume=volume)
            self.hold(seconds_each - min(move_s, seconds_each / 2))
        return self

    def vibrato(
        self,
        seconds: float,
        *,
        rate_hz: float = 5.5,
        depth_m: float = 0.004,
        pitch: float | None = None,
        volume: float | None = None,
    ) -> Performance:
        """Pitch hand oscillates about its place at 5-7 Hz. Over the default playing range
        mapped to 36 semitones, 0.47 m / 36 = 13 mm a semitone, so 4 mm is about 30 cents."""
        p, v = self._targets(pitch, volume)
        p = _finite(p)

        def fn(tau: FloatArray) -> tuple[FloatArray, FloatArray]:
            # Depth fades in and out over a quarter second, as a player's does.
            env = np.clip(np.minimum(tau, seconds - tau) / 0.25, 0.0, 1.0)
            return p + depth_m * env * np.sin(2 * np.pi * rate_hz * tau), np.full(tau.shape, v)

        return self._add(seconds, fn, (p, v), None)

    def wander(
        self,
        seconds: float,
        *,
        near: float = 0.05,
        far: float = 0.45,
        step_s: tuple[float, float] = (0.2, 0.9),
    ) -> Performance:
        """Random smooth pitch-hand gestures between ``near`` and ``far`` (from the seed)."""
        knots_t = [0.0]
        while knots_t[-1] < seconds:
            knots_t.append(knots_t[-1] + float(self._rng.uniform(*step_s)))
        knots_d = [_finite(self._cur[0])] + [
            float(x) for x in self._rng.uniform(near, far, len(knots_t) - 1)
        ]
        kt, kd = np.array(knots_t), np.array(knots_d)
        v = self._cur[1]

        def fn(tau: FloatArray) -> tuple[FloatArray, FloatArray]:
            i = np.clip(np.searchsorted(kt, tau, side="right") - 1, 0, len(kt) - 2)
            w = _ease((tau - kt[i]) / (kt[i + 1] - kt[i]), "smooth")
            return kd[i] + (kd[i + 1] - kd[i]) * w, np.full(tau.shape, v)

        end_d = float(fn(np.array([seconds]))[0][0])
        return self._add(seconds, fn, (end_d, v), None)

    def leave(
        self,
        seconds: float,
        hand: Literal["pitch", "volume", "both"] = "both",
        *,
        move_s: float = 0.4,
    ) -> Performance:
        """The hand(s) move out to 2 m and are gone for the rest of ``seconds``."""
        p = ABSENT if hand in ("pitch", "both") else None
        v = ABSENT if hand in ("volume", "both") else None
        move = min(move_s, seconds)
        self.glide(move, pitch=p, volume=v)
        if seconds > move:
            self.hold(seconds - move)
        return self

    def silence(self, seconds: float, *, label: str | None = None) -> Performance:
        """Both hands gone (the player stepped away)."""
        self._cur = (ABSENT, ABSENT)
        return self.hold(seconds, label=label)

    def then(self, other: Performance) -> Performance:
        """Append another performance's segments and marks (its tremor and loop are ignored)."""
        for seg in other._segments:
            self._add(seg.seconds, seg.fn, seg.end, None)
        offset = self.duration - other.duration
        self.marks.extend(
            Mark(m.label, m.start + offset, m.end + offset, m.d_pitch, m.d_volume)
            for m in other.marks
        )
        return self

    # ---- reading

    @property
    def end_state(self) -> tuple[float, float]:
        """Where the hands are after the last segment."""
        return self._cur

    def distances(self, t: float | FloatArray) -> tuple[FloatArray, FloatArray]:
        """Hand distances (pitch, volume) in metres at times t (s); inf for an absent hand."""
        tt = np.atleast_1d(np.asarray(t, dtype=np.float64))
        dp = np.full(tt.shape, self._cur[0])
        dv = np.full(tt.shape, self._cur[1])
        if not self._segments:
            return dp, dv
        if self.loop:
            tt = np.mod(tt, self.duration)
        idx = np.searchsorted(np.asarray(self._starts), tt, side="right") - 1
        inside = (idx >= 0) & (tt < self.duration)
        for k in np.unique(idx[inside]):
            m = inside & (idx == k)
            seg = self._segments[int(k)]
            p, v = seg.fn(tt[m] - seg.start)
            dp[m] = p
            dv[m] = v
        if self._tremor_m > 0:
            freqs, phases = self._tremor
            tr = (
                self._tremor_m
                * 0.5
                * (
                    np.sin(2 * np.pi * freqs[0] * tt + phases[0])
                    + np.sin(2 * np.pi * freqs[1] * tt + phases[1])
                )
            )
            dp = np.where(np.isfinite(dp), np.maximum(dp + tr, 0.0), dp)
            dv = np.where(np.isfinite(dv), np.maximum(dv + tr, 0.0), dv)
        return dp, dv


def hold(
    distance_pitch: float, distance_volume: float, seconds: float, *, label: str | None = None
) -> Performance:
    """A performance of hands held still: the unit of a soundcheck."""
    return Performance().hold(seconds, distance_pitch, distance_volume, label=label)


# ---- scenarios. All set in an invented world: Wren, a fictional performer, and the
# ---- Tin Lantern, a fictional hall.


def warmup(seed: int = 0) -> Performance:
    """Wren's warm-up at the Tin Lantern: glides, a stepped scale, vibrato, leaving, wandering."""
    p = Performance(seed, tremor_m=0.0003)
    p.silence(1.0).glide(0.6, pitch=0.45, volume=0.42)
    p.glide(4.0, pitch=0.04, shape="linear").glide(4.0, pitch=0.45, shape="linear")
    p.steps(0.5, [0.45 - i * (0.42 / 12) for i in range(13)])
    p.glide(0.5, pitch=0.25).vibrato(3.0, rate_hz=5.8)
    p.leave(1.5, "pitch").glide(0.5, pitch=0.3).wander(8.0)
    return p.leave(2.0)


def soundcheck(
    seed: int = 0,
    *,
    points: Sequence[float] = (0.4, 0.25, 0.15, 0.08),
    hold_s: float = 2.0,
    move_s: float = 0.6,
    d_near: float = 0.03,
    d_far: float = 0.5,
) -> Performance:
    """Wren's soundcheck: step away, hands far, hands near, then marks at known distances.

    Every hold is a ``Mark`` labelled ``away``, ``far``, ``near`` or ``mark-<metres>``;
    the volume hand follows the pitch hand's distance so both antennas get the same points.
    """
    p = Performance(seed, tremor_m=0.0003)
    p.silence(3.0, label="away")
    for label, d in [("far", d_far), ("near", d_near)] + [(f"mark-{x:.2f}", x) for x in points]:
        p.glide(move_s, pitch=d, volume=d).hold(hold_s, label=label)
    return p.leave(2.0)


def long_rest(seed: int = 0, *, seconds: float = 600.0, d: float = 0.06) -> Performance:
    """A hand resting near the pitch antenna for a long time (does a held note survive drift?)."""
    p = Performance(seed, tremor_m=0.0003).silence(2.0).glide(0.5, pitch=d, volume=0.2)
    return p.hold(seconds).leave(2.0)


def comings_and_goings(seed: int = 0, *, times: int = 8) -> Performance:
    """The hands enter, play a little and leave, again and again, with silences between."""
    p = Performance(seed, tremor_m=0.0003).silence(1.0)
    for _ in range(times):
        p.glide(0.4, pitch=0.35, volume=0.2).wander(2.0).leave(1.0).silence(1.0)
    return p


SCENARIOS: dict[str, tuple[Callable[[int], Performance], str]] = {
    "warmup": (warmup, "a warm-up: glides, a stepped scale, vibrato, leaving, wandering"),
    "soundcheck": (soundcheck, "away, far, near, then held marks at known distances"),
    "long-rest": (long_rest, "a hand resting near the antenna for ten minutes"),
    "comings-and-goings": (comings_and_goings, "hands entering and leaving again and again"),
}


def scenario(name: str, seed: int = 0) -> Performance:
    """A named demo performance; see SCENARIOS."""
    try:
        return SCENARIOS[name][0](seed)
    except KeyError:
        raise ConfigError(
            f"unknown scenario {name!r}; choose from {', '.join(SCENARIOS)}"
        ) from None


# --------------------------------------------------------------------------- board


@dataclass(frozen=True)
class FrameTruth:
    """What really happened during one frame (window centre time ``t``)."""

    t: float
    d_pitch: float
    d_volume: float
    pos_pitch: float
    pos_volume: float
    c: tuple[float, ...]  # true C_hand / C_fixed per channel, the c of DOMAIN.md
    f_hz: tuple[float, ...]  # true oscillator frequency per channel, without hum or noise


@dataclass(frozen=True)
class Truth:
    """FrameTruth for many frames, as arrays: t, distances, positions of shape (n,),
    c and f_hz of shape (n, channels). ``present_*``: hand within the playing range."""

    t: FloatArray
    d_pitch: FloatArray
    d_volume: FloatArray
    pos_pitch: FloatArray
    pos_volume: FloatArray
    c: FloatArray
    f_hz: FloatArray
    d_far: float

    @property
    def present_pitch(self) -> NDArray[np.bool_]:
        return self.d_pitch <= self.d_far

    @property
    def present_volume(self) -> NDArray[np.bool_]:
        return self.d_volume <= self.d_far

    def frame(self, i: int) -> FrameTruth:
        return FrameTruth(
            float(self.t[i]),
            float(self.d_pitch[i]),
            float(self.d_volume[i]),
            float(self.pos_pitch[i]),
            float(self.pos_volume[i]),
            tuple(float(x) for x in self.c[i]),
            tuple(float(x) for x in self.f_hz[i]),
        )


@dataclass
class _Chunk:
    first: int  # index of the chunk's first frame
    values: NDArray[np.int64]  # (CHUNK, ch)
    phase: FloatArray  # (CHUNK, ch) true phase (cycles) at each window end
    truth: Truth


class SimBoard:
    """A sensor board with oscillators, antennas and a performer, frame by frame.

    ``next_values()`` gives one frame and advances time by ``window_s``; ``truth`` tells
    what happened in that frame; ``next_bytes()`` gives the frame as the board's bytes;
    ``run(n)`` gives n frames at once. All three read the same stream.
    """

    def __init__(
        self, settings: SimSettings | None = None, performance: Performance | None = None
    ) -> None:
        self.settings = s = settings or SimSettings()
        self.performance = performance or Performance()
        self.names = s.names
        self._specs = s.all_channels()
        self._rng = np.random.default_rng(s.seed)
        n_ch = len(self._specs)
        self._f0 = np.array([c.nominal_hz() for c in self._specs])
        # Drift scale per channel: antennas 1, the antenna-less reference ref_fraction.
        self._drift_scale = np.array(
            [1.0 if c.hand != "none" else s.drift.ref_fraction for c in self._specs]
        )
        # Carried state between chunks.
        self._phase0 = self._rng.uniform(0.0, 1.0, n_ch)  # a counter starts at a random phase
        obs0 = self._phase0 + s.noise.phase_cycles * self._rng.standard_normal(n_ch)
        self._phase_true = self._phase0.copy()
        self._last_floor = np.floor(obs0)
        self._last_ticks = self._edge_ticks(np.zeros(n_ch), obs0, self._f0)
        self._walk_c = np.zeros(n_ch)
        self._walk_g = 0.0
        self._walk_vc = np.zeros(n_ch)
        self._walk_vg = 0.0
        self._frames_done = 0
        self._chunk: _Chunk | None = None
        self._cur: int | None = None
        self._seq = 0
        log.debug("sim board %s, nominal %s Hz", self.names, np.round(self._f0, 1).tolist())

    # ---- public

    @property
    def time(self) -> float:
        """Seconds simulated so far (end of the last frame handed out)."""
        return self._frames_done * self.settings.window_s

    @property
    def frames(self) -> int:
        return self._frames_done

    def nominal_values(self) -> list[float]:
        """The reading per channel with no hand, drift or noise: N0 = f T or P0 = scale clk / f."""
        s = self.settings
        if s.kind == "count":
            return [float(f * s.window_s) for f in self._f0]
        return [float(s.period_scale * s.clock_hz / f) for f in self._f0]

    def next_values(self) -> list[int]:
        """One frame of readings, in channel order; advances time by one window."""
        chunk, j = self._advance()
        return chunk.values[j].tolist()  # type: ignore[no-any-return]

    @property
    def truth(self) -> FrameTruth:
        """Ground truth of the last frame handed out."""
        if self._chunk is None or self._cur is None:
            raise ConfigError("no frame yet: call next_values() or next_bytes() first")
        return self._chunk.truth.frame(self._cur)

    @property
    def phase_cycles(self) -> FloatArray:
        """True oscillator phase (cycles) per channel at the end of the last frame handed out."""
        if self._chunk is None or self._cur is None:
            return self._phase0.copy()
        return self._chunk.phase[self._cur].copy()

    def next_bytes(self) -> bytes:
        """One frame as the board sends it (text line or COBS binary frame)."""
        from bridge import frames  # imported here: the simulator's maths does not need it

        values = self.next_values()
        s = self.settings
        seq = self._seq
        self._seq += 1
        if s.format == "binary":
            return frames.encode_binary(seq, values)
        # A board's text counter is a uint32 and wraps like one.
        return frames.encode_text(
            values,
            seq=seq % 2**32 if s.text_seq else None,
            names=self.names if s.text_names else None,
        )

    def run(self, n_frames: int) -> tuple[NDArray[np.int64], Truth]:
        """The next n frames at once: values (n, channels) and their Truth arrays.

        Identical to n calls of next_values() from the same point.
        """
        if n_frames < 0:
            raise ConfigError(f"run needs n_frames >= 0 (got {n_frames})")
        parts: list[tuple[_Chunk, int, int]] = []
        left = n_frames
        while left > 0:
            chunk, j = self._advance()
            take = min(left, CHUNK - j)
            parts.append((chunk, j, j + take))
            self._cur = j + take - 1
            self._frames_done += take - 1
            left -= take
        values = (
            np.concatenate([c.values[a:b] for c, a, b in parts])
            if parts
            else np.zeros((0, len(self.names)), dtype=np.int64)
        )
        fields = ("t", "d_pitch", "d_volume", "pos_pitch", "pos_volume", "c", "f_hz")
        if parts:
            arrays = {
                f: np.concatenate([getattr(c.truth, f)[a:b] for c, a, b in parts]) for f in fields
            }
        else:
            arrays = {
                f: np.zeros((0, len(self.names)) if f in ("c", "f_hz") else 0) for f in fields
            }
        return values, Truth(**arrays, d_far=self.settings.d_far_m)

    # ---- internals

    def _advance(self) -> tuple[_Chunk, int]:
        """Hand out the next frame's place in a chunk, computing a new chunk when needed."""
        if self._chunk is None or self._cur is None or self._cur + 1 >= CHUNK:
            first = 0 if self._chunk is None else self._chunk.first + CHUNK
            self._chunk = self._compute(first)
            self._cur = 0
        else:
            self._cur += 1
        self._frames_done += 1
        return self._chunk, self._cur

    def _edge_ticks(self, t_end: FloatArray, obs: FloatArray, f: FloatArray) -> FloatArray:
        """Timer count at the last oscillator edge before t_end (the edge at floor(obs)),
        placing it by the mean frequency over the window."""
        t_edge = t_end - (obs - np.floor(obs)) / f
        return np.floor(t_edge * self.settings.clock_hz)

    def _drift(
        self, tm: FloatArray, z_c: FloatArray, z_g: FloatArray
    ) -> tuple[FloatArray, FloatArray]:
        """Relative C_fixed change x (n, ch) and gain change g (n,) at the window centres."""
        d = self.settings.drift
        pc, pg = d.c_fixed_percent / 100.0, d.gain_percent / 100.0
        n = tm.shape[0]
        if d.mode == "off":
            return np.zeros((n, len(self._specs))), np.zeros(n)
        if d.mode == "walk":
            # Integrated Brownian motion: rate v with variance s_v^2 t, level x = int v dt,
            # var x(T) = s_v^2 T^3 / 3, so s_v = percent * sqrt(3 / T^3) gives std = percent.
            dt = self.settings.window_s
            kick = math.sqrt(3.0 / d.duration_s**3) * math.sqrt(dt)
            vc = self._walk_vc + np.cumsum(pc * kick * z_c, axis=0)
            vg = self._walk_vg + np.cumsum(pg * kick * z_g)
            x = self._walk_c + np.cumsum(vc * dt, axis=0)
            g = self._walk_g + np.cumsum(vg * dt)
            self._walk_vc, self._walk_vg = vc[-1].copy(), float(vg[-1])
            self._walk_c = x[-1].copy()
            self._walk_g = float(g[-1])
            return x * self._drift_scale, g
        u = tm / d.duration_s if d.mode == "ramp" else 0.5 - 0.5 * np.cos(np.pi * tm / d.duration_s)
        return np.outer(u, pc * self._drift_scale), pg * u

    def _compute(self, first: int) -> _Chunk:
        s = self.settings
        T = s.window_s
        n_ch = len(self._specs)
        i = np.arange(first, first + CHUNK, dtype=np.float64)
        t0, t1, tm = i * T, (i + 1.0) * T, (i + 0.5) * T
        # Every random number a frame needs, drawn in one block so the stream is fixed.
        z = self._rng.standard_normal((CHUNK, 3 * n_ch + 1))
        z_f, z_p, z_c, z_g = z[:, :n_ch], z[:, n_ch : 2 * n_ch], z[:, 2 * n_ch : 3 * n_ch], z[:, -1]

        dp, dv = self.performance.distances(tm)
        hand = np.empty((CHUNK, n_ch))
        for j, spec in enumerate(self._specs):
            d = (
                dp
                if spec.hand == "pitch"
                else dv
                if spec.hand == "volume"
                else np.full(CHUNK, ABSENT)
            )
            hand[:, j] = spec.hand_ratio(d)
        x, g = self._drift(tm, z_c, z_g)
        # f = k (1 + g) / (C_fixed (1 + x) + C_hand), with k = f0 C_fixed.
        f = self._f0 * (1.0 + g)[:, None] / (1.0 + x + hand)
        c_true = hand / (1.0 + x)

        # Cycles gained over [t0, t1]: integral of f (1 + a sin(w t + phi)) dt
        #   = f T + f a / w (cos(w t0 + phi) - cos(w t1 + phi)); zero hum term for whole periods.
        w = 2.0 * np.pi * s.hum.hz
        a = s.hum.ppm * 1e-6
        hum = (a / w) * (np.cos(w * t0 + s.hum.phase_rad) - np.cos(w * t1 + s.hum.phase_rad))
        sigma_f = s.noise.freq_ppm * 1e-6 * math.sqrt(0.01 / T)
        inc = f * (T + hum)[:, None] * (1.0 + sigma_f * z_f)
        phase = self._phase_true + np.cumsum(inc, axis=0)
        self._phase_true = phase[-1].copy()
        obs = phase + s.noise.phase_cycles * z_p  # the phase the counter latches, with jitter

        fl = np.floor(obs)
        counts = np.diff(fl, axis=0, prepend=self._last_floor[None, :])
        self._last_floor = fl[-1].copy()
        if s.kind == "count":
            values = counts
        else:
            ticks = self._edge_ticks(t1[:, None], obs, inc / T)
            dt = np.diff(ticks, axis=0, prepend=self._last_ticks[None, :])
            self._last_ticks = ticks[-1].copy()
            values = np.rint(s.period_scale * dt / np.maximum(counts, 1.0))

        truth = Truth(
            t=tm,
            d_pitch=dp,
            d_volume=dv,
            pos_pitch=ideal_position(dp, s.d_near_m, s.d_far_m),
            pos_volume=ideal_position(dv, s.d_near_m, s.d_far_m),
            c=c_true,
            f_hz=f,
            d_far=s.d_far_m,
        )
        # Readings are unsigned on the wire. Only an oscillator slower than the phase jitter
        # per window could latch a negative count; clamp rather than send garbage.
        return _Chunk(first, np.maximum(values, 0.0).astype(np.int64), phase, truth)
