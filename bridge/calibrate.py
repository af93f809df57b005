"""Calibration: captured holds in, a fitted and invertible map from c to hand position out.

The chain, with the physics in DOMAIN.md section 2::

    raw reading --c_from_raw--> c = relative capacitance the hand adds (0 with no hand)
                --ChannelCalibration.position--> hand position 0..1 (0 far, 1 near)

Cheat sheet::

    empty = hold_stats(samples_no_hand, rate_hz=50)            # hand-absent hold
    far   = Capture(hold_stats(samples_far, 50), distance_m=0.60)
    near  = Capture(hold_stats(samples_near, 50), distance_m=0.05)
    mid   = Capture(hold_stats(samples_mid, 50), distance_m=0.25)   # optional, any number
    cal   = fit_calibration("count", empty, far, near, [mid])
    cal.position(c_from_raw(raw, cal.baseline, cal.kind))           # per frame
    print(resolution_report(cal, window_s=0.02))                    # figures and advice

Hand position is *linear in distance* across the playing range, so equal hand movement
gives equal musical intervals once the position is mapped linearly to semitones::

    position = (d_far - d) / (d_far - d_near)        0 at the far edge, 1 at the near edge

Intermediate captures give either their distance in metres (when the far and near
captures give theirs) or their position directly, as a fraction 0..1 of the range.

Models of c against position (``ChannelCalibration.model``):

``power``
    c = a / (u + s)**alpha with u = 1 - position: the hand's coupling falls as a power of
    its distance from an effective centre a distance d0 behind the antenna surface, and
    s = (d_near + d0) / (d_far - d_near) is that offset in units of the range
    (DOMAIN.md section 2: "c = a/(d+d0)^alpha"). With only far and near captured, alpha is
    assumed to be 1 (inverse distance, the close-range law) and the ratio c_near/c_far
    then fixes s. With three or more points, a, s and alpha are fitted by least squares.
``pchip``
    a monotone piecewise-cubic Hermite curve (Fritsch-Carlson family, the same end and
    interior slope rules as the general-purpose reference implementation in scipy)
    through the captured points, of position against log(c + shift). Chosen when the
    power law does not fit the captured points.
``linear``
    position piecewise linear in c through the points. The fallback when the far point is
    too close to the noise for the power law's ratio to mean anything.
"""

from __future__ import annotations

import itertools
import logging
import math
from bisect import bisect_right
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    SerializerFunctionWrapHandler,
    model_serializer,
    model_validator,
)

from bridge.errors import CalibrationError

log = logging.getLogger(__name__)

Kind = Literal["count", "period"]
ModelName = Literal["power", "pchip", "linear"]

#: c is clamped to this range. c = -1 is the natural floor for counts (raw -> infinity);
#: c = 10 (the hand adding ten times the fixed capacitance) is far beyond any playing
#: range and only seen with a touch, a short circuit or a stalled oscillator.
C_MIN = -1.0
C_MAX = 10.0

#: Standard deviation of rounding a reading to whole counts or ticks: 1/sqrt(12) of one
#: unit (uniform quantization error). A measured noise is never taken below it.
QUANT_NOISE = 1.0 / math.sqrt(12.0)

#: Bounds for the power law's offset s (see module docstring), in units of the range.
S_MIN = 1e-3
S_MAX = 1e3

#: Largest exponent a fitted power law may have; beyond it the points describe something
#: else (the fit is then refused and the monotone cubic used).
ALPHA_MAX = 20.0

#: With three or more points the power law is kept when it misses no captured point by
#: more than this fraction of the range; otherwise the monotone cubic is used.
POWER_FIT_TOL = 0.03

#: Default musical span for the resolution report: two octaves (DOMAIN.md section 1).
DEFAULT_SPAN_SEMITONES = 24.0


def c_from_raw(raw: float, base: float, kind: Kind) -> float:
    """Relative capacitance the hand adds: c = N0/N - 1 (counts) or P/P0 - 1 (periods).

    An oscillator's frequency goes as 1/C, so counts in a window go as 1/C and timed
    periods as C; either way c = C_hand / C_fixed (DOMAIN.md section 2). The result is
    always finite: a missing reading (zero, negative, NaN) gives 0.0, meaning "no hand",
    and anything else is clamped to [C_MIN, C_MAX].
    """
    if not (raw > 0.0 and base > 0.0):  # also false for NaN
        return 0.0
    if kind == "count":
        c = base / raw - 1.0
    elif kind == "period":
        c = raw / base - 1.0
    else:
        raise CalibrationError(f"unknown reading kind {kind!r}: use 'count' or 'period'")
    if c >= C_MAX:
        return C_MAX
    if c > C_MIN:
        return c
    if c <= C_MIN:
        return C_MIN
    return 0.0  # NaN from inf/inf


def c_per_unit(c: float, base: float, kind: Kind) -> float:
    """How much c changes for one count (or tick) of the raw reading at a given c.

    Counts: N = N0/(1+c), so |dc/dN| = N0/N**2 = (1+c)**2/N0 (DOMAIN.md section 2).
    Periods: P = P0*(1+c), so dc/dP = 1/P0.
    """
    if kind == "count":
        return (1.0 + c) ** 2 / base
    return 1.0 / base


# --------------------------------------------------------------------------- holds


