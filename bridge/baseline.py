"""Hand-absent level tracking: follow slow drift, freeze while a hand is present.

The practice of capacitive sensing (DOMAIN.md section 3), for a sensor where a hand
*lowers* counts (raises periods)::

    deviation c = N0/N - 1 (counts) or P/P0 - 1 (periods), in noise units z = c/sigma_c
    avg = a short average of the reading (average_tau_s)

    present:  baseline frozen; absent again after debounce_frames in a row with z < off
    absent:   z > on              not followed; present after debounce_frames in a row
              avg on the hand's   baseline follows avg slowly (follow_tau_s), and never
              side of baseline    faster than max_follow_c_per_s
              avg beyond empty    "beyond empty" means the baseline is wrong: it follows
                                  avg fast (recover_tau_s); if avg stays more than
                                  reverse_sigma beyond for rebase_after_s, the baseline
                                  jumps to the mean of those readings (a hand was near
                                  at power-up, or the room changed)

    on  = threshold_sigma + hysteresis_sigma      off = threshold_sigma - hysteresis_sigma

Presence is judged frame by frame (the debounce does the rejecting); the follower and
the reverse test look at the short average so that single noisy frames neither drag
the baseline up (a fast follower on raw frames would ride the top of the noise) nor
break a sustained reverse reading.

sigma_c is the measured noise in c units (noise/base), never below ``noise_floor_c``:
a very quiet board would otherwise set a hair-trigger threshold. Expressing the floor
in c (a fraction of the reading) makes it the same for count and period boards.

A held hand cannot fade: while present nothing moves the baseline; while absent the
hand-side follow rate is capped, so even a hand hovering just under the threshold is
absorbed no faster than ``max_follow_c_per_s``.

``ReferenceCorrector`` divides out common-mode oscillator drift seen on a reference
oscillator with no antenna; apply it to the raw reading before the tracker.

Example::

    tracker = BaselineTracker(BaselineSettings(), base=cal.baseline, noise=cal.noise,
                              kind="count", rate_hz=50)
    for raw in readings:
        base = tracker.update(raw)
        c = c_from_raw(raw, base, "count")
"""

from __future__ import annotations

import logging
import math
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from bridge.errors import CalibrationError

log = logging.getLogger(__name__)

Kind = Literal["count", "period"]


class BaselineSettings(BaseModel):
    """How the hand-absent level is tracked and presence decided (see the module docstring).

    Defaults [practice, memory]: presence on at 8 noise units and off at 4, three frames
    of debounce; drift followed with a 5 s time constant but at most 0.02 % of the
    reading a second toward the hand (ordinary warm-up drift is slower, a hand is not);
    readings beyond empty recovered with 0.25 s, and a re-baseline after 1 s more than 3
    noise units beyond; a 0.1 s short average for the follower. With these the baseline
    sits about a quarter of a noise unit above the mean empty reading (the fast side
    wins a little), and lags a steady drift by drift rate * follow_tau_s.
    """

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    threshold_sigma: float = Field(default=6.0, gt=0.0)
    hysteresis_sigma: float = Field(default=2.0, ge=0.0)
    debounce_frames: int = Field(default=3, ge=1)
    follow_tau_s: float = Field(default=0.5, gt=0.0)
    recover_tau_s: float = Field(default=0.25, gt=0.0)
    max_follow_c_per_s: float = Field(default=2e-4, ge=0.0)
    reverse_sigma: float = Field(default=3.0, gt=0.0)
    rebase_after_s: float = Field(default=1.0, gt=0.0)
    average_tau_s: float = Field(default=0.1, gt=0.0)
    #: When a hand is detected, the baseline returns to its value this long before: the
    #: follower may have absorbed the start of the hand's approach (0 = off).
    rollback_s: float = Field(default=0.3, ge=0.0)
    noise_floor_c: float = Field(default=1e-5, gt=0.0)

    @model_validator(mode="after")
    def _check(self) -> BaselineSettings:
        if self.hysteresis_sigma >= self.threshold_sigma:
            raise ValueError("hysteresis_sigma must be smaller than threshold_sigma")
        return self


