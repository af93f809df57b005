"""Mains-hum cancelling: subtract an adaptive sinusoid at the known mains frequency.

Hum from the mains wiring frequency-modulates the antenna oscillators. A counting window
of whole mains periods integrates it away (DOMAIN.md section 2); a short window (1 ms at
1000 frames/s) cannot, and the hum then swings every reading by tens of ppm, which is
tens of cents before smoothing and feeds the speed estimate of the adaptive smoother.

The frequency is known, so the hum can be estimated and subtracted instead of filtered.
Per channel, with reference phasors cos(k w n) and sin(k w n) for the mains harmonic k
(w the mains frequency in radians per frame; above the Nyquist frequency it aliases, and
the sampled phasor aliases the same way)::

    h[n] = sum_k  A_k cos(k w n) + B_k sin(k w n)      the hum estimate
    y[n] = x[n] - h[n]                                 the output: no delay, no smoothing
    e[n] = clip(y[n] - m[n])                           m: a short average of y (below)
    A_k += 2 g_k e[n] cos(k w n),  B_k += 2 g_k e[n] sin(k w n)
    g_k = g / Re H(k w),  g = 1 / (tau * rate)         H: the response of y - m

This is the adaptive noise canceller with a sinusoidal reference (Widrow et al.,
"Adaptive noise cancelling: principles and applications", Proc. IEEE 63(12), 1975); the
update is the LMS rule, which for a sinusoid is synchronous demodulation: A and B follow
the in-phase and quadrature amplitudes with time constant ``tau`` (a step of 2g on a
regressor whose mean square is 1/2 closes a fraction g of the gap each frame, which is
a time constant of tau; at the Nyquist frequency the cosine's mean square is 1 and the
sine is 0, and the step is g). As a linear filter it is a notch of width about
1/(pi tau) Hz at each mains harmonic (Widrow et al. 1975), so the hand signal (all below
about 10 Hz, vibrato 5-7 Hz) passes with no delay: the output of a frame is that
frame's reading minus a sinusoid fixed by the past, and a step in the reading is a step
in the output in the same frame.

Why the update looks at ``y - m`` and clips it. The reading's level (some 10^5 ticks)
and the hand's movements are not hum, but a step has some energy at every frequency: a
step of S moves A and B by about 2 g S / (w per frame), 1.3 % of S at 1000 frames/s with
tau 0.5 s. Subtracting m, a first-order average with its corner at a tenth of the lowest
hum frequency, removes the level; the hum keeps 98 % of its size in y - m and turns by
under 6 degrees, which changes the convergence speed (made up by the 1/Re H in g_k), not
the end point. Clipping e at ``CLIP`` times its running mean absolute value (a
Huber-type bounded influence) makes a hand arriving (a step of several percent) disturb
the estimate no more than a noise burst would. There is no "freeze while the hand
moves": a vibrato would freeze it for good, and a slow, clipped update needs none.

Limits, stated plainly. The reference runs at the nominal 50 or 60 Hz; the grid
wanders (typically by some hundredths of a hertz), which the estimate follows as a
slowly turning phasor, leaving about 2 pi df tau of the hum (-24 dB at df = 0.02 Hz
and -10 dB at 0.1 Hz with tau 0.5 s) [first-order tracking error, textbook; the
simulator with its hum at 50.1 Hz agrees]. A shorter ``time_constant_s`` follows better
and lets more noise into the estimate (a still hand hardly notices: that noise sits at
50 Hz, far above the smoother's cutoff). After frames lost on the link the engine turns
the phase on by the gap in the board's sequence numbers (``MainsReference.advance``);
without sequence numbers a loss shifts the phase and the estimate re-converges in
about ``tau``, as it does when a hand brings hum of its own (the estimate is per channel).

    ref = MainsReference([50.0], rate_hz=1000.0)      # one per engine
    hum = HumCanceller(ref, time_constant_s=0.5)      # one per channel
    for x in readings:
        ref.advance()
        y = hum.clean(x)

Plain Python floats in the per-frame path: the phasors turn by a precomputed rotation
(no math.sin per frame), and nothing is allocated after construction.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from .calibrate import rejects_hum
from .errors import ConfigError

log = logging.getLogger(__name__)

#: Hum frequencies (after aliasing) below this are not cancelled: hand movement lives
#: there (vibrato 5-7 Hz, DOMAIN.md section 5; fast leaps reach about 10 Hz [memory]),
#: and a notch in that band would eat playing.
MIN_HUM_HZ = 15.0
#: Two cancelled frequencies closer than this (after aliasing) would be one component
#: estimated twice; the second is dropped.
MIN_SPACING_HZ = 1.0
#: The update's error is clipped at this many running mean absolute values (about 3
#: standard deviations of Gaussian noise, where the mean absolute value is 0.8 sigma).
CLIP = 4.0
#: The running scale learns from |e| capped at this many times itself, so a step cannot
#: inflate it quickly (it grows by at most (SCALE_LIMIT - 1) times its rate per frame).
SCALE_LIMIT = 2.0
#: Time constant of the running scale, in units of ``time_constant_s``.
SCALE_TAU = 0.25
#: The clip level never falls below this fraction of the reading (0.1 ppm, far below one
#: timer tick in a period reading): a noise-free reading would otherwise shrink the
#: scale towards zero, and hum appearing later could never be learnt.
SCALE_FLOOR = 1e-7
#: Frames at the start during which only the level and the scale are learnt.
WARMUP_LEVEL_TAUS = 4.0

_TWO_PI = 2.0 * math.pi


def alias_hz(f_hz: float, rate_hz: float) -> float:
    """The frequency a sinusoid of ``f_hz`` appears at when sampled ``rate_hz`` times a second.

    Folded into 0 .. rate/2 (Nyquist-Shannon: sampling cannot tell f from |f - m rate|).
    """
    r = math.fmod(f_hz, rate_hz)
    return min(r, rate_hz - r)


class MainsFilterSettings(BaseModel):
    """The mains-hum canceller of each antenna channel (see the module docstring).

    ``enabled = "auto"`` turns it on when the mains frequency is known (here or the
    board's ``mains_hz``) and the counting window is not a whole number of mains
    periods: a window of whole periods already rejects the hum. ``true`` forces it on
    (a mains frequency is then needed), ``false`` off.

    ``harmonics``: how many multiples of the mains frequency to cancel (1: the
    fundamental only). Hum picked up from a hand and cables is mostly the fundamental;
    dimmers and switched supplies add odd harmonics (150 Hz, 250 Hz), for which 3 or 5
    helps. Each harmonic costs a little time per frame.

    ``time_constant_s``: how fast the estimate follows (0.5-2 s is sensible): longer is
    steadier and disturbed less by hand moves; shorter follows a wandering grid
    frequency and a changing hum better. On the simulated 1000 frames/s board 0.25 to
    2 s all leave the same still-hand pitch noise; 0.5 s converges within a couple of
    seconds of start-up and keeps a grid 0.05 Hz off nominal at -16 dB.
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    enabled: bool | Literal["auto"] = Field(
        default="auto",
        description="auto: on when the mains frequency is known and the window does not reject hum",
    )
    mains_hz: Literal[50, 60] | None = Field(
        default=None, description="mains frequency; unset: the board's mains_hz"
    )
    harmonics: int = Field(default=1, ge=1, le=8, description="multiples of mains_hz to cancel")
    time_constant_s: float = Field(
        default=0.5, ge=0.05, le=60.0, description="how fast the hum estimate follows"
    )

    def with_board_mains(self, board_mains_hz: float | None) -> MainsFilterSettings:
        """These settings with ``mains_hz`` taken from the board when not set here."""
        if self.mains_hz is not None or board_mains_hz is None:
            return self
        return self.model_copy(update={"mains_hz": int(board_mains_hz)})

    def frequencies(self, rate_hz: float) -> list[float]:
        """The hum frequencies (Hz, before aliasing) to cancel at ``rate_hz`` frames a second.

        Empty when the canceller is off. The window is taken as one frame (1/rate_hz).
        Harmonics that alias below ``MIN_HUM_HZ`` or onto another one are left out.
        """
        if self.enabled is False:
            return []
        mains = self.mains_hz
        if mains is None:
            if self.enabled is True:
                raise ConfigError(
                    "mains_filter.enabled is true but no mains frequency is known: set "
                    "mains_filter.mains_hz or board.mains_hz to 50 or 60"
                )
            return []
        if self.enabled == "auto" and rejects_hum(1.0 / rate_hz, float(mains)):
            return []
        out: list[float] = []
        seen: list[float] = []
        for k in range(1, self.harmonics + 1):
            f = k * float(mains)
            a = alias_hz(f, rate_hz)
            if a < MIN_HUM_HZ or any(abs(a - s) < MIN_SPACING_HZ for s in seen):
                log.info(
                    "mains hum at %g Hz appears at %.3g Hz at %g frames/s: not cancelled",
                    f,
                    a,
                    rate_hz,
                )
                continue
            out.append(f)
            seen.append(a)
        return out


class MainsReference:
    """The unit phasors cos(2 pi f t), sin(2 pi f t) of each hum frequency, frame by frame.

    One per engine (every channel sees the same mains). Each frame the phasors turn by a
    precomputed angle (a complex multiplication), and a first-order correction
    (3 - |z|^2) / 2 keeps their length at 1 against rounding. ``cos[i]``, ``sin[i]`` are
    the current values; ``power_cos[i]`` is the mean square of the cosine (1/2, or 1 for a
    frequency that aliases exactly onto the Nyquist frequency, where the sine is zero).
    """

    __slots__ = ("_rc", "_rs", "cos", "freqs_hz", "power_cos", "power_sin", "rate_hz", "sin")

    def __init__(self, freqs_hz: Sequence[float], rate_hz: float) -> None:
        if not (rate_hz > 0.0 and math.isfinite(rate_hz)):
            raise ConfigError(f"frame rate must be positive, got {rate_hz}")
        self.freqs_hz = [float(f) for f in freqs_hz]
        self.rate_hz = float(rate_hz)
        self.cos = [1.0] * len(self.freqs_hz)
        self.sin = [0.0] * len(self.freqs_hz)
        self._rc: list[float] = []
        self._rs: list[float] = []
        self.power_cos: list[float] = []
        self.power_sin: list[float] = []
        for f in self.freqs_hz:
            w = _TWO_PI * math.fmod(f / self.rate_hz, 1.0)  # radians per frame
            self._rc.append(math.cos(w))
            self._rs.append(math.sin(w))
            nyquist = abs(alias_hz(f, self.rate_hz) - self.rate_hz / 2.0) < 1e-9 * self.rate_hz
            # At Nyquist the samples are cos(pi n) = +-1 and sin(pi n) = 0.
            self.power_cos.append(1.0 if nyquist else 0.5)
            self.power_sin.append(0.0 if nyquist else 0.5)

    def __len__(self) -> int:
        return len(self.freqs_hz)

    def advance(self, frames: int = 1) -> None:
        """Turn every phasor on by ``frames`` frames (more than one after lost frames)."""
        c_, s_, rc_, rs_ = self.cos, self.sin, self._rc, self._rs
        if frames == 1 and len(c_) == 1:  # the usual case, without the loops' cost
            c, s, rc, rs = c_[0], s_[0], rc_[0], rs_[0]
            c, s = c * rc - s * rs, s * rc + c * rs
            k = 1.5 - 0.5 * (c * c + s * s)
            c_[0] = c * k
            s_[0] = s * k
            return
        for _ in range(frames):
            for i in range(len(c_)):
                c, s, rc, rs = c_[i], s_[i], rc_[i], rs_[i]
                c, s = c * rc - s * rs, s * rc + c * rs
                # One Newton step towards |z| = 1: rounding cannot make the phasor drift.
                k = 1.5 - 0.5 * (c * c + s * s)
                c_[i] = c * k
                s_[i] = s * k


class HumCanceller:
    """Removes the hum from one channel's readings; see the module docstring.

    ``clean(x)`` returns ``x`` minus the current hum estimate and then updates the
    estimate; call ``ref.advance()`` once per frame before the channels' ``clean``.
    A reading that is not finite is returned unchanged and teaches nothing.
    """

    __slots__ = (
        "_a",
        "_b",
        "_g",
        "_g_level",
        "_g_scale",
        "_gain_cos",
        "_gain_sin",
        "_level",
        "_n",
        "_scale",
        "_warmup",
        "ref",
        "time_constant_s",
    )

    def __init__(self, ref: MainsReference, time_constant_s: float = 0.5) -> None:
        if not (time_constant_s > 0.0 and math.isfinite(time_constant_s)):
            raise ConfigError(f"time_constant_s must be positive, got {time_constant_s}")
        self.ref = ref
        self.time_constant_s = float(time_constant_s)
        rate = ref.rate_hz
        n = len(ref)
        self._g = 1.0 / max(1.0, time_constant_s * rate)
        lowest = min((alias_hz(f, rate) for f in ref.freqs_hz), default=rate / 2.0)
        # The level follower: a first-order low-pass at a tenth of the lowest hum frequency.
        g_level = 1.0 - math.exp(-_TWO_PI * 0.1 * lowest / rate)
        self._g_level = g_level
        # LMS step g / (power * Re H): each amplitude then follows with time constant tau.
        # H is the response of e = y - level at the hum frequency (H(z) = 1 - a/(1 - (1-a)/z)
        # for the follower's a); by averaging, the estimate's error shrinks by g Re H a frame.
        self._gain_cos = []
        self._gain_sin = []
        for f, pc, ps in zip(ref.freqs_hz, ref.power_cos, ref.power_sin):
            z = complex(math.cos(_TWO_PI * f / rate), math.sin(_TWO_PI * f / rate))
            re_h = (1.0 - g_level / (1.0 - (1.0 - g_level) / z)).real
            self._gain_cos.append(self._g / (pc * re_h) if pc > 0.0 else 0.0)
            self._gain_sin.append(self._g / (ps * re_h) if ps > 0.0 else 0.0)
        self._g_scale = 1.0 / max(1.0, SCALE_TAU * time_constant_s * rate)
        self._warmup = max(1, math.ceil(WARMUP_LEVEL_TAUS / g_level))
        self._a = [0.0] * n
        self._b = [0.0] * n
        self._level = 0.0
        self._scale = 0.0
        self._n = 0

    def reset(self) -> None:
        """Forget the estimate: the canceller learns again from the next reading."""
        for i in range(len(self._a)):
            self._a[i] = 0.0
            self._b[i] = 0.0
        self._level = 0.0
        self._scale = 0.0
        self._n = 0

    @property
    def amplitudes(self) -> list[float]:
        """The estimated hum amplitude at each frequency (reading units, peak)."""
        return [math.hypot(a, b) for a, b in zip(self._a, self._b)]

    def clean(self, x: float) -> float:
        """The reading with the hum estimate subtracted; then learn from it."""
        if x - x != 0.0:  # NaN or infinite
            return x
        ref = self.ref
        cos_, sin_, a_, b_ = ref.cos, ref.sin, self._a, self._b
        k = len(a_)
        if k == 1:  # the usual case, without the loop's cost
            h = a_[0] * cos_[0] + b_[0] * sin_[0]
        else:
            h = 0.0
            for i in range(k):
                h += a_[i] * cos_[i] + b_[i] * sin_[i]
        y = x - h
        if self._n < self._warmup:
            self._start(y)
            return y
        level = self._level
        level += self._g_level * (y - level)
        e = y - level
        ae = e if e >= 0.0 else -e
        scale = self._scale
        floor = SCALE_FLOOR * (level if level >= 0.0 else -level)
        lim = SCALE_LIMIT * scale + floor
        scale += self._g_scale * ((ae if ae < lim else lim) - scale)
        lim = CLIP * scale + floor
        if e > lim:
            e = lim
        elif e < -lim:
            e = -lim
        gc, gs = self._gain_cos, self._gain_sin
        if k == 1:
            a_[0] += gc[0] * e * cos_[0]
            b_[0] += gs[0] * e * sin_[0]
        else:
            for i in range(k):
                a_[i] += gc[i] * e * cos_[i]
                b_[i] += gs[i] * e * sin_[i]
        check = level + scale + h
        if check - check != 0.0:
            # Absurd input (near the float range) overflowed a sum: start again.
            self.reset()
            return x
        self._level = level
        self._scale = scale
        return y

    def _start(self, y: float) -> None:
        """The first frames: learn the level and the size of the residual, nothing else."""
        n = self._n
        self._n = n + 1
        if n == 0:
            self._level = y
            return
        level = self._level + self._g_level * (y - self._level)
        e = y - level
        self._level = level
        self._scale += ((e if e >= 0.0 else -e) - self._scale) / n


def make_cancellers(
    settings: MainsFilterSettings, rate_hz: float, n_channels: int
) -> tuple[MainsReference | None, list[HumCanceller]]:
    """The shared reference and one canceller per channel, or (None, []) when off."""
    freqs = settings.frequencies(rate_hz)
    if not freqs:
        return None, []
    ref = MainsReference(freqs, rate_hz)
    log.info(
        "cancelling mains hum at %s Hz (time constant %g s)",
        ", ".join(f"{f:g}" for f in freqs),
        settings.time_constant_s,
    )
    return ref, [HumCanceller(ref, settings.time_constant_s) for _ in range(n_channels)]
