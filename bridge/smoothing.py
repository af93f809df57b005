"""Smoothing of hand position: the 1 Euro filter.

A first-order low-pass whose cutoff rises with speed: when the hand is still, a low
cutoff removes jitter; when it moves, a higher cutoff removes lag. From the paper
(Casiez, Roussel, Vogel, "1 Euro Filter: A Simple Speed-based Low-pass Filter for Noisy
Input in Interactive Systems", CHI 2012, doi 10.1145/2207676.2208639)::

    tau   = 1 / (2 pi fc)                 time constant of a first-order low-pass
    alpha = 1 / (1 + tau / Te)            smoothing factor for a sample period Te
    dx    = (x - x_hat_prev) / Te         speed, from the previous *filtered* value
    dx_hat = low-pass(dx, cutoff = dcutoff)
    fc    = mincutoff + beta * |dx_hat|   the adaptive cutoff
    x_hat = alpha * x + (1 - alpha) * x_hat_prev

Usage::

    f = OneEuro(1000.0, mincutoff=0.5, beta=5.0, dcutoff=3.0)
    y = f.filter(x)            # fixed rate, Te = 1/rate_hz
    y = f.filter(x, t=t_s)     # real timestamps: Te = t - t_prev

Everything in the per-frame path is plain Python floats: no numpy, no allocation.
"""

from __future__ import annotations

import logging
import math

from pydantic import BaseModel, ConfigDict, Field

log = logging.getLogger(__name__)

_TWO_PI = 2.0 * math.pi


def alpha(rate: float, cutoff: float) -> float:
    """Smoothing factor of a first-order low-pass at `cutoff` Hz sampled at `rate` Hz.

    alpha = 1 / (1 + tau/Te) with tau = 1/(2 pi cutoff) and Te = 1/rate (Casiez et al.,
    CHI 2012). alpha(120, 1) = 0.0497547.
    """
    tau = 1.0 / (_TWO_PI * cutoff)
    te = 1.0 / rate
    return 1.0 / (1.0 + tau / te)


class OneEuro:
    """The 1 Euro filter for one scalar signal.

    `rate_hz` is the nominal frame rate, used when `filter` gets no timestamp (and when
    timestamps do not advance). `mincutoff` (Hz) sets the smoothing when still, `beta`
    (Hz per unit/s of speed) how fast the cutoff opens with speed, `dcutoff` (Hz) the
    smoothing of the speed estimate itself.
    """

    __slots__ = (
        "_dx_hat",
        "_k_d_fixed",
        "_started",
        "_t_prev",
        "_te",
        "_x_hat",
        "beta",
        "dcutoff",
        "mincutoff",
        "rate_hz",
    )

    def __init__(
        self, rate_hz: float, mincutoff: float = 1.0, beta: float = 0.0, dcutoff: float = 1.0
    ) -> None:
        if not (rate_hz > 0.0 and math.isfinite(rate_hz)):
            raise ValueError(f"rate_hz must be a positive number, got {rate_hz!r}")
        if not (mincutoff > 0.0 and dcutoff > 0.0 and math.isfinite(mincutoff + dcutoff)):
            raise ValueError("mincutoff and dcutoff must be positive numbers of hertz")
        if not (beta >= 0.0 and math.isfinite(beta)):
            raise ValueError(f"beta must be zero or positive, got {beta!r}")
        self.rate_hz = float(rate_hz)
        self.mincutoff = float(mincutoff)
        self.beta = float(beta)
        self.dcutoff = float(dcutoff)
        self._te = 1.0 / self.rate_hz
        # The derivative's alpha at the nominal rate never changes: compute it once.
        self._k_d_fixed = alpha(self.rate_hz, self.dcutoff)
        self._x_hat = 0.0
        self._dx_hat = 0.0
        self._t_prev = 0.0
        self._started = False

    def reset(self) -> None:
        """Forget the history: the next sample passes through unchanged."""
        self._x_hat = 0.0
        self._dx_hat = 0.0
        self._t_prev = 0.0
        self._started = False

    @property
    def value(self) -> float:
        """The last filtered value (0.0 before the first sample)."""
        return self._x_hat

    def filter(self, x: float, t: float | None = None) -> float:
        """Filter one sample and return the smoothed value.

        With `t` (seconds, any origin) the actual interval since the previous sample is
        used as Te; an interval that is zero, negative or not finite falls back to the
        nominal 1/rate_hz. A non-finite `x` is ignored: the previous output is returned.
        """
        x = float(x)  # numpy scalars become plain floats here, once
        if not math.isfinite(x):
            return self._x_hat
        if not self._started:
            self._started = True
            self._x_hat = x
            self._dx_hat = 0.0
            if t is not None:
                self._t_prev = float(t)
            return x

        te = self._te
        k_d = self._k_d_fixed
        if t is not None:
            t = float(t)
            dt = t - self._t_prev
            self._t_prev = t
            if dt > 0.0 and dt != te and math.isfinite(dt):
                te = dt
                # alpha(1/te, dcutoff) written out: 1 / (1 + 1/(2 pi fc te))
                k_d = 1.0 / (1.0 + 1.0 / (_TWO_PI * self.dcutoff * te))

        x_prev = self._x_hat
        # Speed from the previous filtered value (the paper's Algorithm 1), smoothed.
        dx = (x - x_prev) / te
        dx_hat = self._dx_hat + k_d * (dx - self._dx_hat)
        self._dx_hat = dx_hat
        fc = self.mincutoff + self.beta * (dx_hat if dx_hat >= 0.0 else -dx_hat)
        k = 1.0 / (1.0 + 1.0 / (_TWO_PI * fc * te))
        x_hat = x_prev + k * (x - x_prev)
        self._x_hat = x_hat
        return x_hat