class BaselineTracker:
    """Tracks one channel's hand-absent reading. Plain floats: no allocation per update.

    ``update(raw)`` returns the current baseline; ``present`` says whether a hand is
    detected; ``rebase(value)`` restarts from a known hand-absent reading. Readings that
    are missing (zero, negative, NaN, infinite) are ignored and change nothing.
    """

    __slots__ = (
        "_a_avg",
        "_a_fast",
        "_a_slow",
        "_avg",
        "_base",
        "_c",
        "_cap_c",
        "_count",
        "_debounce",
        "_inv_sigma",
        "_last",
        "_off",
        "_on",
        "_present",
        "_rebase_frames",
        "_rev",
        "_rev_mean",
        "_rev_run",
        "_ring",
        "_ring_i",
        "_run",
        "kind",
        "noise",
        "rate_hz",
        "settings",
    )

    def __init__(
        self, settings: BaselineSettings, *, base: float, noise: float, kind: Kind, rate_hz: float
    ):
        if kind not in ("count", "period"):
            raise CalibrationError(f"unknown reading kind {kind!r}: use 'count' or 'period'")
        if not (base > 0.0 and math.isfinite(base)):
            raise CalibrationError(f"baseline must be a positive reading, got {base}")
        if not (noise >= 0.0 and math.isfinite(noise)):
            raise CalibrationError(f"noise must be zero or more, got {noise}")
        if not (rate_hz > 0.0 and math.isfinite(rate_hz)):
            raise CalibrationError(f"frame rate must be positive, got {rate_hz}")
        s = settings
        self.settings, self.kind, self.rate_hz, self.noise = s, kind, rate_hz, noise
        self._count = kind == "count"
        self._on = s.threshold_sigma + s.hysteresis_sigma
        self._off = s.threshold_sigma - s.hysteresis_sigma
        self._rev = -s.reverse_sigma
        # one-pole follower: per-frame fraction 1 - exp(-dt/tau)
        self._a_slow = -math.expm1(-1.0 / (rate_hz * s.follow_tau_s))
        self._a_fast = -math.expm1(-1.0 / (rate_hz * s.recover_tau_s))
        self._a_avg = -math.expm1(-1.0 / (rate_hz * s.average_tau_s))
        self._cap_c = s.max_follow_c_per_s / rate_hz
        self._rebase_frames = max(1, round(s.rebase_after_s * rate_hz))
        self._debounce = s.debounce_frames
        self._base = float(base)
        self._set_sigma()
        self._last = float(base)
        self._avg = float(base)
        self._c = 0.0
        self._present = False
        self._run = 0
        self._rev_run = 0
        self._rev_mean = 0.0
        # the baselines of the last rollback_s, oldest at _ring_i (allocated once)
        self._ring = [float(base)] * max(1, round(s.rollback_s * rate_hz))
        self._ring_i = 0

    def _set_sigma(self) -> None:
        sigma_c = max(self.noise / self._base, self.settings.noise_floor_c)
        self._inv_sigma = 1.0 / sigma_c

    @property
    def present(self) -> bool:
        """True while a hand is detected (the baseline is then frozen)."""
        return self._present

    @property
    def baseline(self) -> float:
        """The current hand-absent reading, in raw units."""
        return self._base

    @property
    def deviation(self) -> float:
        """c of the last valid reading against the baseline it was judged by."""
        return self._c

    def update(self, raw: float) -> float:
        """Take one raw reading; return the baseline to use for it."""
        base = self._base
        if not (0.0 < raw < math.inf):
            return base
        self._last = raw
        avg = self._avg
        avg += (raw - avg) * self._a_avg
        self._avg = avg
        c = base / raw - 1.0 if self._count else raw / base - 1.0
        self._c = c
        z = c * self._inv_sigma
        if self._present:
            if z < self._off:
                self._run += 1
                if self._run >= self._debounce:
                    self._present = False
                    self._run = 0
                    self._avg = raw  # forget the hand: follow from here
            else:
                self._run = 0
            return base
        ring, i = self._ring, self._ring_i
        older = ring[i]
        ring[i] = base
        self._ring_i = i + 1 if i + 1 < len(ring) else 0
        if z > self._on:
            self._run += 1
            if self._run >= self._debounce:
                self._present = True
                self._run = 0
                if self.settings.rollback_s > 0.0:
                    # undo what the follower absorbed of the hand's approach
                    self._base = base = older
            self._rev_run = 0
            self._rev_mean = 0.0
            return base
        self._run = 0
        c_avg = base / avg - 1.0 if self._count else avg / base - 1.0
        if c_avg * self._inv_sigma < self._rev:
            self._rev_run += 1
            # running mean of the reverse run: less noisy than any one reading
            self._rev_mean += (raw - self._rev_mean) / self._rev_run
            if self._rev_run >= self._rebase_frames:
                mean = self._rev_mean
                log.info("re-baseline after a sustained reverse reading: %.6g -> %.6g", base, mean)
                return self._rebase_to(mean)
        else:
            self._rev_run = 0
            self._rev_mean = 0.0
        if c_avg < 0.0:  # beyond empty: recover fast
            base += (avg - base) * self._a_fast
        else:  # toward the hand: slow, and capped so a hovering hand fades slowly at most
            step = (avg - base) * self._a_slow
            cap = self._cap_c * base
            base += step if -cap < step < cap else (cap if step > 0.0 else -cap)
        self._base = base
        return base

    def _rebase_to(self, value: float) -> float:
        self._base = value
        self._ring[:] = [value] * len(self._ring)
        self._avg = value
        self._set_sigma()
        self._c = 0.0
        self._rev_run = 0
        self._rev_mean = 0.0
        return value

    def rebase(self, value: float | None = None) -> None:
        """Restart from ``value`` (default: the last valid reading) as the hand-absent level."""
        target = self._last if value is None else value
        if not (0.0 < target < math.inf):
            raise CalibrationError(f"cannot re-baseline to {target}: not a valid reading")
        self._rebase_to(float(target))
        self._present = False
        self._run = 0


class ReferenceCorrector:
    """Cancel common-mode oscillator drift using a reference oscillator with no antenna.

    Temperature and supply change every oscillator's gain g alike: counts become g*N and
    periods N/g, and the reference's reading scales the same way as the sensing
    channel's. So ``raw * ref_base / ref_raw`` restores the reading for both kinds,
    whatever g is. It matters most while a hand is present, when the tracker is frozen
    and cannot follow drift on its own; differences between the oscillators (a
    capacitor that drifts more than its twin) remain for the tracker.
    """

    __slots__ = ("ref_base",)

    def __init__(self, ref_base: float):
        if not (ref_base > 0.0 and math.isfinite(ref_base)):
            raise CalibrationError(f"reference baseline must be a positive reading, got {ref_base}")
        self.ref_base = float(ref_base)

    def correct(self, raw: float, ref_raw: float) -> float:
        """The reading as it would be at the reference's calibrated level; unchanged if the
        reference reading is missing."""
        if not (0.0 < ref_raw < math.inf):
            return raw
        return raw * self.ref_base / ref_raw

    def rebase(self, ref_base: float) -> None:
        """Adopt a new reference level (taken together with a new calibration)."""
        if not (ref_base > 0.0 and math.isfinite(ref_base)):
            raise CalibrationError(f"reference baseline must be a positive reading, got {ref_base}")
        self.ref_base = float(ref_base)