class HoldStats(BaseModel):
    """Statistics of one captured hold (hand still, or no hand) of raw readings.

    ``std`` is the plain sample standard deviation; ``noise`` is the scatter about the
    fitted straight line (so a slow drift is not counted as noise), never below the
    quantization floor QUANT_NOISE. ``drift`` is the fitted change across the whole hold
    and ``drift_sigma`` the same in units of ``noise``. A hold is ``stable`` when it has
    enough samples and drifted by at most ``max_drift_sigma`` noise units.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    n: int
    rate_hz: float
    mean: float
    std: float
    noise: float
    slope_per_s: float
    drift: float
    drift_sigma: float
    stable: bool


def hold_stats(
    samples: Sequence[float] | np.ndarray,
    rate_hz: float,
    *,
    max_drift_sigma: float = 3.0,
    min_samples: int = 10,
) -> HoldStats:
    """Summarise a hold captured at ``rate_hz`` frames a second.

    For white noise of standard deviation s the fitted drift itself scatters by about
    s*sqrt(12/n), so with the default threshold of 3 noise units a still hold of 10 or
    more samples is very rarely called unstable, while a board still warming up is.
    """
    x = np.asarray(samples, dtype=float).ravel()
    n = int(x.size)
    if n < 3:
        raise CalibrationError(f"a hold needs at least 3 readings, got {n}: hold longer")
    if not np.all(np.isfinite(x)):
        raise CalibrationError("the hold contains missing or invalid readings: capture it again")
    if not rate_hz > 0.0:
        raise CalibrationError(f"frame rate must be positive, got {rate_hz}")
    t = np.arange(n, dtype=float) / rate_hz
    t_c = t - t.mean()
    mean = float(x.mean())
    slope = float(np.dot(t_c, x - mean) / np.dot(t_c, t_c))
    resid = x - mean - slope * t_c
    noise = max(float(np.sqrt(np.dot(resid, resid) / (n - 2))), QUANT_NOISE)
    drift = slope * (n - 1) / rate_hz
    drift_sigma = abs(drift) / noise
    return HoldStats(
        n=n,
        rate_hz=float(rate_hz),
        mean=mean,
        std=float(x.std(ddof=1)),
        noise=noise,
        slope_per_s=slope,
        drift=drift,
        drift_sigma=drift_sigma,
        stable=bool(n >= min_samples and drift_sigma <= max_drift_sigma),
    )


@dataclass(frozen=True)
class Capture:
    """A hold taken with the hand at a known place: a distance in metres or a position 0..1."""

    stats: HoldStats
    distance_m: float | None = None
    position: float | None = None


# --------------------------------------------------------------------- monotone cubic


def pchip_slopes(x: Sequence[float], y: Sequence[float]) -> list[float]:
    """Knot slopes of the shape-preserving piecewise-cubic Hermite interpolant.

    Interior knots: zero where the neighbouring secants differ in sign or either is
    zero, else the weighted harmonic mean of the two secants (Fritsch & Butland 1984),
    which keeps each piece monotone wherever the data are. End knots: the one-sided
    three-point estimate, set to zero if its sign disagrees with the first secant and
    limited to three times that secant where the secants change sign. Two knots give
    a straight line. These are the rules of scipy.interpolate.PchipInterpolator, which
    the tests use as the reference.
    """
    x = [float(v) for v in x]  # plain floats: an overflow gives inf, never a warning
    y = [float(v) for v in y]
    n = len(x)
    if n < 2:
        raise ValueError("need at least two knots")
    h = [x[k + 1] - x[k] for k in range(n - 1)]
    m = [(y[k + 1] - y[k]) / h[k] for k in range(n - 1)]
    if n == 2:
        return [m[0], m[0]]
    d = [0.0] * n
    for k in range(1, n - 1):
        m0, m1 = m[k - 1], m[k]
        if m0 * m1 > 0.0:
            w1 = 2.0 * h[k] + h[k - 1]
            w2 = h[k] + 2.0 * h[k - 1]
            d[k] = (w1 + w2) / (w1 / m0 + w2 / m1)
    d[0] = _pchip_end(h[0], h[1], m[0], m[1])
    d[-1] = _pchip_end(h[-1], h[-2], m[-1], m[-2])
    return d


def _pchip_end(h0: float, h1: float, m0: float, m1: float) -> float:
    d = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
    if math.copysign(1.0, d) != math.copysign(1.0, m0) or d == 0.0:
        return 0.0
    if math.copysign(1.0, m0) != math.copysign(1.0, m1) and abs(d) > abs(3.0 * m0):
        return 3.0 * m0
    return d


class Pchip:
    """A piecewise-cubic Hermite curve through (x, y) with pchip slopes; plain floats.

    Outside the knots the end values hold (no extrapolation). Evaluation is one
    bisection and a cubic in Horner form, so a call costs well under a microsecond.
    """

    __slots__ = ("c2", "c3", "d", "xs", "ys")

    def __init__(
        self, x: Sequence[float], y: Sequence[float], slopes: Sequence[float] | None = None
    ):
        self.xs = [float(v) for v in x]
        self.ys = [float(v) for v in y]
        if any(b <= a for a, b in zip(self.xs, self.xs[1:])):
            raise ValueError("knots must be strictly increasing")
        self.d = list(slopes) if slopes is not None else pchip_slopes(self.xs, self.ys)
        self.c2: list[float] = []
        self.c3: list[float] = []
        for k in range(len(self.xs) - 1):
            h = self.xs[k + 1] - self.xs[k]
            m = (self.ys[k + 1] - self.ys[k]) / h
            # Hermite cubic on [x_k, x_k + h] as y_k + d_k t + c2 t^2 + c3 t^3
            self.c2.append((3.0 * m - 2.0 * self.d[k] - self.d[k + 1]) / h)
            self.c3.append((self.d[k] + self.d[k + 1] - 2.0 * m) / (h * h))

    def __call__(self, x: float) -> float:
        xs = self.xs
        if not x > xs[0]:
            return self.ys[0]
        if x >= xs[-1]:
            return self.ys[-1]
        k = bisect_right(xs, x) - 1
        t = x - xs[k]
        return self.ys[k] + t * (self.d[k] + t * (self.c2[k] + t * self.c3[k]))

    def inverse(self, y: float) -> float:
        """x with self(x) == y, for a curve increasing through its knots; clamped to the ends."""
        ys, xs = self.ys, self.xs
        if not y > ys[0]:
            return xs[0]
        if y >= ys[-1]:
            return xs[-1]
        k = min(bisect_right(ys, y) - 1, len(xs) - 2)
        lo, hi = xs[k], xs[k + 1]
        for _ in range(60):  # halves the bracket to well below float resolution
            mid = 0.5 * (lo + hi)
            if self(mid) < y:
                lo = mid
            else:
                hi = mid
        return 0.5 * (lo + hi)


# ----------------------------------------------------------------------------- curves


class _PowerCurve:
    """position = 1 + s - (a/c)**(1/alpha), the inverse of c = a/(1 - position + s)**alpha."""

    __slots__ = ("a", "alpha", "c0", "c1", "inv_alpha", "s")

    def __init__(self, a: float, s: float, alpha: float):
        self.a, self.s, self.alpha, self.inv_alpha = a, s, alpha, 1.0 / alpha
        self.c0 = a / (1.0 + s) ** alpha  # c at position 0 (far)
        self.c1 = a / s**alpha  # c at position 1 (near)

    def __eq__(self, other: object) -> bool:
        # lets two calibrations with the same fitted law compare equal
        if not isinstance(other, _PowerCurve):
            return NotImplemented
        return (self.a, self.s, self.alpha) == (other.a, other.s, other.alpha)

    def position(self, c: float) -> float:
        if not c > self.c0:  # also catches NaN
            return 0.0
        if c >= self.c1:
            return 1.0
        return 1.0 + self.s - (self.a / c) ** self.inv_alpha

    def c_at(self, position: float) -> float:
        p = _clamp01(position)
        return self.a / (1.0 - p + self.s) ** self.alpha


class _KnotCurve:
    """position as a piecewise cubic of x, with x = log(c + shift) or x = c (shift None).

    The segments are unpacked into tuples so that a call is one bisection, at most one
    logarithm and a cubic in Horner form, with no further method calls.
    """

    __slots__ = ("_add", "_log", "_segs", "_starts", "_v0", "_v1", "curve", "shift")

    def __init__(self, curve: Pchip, shift: float | None):
        self.curve, self.shift = curve, shift
        xs = curve.xs
        self._log = shift is not None
        self._add = shift if shift is not None else 0.0
        # c + shift at the first and last knot: below -> position 0, above -> 1
        self._v0 = math.exp(xs[0]) if self._log else xs[0]
        self._v1 = math.exp(xs[-1]) if self._log else xs[-1]
        self._starts = xs[:-1]
        self._segs = [
            (xs[k], curve.ys[k], curve.d[k], curve.c2[k], curve.c3[k]) for k in range(len(xs) - 1)
        ]

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, _KnotCurve):
            return NotImplemented
        a, b = self.curve, other.curve
        return (self.shift, a.xs, a.ys, a.d) == (other.shift, b.xs, b.ys, b.d)

    def position(self, c: float) -> float:
        v = c + self._add
        if not v > self._v0:  # also catches NaN
            return 0.0
        if v >= self._v1:
            return 1.0
        x = math.log(v) if self._log else v
        x0, y0, d, c2, c3 = self._segs[bisect_right(self._starts, x) - 1]
        t = x - x0
        p = y0 + t * (d + t * (c2 + t * c3))
        if p < 0.0:
            return 0.0
        return 1.0 if p > 1.0 else p  # noqa: FURB136 (min() costs a call per frame)

    def c_at(self, position: float) -> float:
        x = self.curve.inverse(_clamp01(position))
        return x if self.shift is None else math.exp(x) - self.shift


def _clamp01(p: float) -> float:
    if p >= 1.0:
        return 1.0
    return max(0.0, p)  # NaN -> 0


# ----------------------------------------------------------------------- saved model


class CalPoint(BaseModel):
    """One captured point: hand position 0..1, mean c, its scatter, and distance if known."""

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    position: float = Field(ge=0.0, le=1.0)
    c: float
    c_std: float = Field(default=0.0, ge=0.0)
    distance_m: float | None = Field(default=None, ge=0.0)

    @model_serializer(mode="wrap")
    def _drop_none(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        # TOML has no null: an unknown distance is left out rather than written as None.
        return {k: v for k, v in handler(self).items() if v is not None}


_REQUIRED_PARAMS: dict[str, tuple[str, ...]] = {
    "power": ("a", "s", "alpha"),
    "pchip": ("shift",),
    "linear": (),
}


class ChannelCalibration(BaseModel):
    """A channel's calibration as stored in the venue profile.

    ``baseline`` is the hand-absent reading (N0 counts or P0 ticks) and ``noise`` its
    standard deviation in the same units. ``points`` are the captured (position, c)
    pairs, far first. ``model`` and ``params`` give the fitted curve (see the module
    docstring): power uses a, s, alpha; pchip uses shift (the curve runs through the
    points in log(c + shift)); linear needs none. ``fit_error`` is the largest miss of
    the curve at a captured point, as a fraction of the range.

    ``position(c)`` and ``c_at(position)`` are inverses of each other on 0..1. For the hot path
    take ``cal.curve`` once and call ``curve.position`` on it.
    """

    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    kind: Kind
    baseline: float = Field(gt=0.0)
    noise: float = Field(ge=0.0)
    baseline_stable: bool = True
    points: list[CalPoint] = Field(min_length=2)
    model: ModelName
    params: dict[str, float] = Field(default_factory=dict)
    fit_error: float = Field(default=0.0, ge=0.0)
    notes: list[str] = Field(default_factory=list)

    _curve: _PowerCurve | _KnotCurve = PrivateAttr()

    @model_validator(mode="after")
    def _build(self) -> ChannelCalibration:
        pts = self.points
        if pts[0].position != 0.0 or pts[-1].position != 1.0:
            raise ValueError("points must start at position 0 (far) and end at 1 (near)")
        for a, b in itertools.pairwise(pts):
            if not (b.position > a.position and b.c > a.c):
                raise ValueError(
                    "points must rise in both position and c, far first "
                    f"(position {a.position:g} c {a.c:g} then position {b.position:g} c {b.c:g})"
                )
        missing = [k for k in _REQUIRED_PARAMS[self.model] if k not in self.params]
        if missing:
            raise ValueError(f"model {self.model!r} needs params {', '.join(missing)}")
        try:
            self._curve = _make_curve(self.model, self.params, pts)
        except ArithmeticError:  # overflow, or underflow to a division by zero
            raise ValueError(f"params {self.params} overflow: not a usable curve") from None
        return self

    @property
    def curve(self) -> _PowerCurve | _KnotCurve:
        """The precomputed curve: ``.position(c)`` and ``.c_at(position)`` on plain floats."""
        # Read the private store directly: pydantic's attribute fallback for private
        # attributes costs about two microseconds a call, the dict lookup 40 ns.
        return self.__pydantic_private__["_curve"]  # type: ignore[index,no-any-return]

    @property
    def noise_c(self) -> float:
        """Hand-absent noise in c units: one raw unit moves c by about 1/baseline."""
        return self.noise / self.baseline

    def position(self, c: float) -> float:
        """Hand position 0 (far) .. 1 (near) for c: monotone, clamped, finite for any input."""
        return self.curve.position(c)

    def c_at(self, position: float) -> float:
        """The c that gives this position (the inverse of ``position`` on 0..1)."""
        return self.curve.c_at(position)

    def position_of_raw(self, raw: float) -> float:
        """Shortcut: position straight from a raw reading against the calibrated baseline."""
        return self.curve.position(c_from_raw(raw, self.baseline, self.kind))


def _make_curve(
    model: ModelName, params: dict[str, float], pts: Sequence[CalPoint]
) -> _PowerCurve | _KnotCurve:
    if model == "power":
        a, s, alpha = params["a"], params["s"], params["alpha"]
        if not (a > 0.0 and s > 0.0 and alpha > 0.0):
            raise ValueError("power model needs positive a, s and alpha")
        return _PowerCurve(a, s, alpha)
    ys = [p.position for p in pts]
    if model == "linear":
        xs = [p.c for p in pts]
        secants = [(ys[k + 1] - ys[k]) / (xs[k + 1] - xs[k]) for k in range(len(xs) - 1)]
        # zero curvature terms: slopes equal to each piece's secant give straight pieces
        return _KnotCurve(_LinearPieces(xs, ys, secants), None)
    shift = params["shift"]
    if not pts[0].c + shift > 0.0:
        raise ValueError("pchip shift must make every c + shift positive")
    xs = [math.log(p.c + shift) for p in pts]
    return _KnotCurve(Pchip(xs, ys), shift)


class _LinearPieces(Pchip):
    """Straight lines between knots (a Hermite cubic whose end slopes equal the secant)."""

    __slots__ = ()

    def __init__(self, x: Sequence[float], y: Sequence[float], secants: Sequence[float]):
        super().__init__(x, y, slopes=[0.0] * len(x))
        self.d = list(secants) + [secants[-1]]
        self.c2 = [0.0] * len(secants)
        self.c3 = [0.0] * len(secants)


# ----------------------------------------------------------------------------- fitting


def fit_calibration(
    kind: Kind,
    baseline: HoldStats,
    far: Capture | HoldStats,
    near: Capture | HoldStats,
    between: Sequence[Capture] = (),
    *,
    model: Literal["auto", "power", "pchip", "linear"] = "auto",
    min_range_sigma: float = 3.0,
) -> ChannelCalibration:
    """Fit a channel's calibration from a hand-absent hold and holds at known positions.

    ``far`` and ``near`` mark the ends of the playing range (positions 0 and 1). When
    both give ``distance_m``, every ``between`` capture must give its distance too and
    positions follow as (d_far - d)/(d_far - d_near); otherwise each ``between`` capture
    gives ``position`` in (0, 1).

    ``model="auto"`` picks: two points -> power law with alpha = 1 if the far point
    stands clear of the noise (3 sigma), else linear; three or more -> the fitted power
    law if it misses no point by more than POWER_FIT_TOL of the range, else pchip.

    Raises CalibrationError, saying what to redo, when the near hold is not beyond the
    far hold in the hand's direction, the range is under ``min_range_sigma`` noise
    units, or an intermediate point is out of order.
    """
    if kind not in ("count", "period"):
        raise CalibrationError(f"unknown reading kind {kind!r}: use 'count' or 'period'")
    base = baseline.mean
    if not (base > 0.0 and math.isfinite(base)):
        raise CalibrationError(
            f"the hand-absent hold averages {base:g}: the board sent no usable readings"
        )
    noise_c = baseline.noise / base
    far_c = far if isinstance(far, Capture) else Capture(far)
    near_c = near if isinstance(near, Capture) else Capture(near)
    points = _place_points(kind, base, far_c, near_c, list(between))

    direction = "fewer counts" if kind == "count" else "longer periods"
    c_far, c_near = points[0].c, points[-1].c
    if c_near <= c_far:
        raise CalibrationError(
            f"the near hold (mean {near_c.stats.mean:.6g}) is not beyond the far hold "
            f"(mean {far_c.stats.mean:.6g}): a nearer hand must give {direction}. "
            "Check that far and near were not swapped and that the hand stayed still."
        )
    if c_far < -min_range_sigma * noise_c:
        raise CalibrationError(
            f"the far hold (mean {far_c.stats.mean:.6g}) reads beyond the hand-absent hold "
            f"(mean {base:.6g}): capture the hand-absent hold again with nobody near the antenna"
        )
    span = c_near - c_far
    if span < min_range_sigma * noise_c:
        raise CalibrationError(
            f"the playing range (c {c_far:.3g} to {c_near:.3g}) is only "
            f"{span / noise_c:.1f} times the noise: check the ground connection, move the "
            "antenna away from metal and cables, or use a bigger antenna"
        )
    _check_monotone(points)

    named = [("far", far_c), ("near", near_c)]
    named += [(_where(cap), cap) for cap in between]
    notes = [
        f"the {name} hold drifted by {cap.stats.drift_sigma:.1f} noise units: was the hand still?"
        for name, cap in named
        if not cap.stats.stable
    ]
    chosen, params, fit_error, more = _fit(points, noise_c, model)
    notes += more
    log.info("calibration: %s model, %d points, fit error %.3g", chosen, len(points), fit_error)
    return ChannelCalibration(
        kind=kind,
        baseline=base,
        noise=baseline.noise,
        baseline_stable=baseline.stable,
        points=points,
        model=chosen,
        params=params,
        fit_error=fit_error,
        notes=notes,
    )


def _place_points(
    kind: Kind, base: float, far: Capture, near: Capture, between: list[Capture]
) -> list[CalPoint]:
    def point(cap: Capture, position: float) -> CalPoint:
        mean = cap.stats.mean
        if not (mean > 0.0 and math.isfinite(mean)):
            raise CalibrationError(
                f"the {_where(cap)} hold averages {mean:g}: the oscillator gave no usable "
                "readings; check its wiring and the antenna connection"
            )
        c = c_from_raw(mean, base, kind)
        # scatter of the hold carried into c units: |dc/draw| * std
        c_std = cap.stats.std * (base / mean**2 if kind == "count" else 1.0 / base)
        return CalPoint(position=position, c=c, c_std=abs(c_std), distance_m=cap.distance_m)

    d_far, d_near = far.distance_m, near.distance_m
    out = [point(far, 0.0), point(near, 1.0)]
    if d_far is not None and d_near is not None:
        if not (d_far > d_near >= 0.0):
            raise CalibrationError(
                f"far distance {d_far:g} m must be larger than near distance {d_near:g} m"
            )
        for cap in between:
            if cap.distance_m is None:
                raise CalibrationError(
                    "far and near gave distances, so every intermediate capture must too"
                )
            pos = (d_far - cap.distance_m) / (d_far - d_near)
            if not 0.0 < pos < 1.0:
                raise CalibrationError(
                    f"intermediate capture at {cap.distance_m:g} m lies outside the playing "
                    f"range {d_near:g}..{d_far:g} m"
                )
            out.append(point(cap, pos))
    else:
        for cap in between:
            given = cap.position
            if given is None or not 0.0 < given < 1.0:
                raise CalibrationError(
                    f"intermediate capture needs a position strictly between 0 and 1, got {given}"
                )
            out.append(point(cap, given))
    out.sort(key=lambda p: p.position)
    for a, b in itertools.pairwise(out):
        if b.position == a.position:
            raise CalibrationError(f"two captures share position {a.position:g}: drop one")
    return out


def _where(cap: Capture) -> str:
    if cap.distance_m is not None:
        return f"{cap.distance_m * 100:.1f} cm"
    if cap.position is not None:
        return f"position {cap.position:.2f}"
    return "far or near"


def _describe(p: CalPoint) -> str:
    where = f"position {p.position:.2f}"
    if p.distance_m is not None:
        where += f" ({p.distance_m * 100:.1f} cm)"
    return where


def _check_monotone(points: list[CalPoint]) -> None:
    for k in range(1, len(points) - 1):
        prev, cur, nxt = points[k - 1], points[k], points[k + 1]
        if not prev.c < cur.c < nxt.c:
            raise CalibrationError(
                f"the point at {_describe(cur)} reads c = {cur.c:.4g}, not between its "
                f"neighbours at {_describe(prev)} (c = {prev.c:.4g}) and {_describe(nxt)} "
                f"(c = {nxt.c:.4g}): capture that point again, holding the hand still"
            )


def _fit(
    points: list[CalPoint], noise_c: float, model: str
) -> tuple[ModelName, dict[str, float], float, list[str]]:
    p = np.array([pt.position for pt in points])
    c = np.array([pt.c for pt in points])
    notes: list[str] = []
    clear = bool(c[0] > 3.0 * noise_c)
    if model == "auto":
        if len(points) == 2:
            model = "power" if clear else "linear"
            if not clear:
                notes.append(
                    "the far point is within 3 noise units of the hand-absent level, so the "
                    "inverse-distance law cannot be placed: position is linear in c; "
                    "capture a middle point to improve it"
                )
        else:
            if c[0] > 0.0:
                params, err = _fit_power_many(p, c)
                if err <= POWER_FIT_TOL:
                    return "power", params, err, notes
                notes.append(
                    f"the power law misses a captured point by {err:.1%} of the range: "
                    "using a monotone cubic through the points"
                )
            model = "pchip"
    if model == "power":
        if c[0] <= 0.0:
            raise CalibrationError(
                "the power-law model needs the far point above the hand-absent level; "
                "use model 'pchip' or 'linear', or capture the far point nearer"
            )
        if len(points) == 2:
            params, err = _fit_power_two(float(c[0]), float(c[1]))
            notes.append(
                "only far and near were captured, so an inverse-distance law (alpha 1) is "
                "assumed: capture a middle mark to fit the law of this antenna"
            )
        else:
            params, err = _fit_power_many(p, c)
            if not params:
                raise CalibrationError(
                    "no power law fits these points: use model 'pchip' or 'auto'"
                )
        return "power", params, err, notes
    if model == "pchip":
        # keep log finite: shift every c above zero by at least one noise unit
        shift = max(noise_c, noise_c - float(c[0]), 1e-12)
        return "pchip", {"shift": shift}, 0.0, notes
    if model == "linear":
        return "linear", {}, 0.0, notes
    raise CalibrationError(f"unknown model {model!r}: use auto, power, pchip or linear")


def _fit_power_two(c_far: float, c_near: float) -> tuple[dict[str, float], float]:
    """Power law through two points, alpha = 1 unless the offset s leaves its bounds.

    With u = 1 - position: c_near/c_far = ((1 + s)/s)**alpha, so for alpha = 1,
    s = 1/(ratio - 1). If that s is out of [S_MIN, S_MAX], s is clamped and alpha is
    solved from the same ratio instead, so the curve still passes through both points.
    """
    ratio = c_near / c_far
    alpha = 1.0
    s = 1.0 / (ratio - 1.0)
    if not S_MIN <= s <= S_MAX:
        s = min(max(s, S_MIN), S_MAX)
        alpha = math.log(ratio) / math.log((1.0 + s) / s)
    a = c_near * s**alpha
    return {"a": a, "s": s, "alpha": alpha}, 0.0


def _power_sse(
    log_s: np.ndarray, u: np.ndarray, y: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For each offset s: least squares of log c on log(u + s), then the squared position misses.

    log c = log a - alpha*log(u + s) is a straight line in log(u + s), so for a given s
    the best a and alpha are a closed-form regression; the remaining misses are
    measured in position (u_hat = (a/c)**(1/alpha) - s), the quantity a player hears.
    """
    s = np.exp(log_s)[:, None]
    z = np.log(u[None, :] + s)
    zc = z - z.mean(axis=1, keepdims=True)
    yc = y - y.mean()
    slope = (zc * yc).sum(axis=1) / (zc * zc).sum(axis=1)
    alpha = -slope
    log_a = y.mean() - slope * z.mean(axis=1)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        u_hat = np.exp((log_a[:, None] - y[None, :]) / alpha[:, None]) - s
        sse = ((u_hat - u[None, :]) ** 2).sum(axis=1)
    sse = np.where((alpha > 0.0) & np.isfinite(sse), sse, np.inf)
    return sse, log_a, alpha