class SmoothingSettings(BaseModel):
    """1 Euro settings for hand position (0..1, where 1 is the whole playing range).

    Why these defaults. The pitch map stretches position 0..1 over a span of, say,
    36 semitones = 3600 cents, so one cent is 0.00028 of the range. We take as realistic
    position noise a standard deviation of 0.001 per frame at 1000 frames/s (3.6 cents
    raw): a board that counts over a window ten times longer at 100 frames/s then has
    about 0.0003 per frame, the same noise density. Both sides of the trade were measured
    by simulation (tests/test_smoothing.py repeats the measurement):

    - still hand: `min_cutoff_hz` 0.5 with `beta` 5 leaves about 0.2 cents rms (0.7
      cents at worst) at both 1000 and 100 frames/s, well under the 3 cents or so that
      listeners can tell apart (Hill & Summers, JASA 2007). Noise in the speed estimate
      lifts the cutoff a little above 0.5 Hz; a larger `beta` or `derivative_cutoff_hz`
      lifts it more (beta 8 with 5 Hz: about 0.3 cents rms).
    - moving hand: a 5-semitone move (0.139 of the range) made in 50 ms peaks at about
      4.4 range/s. The cutoff opens to about 50 Hz within the move and the midpoint of
      the move comes out about 4 ms late at 1000 frames/s (one frame at 100 frames/s);
      slower moves lag a little more in time but less in cents.

    Lower `min_cutoff_hz` for a steadier held note, raise `beta` for less lag on leaps.
    """

    model_config = ConfigDict(extra="forbid")

    enabled: bool = True
    min_cutoff_hz: float = Field(default=0.5, gt=0.0, le=100.0, description="cutoff when still")
    beta: float = Field(default=5.0, ge=0.0, le=10_000.0, description="cutoff rise per unit/s of speed")
    derivative_cutoff_hz: float = Field(default=3.0, gt=0.0, le=100.0, description="speed smoothing")
    mean_s: float = Field(
        default=0.004,
        ge=0.0,
        le=0.1,
        description="readings of the last mean_s seconds averaged before the calibration curve",
    )

    def mean_frames(self, rate_hz: float) -> int:
        """How many readings ``mean_s`` spans at ``rate_hz`` (at least 1: no averaging)."""
        return max(1, round(self.mean_s * rate_hz))

    def make(self, rate_hz: float) -> OneEuro:
        """A fresh filter for one channel at the nominal frame rate `rate_hz`."""
        return OneEuro(rate_hz, self.min_cutoff_hz, self.beta, self.derivative_cutoff_hz)