def _fit_power_many(p: np.ndarray, c: np.ndarray) -> tuple[dict[str, float], float]:
    """Least-squares power law through three or more points (grid, then golden section on log s)."""
    u = 1.0 - p
    y = np.log(c)
    grid = np.linspace(math.log(S_MIN), math.log(S_MAX), 241)
    sse, _, _ = _power_sse(grid, u, y)
    k = int(np.argmin(sse))
    if not np.isfinite(sse[k]):
        raise CalibrationError("no power law fits these points: use model 'pchip'")
    lo, hi = grid[max(k - 1, 0)], grid[min(k + 1, grid.size - 1)]
    g = (math.sqrt(5.0) - 1.0) / 2.0

    def f(v: float) -> float:
        return float(_power_sse(np.array([v]), u, y)[0][0])

    x1, x2 = hi - g * (hi - lo), lo + g * (hi - lo)
    f1, f2 = f(x1), f(x2)
    for _ in range(80):
        if f1 <= f2:
            hi, x2, f2 = x2, x1, f1
            x1 = hi - g * (hi - lo)
            f1 = f(x1)
        else:
            lo, x1, f1 = x1, x2, f2
            x2 = lo + g * (hi - lo)
            f2 = f(x2)
    best = np.array([0.5 * (lo + hi)])
    _, log_a, alpha = _power_sse(best, u, y)
    s, al = float(np.exp(best[0])), float(alpha[0])
    try:
        a = math.exp(float(log_a[0]))
        curve = _PowerCurve(a, s, al)
    except ArithmeticError:  # the points ask for an exponential, not a power law
        return {}, math.inf
    if not (0.0 < al <= ALPHA_MAX and 0.0 < curve.c0 < curve.c1 < math.inf):
        return {}, math.inf
    err = max(abs(curve.position(float(ci)) - float(pi)) for ci, pi in zip(c, p))
    return {"a": a, "s": s, "alpha": al}, err


# ------------------------------------------------------------------------- resolution


def rejects_hum(window_s: float, mains_hz: float, tol_cycles: float = 0.02) -> bool:
    """True when the counting window spans a whole number of mains periods.

    A window of k whole periods integrates the hum to zero; a leftover of delta cycles
    leaves roughly delta/k of it. 20 ms rejects 50 Hz, 16.67 ms 60 Hz, 100 ms both
    (DOMAIN.md section 2, common practice of line-cycle integration).
    """
    cycles = window_s * mains_hz
    whole = round(cycles)
    return whole >= 1 and abs(cycles - whole) <= tol_cycles


class ResolutionReport(BaseModel):
    """What a calibration can resolve, in the player's units, with advice.

    Figures are for the hand-absent noise (a hand adds its own tremor). Cents per count
    are local slopes, averaged over 2 % of the range, at near (position 1), middle (0.5)
    and far (0). ``reciprocal_gain`` is how many times finer a period-timing board
    resolves than plain counting of the same oscillator over the same window.
    """

    model_config = ConfigDict(extra="forbid")

    kind: Kind
    window_s: float
    pitch_span_semitones: float
    total_change_pct: float
    range_c: float
    noise_raw: float
    noise_c: float
    cents_per_count_near: float
    cents_per_count_middle: float
    cents_per_count_far: float
    pitch_noise_cents: float
    smoothing_cutoff_hz: float | None = None
    pitch_noise_smoothed_cents: float | None = None
    rejects_50hz: bool
    rejects_60hz: bool
    osc_hz: float | None = None
    clock_hz: float | None = None
    reciprocal_gain: float | None = None
    warnings: list[str] = Field(default_factory=list)

    def lines(self) -> list[str]:
        unit = "count" if self.kind == "count" else "tick"
        out = [
            (
                f"Resolution ({self.kind} board, {self.window_s * 1000:.2f} ms window, "
                f"{self.pitch_span_semitones:g} semitones across the range)"
            ),
            f"  range: the oscillator moves {self.total_change_pct:.3g} % from far to near",
            f"  noise (hand absent): {self.noise_raw:.3g} {unit}s RMS",
            (
                f"  cents per {unit}: near {self.cents_per_count_near:.3g}, "
                f"middle {self.cents_per_count_middle:.3g}, far {self.cents_per_count_far:.3g}"
            ),
            f"  pitch noise at the middle: {self.pitch_noise_cents:.3g} cents RMS unsmoothed",
        ]
        if self.pitch_noise_smoothed_cents is not None:
            out.append(
                f"  after a {self.smoothing_cutoff_hz:g} Hz low-pass: "
                f"{self.pitch_noise_smoothed_cents:.3g} cents RMS"
            )
        yes = {True: "yes", False: "no"}
        out.append(
            f"  window rejects mains hum: 50 Hz {yes[self.rejects_50hz]}, "
            f"60 Hz {yes[self.rejects_60hz]}"
        )
        if self.reciprocal_gain is not None:
            if self.kind == "period":
                out.append(
                    f"  reciprocal counting: each tick is {self.reciprocal_gain:.3g} times finer "
                    "than counting cycles over the same window"
                )
            else:
                out.append(
                    f"  a period-timing board with a {self.clock_hz:g} Hz clock would resolve "
                    f"about {self.reciprocal_gain:.3g} times finer"
                )
        if self.warnings:
            out.append("Warnings:")
            out += [f"  - {w}" for w in self.warnings]
        return out

    def __str__(self) -> str:
        return "\n".join(self.lines())


def resolution_report(
    cal: ChannelCalibration,
    *,
    window_s: float,
    kind: Kind | None = None,
    pitch_span_semitones: float | None = None,
    osc_hz: float | None = None,
    clock_hz: float | None = None,
    mains_hz: float | None = None,
    smoothing_cutoff_hz: float | None = None,
    rate_hz: float | None = None,
    min_change_pct: float = 1.0,
    max_noise_cents: float = 3.0,
    max_cents_per_count: float = 3.0,
) -> ResolutionReport:
    """Work out cents per count, expected pitch noise and hum rejection, with advice.

    One count (or tick) moves c by c_per_unit (N0/N**2 for counts), and the calibration
    turns a change of c into a change of position by its local slope; times the pitch
    span in cents that is cents per count (chain rule). Pitch noise is the hand-absent
    noise times cents per count at the middle. With ``smoothing_cutoff_hz`` the noise is
    also given after a one-pole low-pass at that cutoff running at ``rate_hz`` (default
    one frame per window): alpha = 1/(1 + rate/(2 pi fc)) as in the 1 Euro filter at
    rest (Casiez et al., CHI 2012), and white noise through it keeps sqrt(alpha/(2 - alpha))
    of its standard deviation.

    Warnings fire when the range moves the oscillator less than ``min_change_pct``, the
    pitch noise (smoothed when given) exceeds ``max_noise_cents`` (about the pitch
    just-noticeable difference, Hill & Summers, JASA 2007), the window rejects no hum
    (or not the given ``mains_hz``), the hand-absent hold drifted, or the far end is
    coarser than ``max_cents_per_count``. ``kind``, if given, must match the calibration.
    """
    if kind is not None and kind != cal.kind:
        raise CalibrationError(f"calibration is for a {cal.kind} board, not {kind}")
    if not window_s > 0.0:
        raise CalibrationError(f"window must be positive, got {window_s}")
    span = DEFAULT_SPAN_SEMITONES if pitch_span_semitones is None else pitch_span_semitones
    curve = cal.curve
    c_far, c_near = curve.c_at(0.0), curve.c_at(1.0)
    # counts go as 1/(1 + c), periods as (1 + c): either way the frequency does
    change = 100.0 * (1.0 - (1.0 + c_far) / (1.0 + c_near))

    def cents_per_unit(p: float, h: float = 0.01) -> float:
        p0, p1 = max(p - h, 0.0), min(p + h, 1.0)
        dc = curve.c_at(p1) - curve.c_at(p0)
        dp_dc = (p1 - p0) / dc if dc > 0.0 else math.inf
        return 100.0 * span * dp_dc * c_per_unit(curve.c_at(p), cal.baseline, cal.kind)

    near, middle, far = cents_per_unit(1.0), cents_per_unit(0.5), cents_per_unit(0.0)
    pitch_noise = cal.noise * middle
    smoothed = None
    if smoothing_cutoff_hz is not None:
        rate = rate_hz if rate_hz is not None else 1.0 / window_s
        alpha = 1.0 / (1.0 + rate / (2.0 * math.pi * smoothing_cutoff_hz))
        smoothed = pitch_noise * math.sqrt(alpha / (2.0 - alpha))

    r50, r60 = rejects_hum(window_s, 50.0), rejects_hum(window_s, 60.0)
    gain = None
    if cal.kind == "count" and clock_hz is not None:
        gain = clock_hz * window_s / cal.baseline
        osc_hz = osc_hz if osc_hz is not None else cal.baseline / window_s
    elif cal.kind == "period" and osc_hz is not None:
        gain = cal.baseline / (osc_hz * window_s)

    warnings: list[str] = []
    if change < min_change_pct:
        warnings.append(
            f"The playing range moves the oscillator only {change:.2g} % (a few percent is "
            "usual): check the ground connection, move the antenna away from metal, or use a "
            "bigger antenna."
        )
    shown = smoothed if smoothed is not None else pitch_noise
    if shown > max_noise_cents:
        warnings.append(
            f"Pitch noise is about {shown:.2g} cents RMS (aim for under {max_noise_cents:g}): "
            "use a longer window, check the ground connection, and move away from mains cables."
        )
    hum_ok = (r50 or r60) if mains_hz is None else rejects_hum(window_s, mains_hz)
    if not hum_ok:
        warnings.append(
            f"A {window_s * 1000:.2f} ms window does not reject mains hum: use 20 ms for "
            "50 Hz mains, 16.67 ms for 60 Hz, or 100 ms for both."
        )
    if not cal.baseline_stable:
        warnings.append(
            "The hand-absent reading was still drifting: let the board warm up for a few "
            "minutes and calibrate again."
        )
    if far > max_cents_per_count:
        better = (
            "a faster timer clock or a longer window"
            if cal.kind == "period"
            else "a higher oscillator frequency, a longer window, or a period-timing board"
        )
        unit = "count" if cal.kind == "count" else "tick"
        warnings.append(
            f"At the far end one {unit} is {far:.2g} cents (coarser than "
            f"{max_cents_per_count:g}): use {better}."
        )
    warnings += cal.notes
    return ResolutionReport(
        kind=cal.kind,
        window_s=window_s,
        pitch_span_semitones=span,
        total_change_pct=change,
        range_c=c_near - c_far,
        noise_raw=cal.noise,
        noise_c=cal.noise_c,
        cents_per_count_near=near,
        cents_per_count_middle=middle,
        cents_per_count_far=far,
        pitch_noise_cents=pitch_noise,
        smoothing_cutoff_hz=smoothing_cutoff_hz,
        pitch_noise_smoothed_cents=smoothed,
        rejects_50hz=r50,
        rejects_60hz=r60,
        osc_hz=osc_hz,
        clock_hz=clock_hz,
        reciprocal_gain=gain,
        warnings=warnings,
    )
