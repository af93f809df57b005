"""Tests for bridge/calibrate.py: c from raw readings, holds, fitted curves, resolution report.

Outside sources used here: DOMAIN.md section 2 (the c formulas, N0/N^2, the astable timer
formula from Horowitz & Hill [book, memory], hum-rejecting windows [practice], reciprocal
counting [practice]), Casiez et al., CHI 2012 (one-pole alpha), Hill & Summers, JASA 2007
(pitch JND), and scipy/numpy as general-purpose reference libraries.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import tomlkit
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from bridge.calibrate import (
    C_MAX,
    C_MIN,
    CalPoint,
    Capture,
    ChannelCalibration,
    HoldStats,
    ModelName,
    Pchip,
    c_from_raw,
    fit_calibration,
    hold_stats,
    pchip_slopes,
    rejects_hum,
    resolution_report,
)
from bridge.errors import CalibrationError

EPS0 = 8.8541878128e-12  # F/m, CODATA 2018 (DOMAIN.md section 2)
RATE = 50.0


def const_hold(raw: float, n: int = 50) -> HoldStats:
    """A hold of identical readings (noise then sits at the quantization floor)."""
    return hold_stats(np.full(n, raw), RATE)


def astable_hz(ra: float, rb: float, c: float) -> float:
    # f = 1/(ln2 (RA + 2RB) C) [book: standard astable timer formula, Horowitz & Hill, memory]
    return 1.0 / (math.log(2.0) * (ra + 2.0 * rb) * c)


# ------------------------------------------------------------------------- c formulas


def test_c_formulas_worked_values() -> None:
    # DOMAIN.md section 2: c = N0/N - 1 for counts, c = P/P0 - 1 for periods.
    assert c_from_raw(990.0, 1000.0, "count") == pytest.approx(1000.0 / 990.0 - 1.0, rel=1e-15)
    assert c_from_raw(990.0, 1000.0, "count") == pytest.approx(0.01010101, rel=1e-6)
    assert c_from_raw(1010.0, 1000.0, "period") == pytest.approx(0.01, rel=1e-12)
    assert c_from_raw(1000.0, 1000.0, "count") == 0.0


def test_astable_timer_check_values() -> None:
    # DOMAIN.md section 2 worked checks of the astable formula (computed there).
    assert astable_hz(1e3, 10e3, 100e-9) == pytest.approx(686.998, abs=1e-3)
    assert astable_hz(10e3, 100e3, 1e-6) == pytest.approx(6.870, abs=1e-3)


@pytest.mark.parametrize("window_s", [0.01, 0.02, 0.1, 1.0])
def test_c_is_the_capacitance_ratio_for_any_window(window_s: float) -> None:
    # Physics of DOMAIN.md section 2: f ~ 1/C, N = f*T, P ~ C. A hand adding 1 nF to the
    # 100 nF timing capacitor must give c = C_hand/C_fixed = 0.01, whatever the window.
    c_fixed, c_hand = 100e-9, 1e-9
    n0 = astable_hz(1e3, 10e3, c_fixed) * window_s
    n = astable_hz(1e3, 10e3, c_fixed + c_hand) * window_s
    assert c_from_raw(n, n0, "count") == pytest.approx(c_hand / c_fixed, rel=1e-12)
    clock = 48e6  # timer ticks per second
    p0 = clock / astable_hz(1e3, 10e3, c_fixed)
    p = clock / astable_hz(1e3, 10e3, c_fixed + c_hand)
    assert c_from_raw(p, p0, "period") == pytest.approx(c_hand / c_fixed, rel=1e-12)


@pytest.mark.parametrize("kind", ["count", "period"])
@pytest.mark.parametrize(
    "raw,expected",
    [(0.0, 0.0), (-5.0, 0.0), (math.nan, 0.0), (-math.inf, 0.0)],
)
def test_missing_reading_means_no_hand(kind: str, raw: float, expected: float) -> None:
    assert c_from_raw(raw, 1000.0, kind) == expected  # type: ignore[arg-type]


def test_extreme_readings_are_clamped() -> None:
    assert c_from_raw(math.inf, 1000.0, "count") == C_MIN
    assert c_from_raw(1e300, 1000.0, "count") == pytest.approx(C_MIN)
    assert c_from_raw(1e-300, 1000.0, "count") == C_MAX
    assert c_from_raw(math.inf, 1000.0, "period") == C_MAX
    assert c_from_raw(1e300, 1000.0, "period") == C_MAX
    assert c_from_raw(1e-300, 1000.0, "period") == pytest.approx(C_MIN)
    assert c_from_raw(math.inf, math.inf, "count") == 0.0  # inf/inf has no meaning
    assert c_from_raw(100.0, math.nan, "count") == 0.0
    assert c_from_raw(100.0, 0.0, "period") == 0.0


def test_unknown_kind_is_refused() -> None:
    with pytest.raises(CalibrationError):
        c_from_raw(1.0, 1.0, "volts")  # type: ignore[arg-type]


@given(
    raw=st.floats(allow_nan=True, allow_infinity=True),
    base=st.floats(allow_nan=True, allow_infinity=True),
    kind=st.sampled_from(["count", "period"]),
)
def test_c_always_finite_and_in_range(raw: float, base: float, kind: str) -> None:
    c = c_from_raw(raw, base, kind)  # type: ignore[arg-type]
    assert math.isfinite(c) and C_MIN <= c <= C_MAX


# ------------------------------------------------------------------------------ holds


def test_hold_stats_against_numpy() -> None:
    rng = np.random.default_rng(7)
    t = np.arange(400) / RATE
    x = 5000.0 + 0.75 * t + rng.normal(0.0, 2.0, t.size)
    hs = hold_stats(x, RATE)
    # numpy reference: mean, sample std, least-squares slope
    assert hs.mean == pytest.approx(np.mean(x), rel=1e-12)
    assert hs.std == pytest.approx(np.std(x, ddof=1), rel=1e-12)
    slope, intercept = np.polyfit(t, x, 1)
    assert hs.slope_per_s == pytest.approx(slope, rel=1e-9)
    resid = x - (slope * t + intercept)
    assert hs.noise == pytest.approx(np.sqrt(np.sum(resid**2) / (x.size - 2)), rel=1e-9)
    assert hs.drift == pytest.approx(slope * (x.size - 1) / RATE, rel=1e-9)
    # 0.75 counts/s over 8 s is 6 counts, three noise units: right at the default limit
    assert hs.drift_sigma == pytest.approx(abs(hs.drift) / hs.noise)


def test_still_hold_is_stable_and_warming_board_is_not() -> None:
    rng = np.random.default_rng(3)
    still = hold_stats(8000.0 + rng.normal(0.0, 1.5, 200), RATE)
    assert still.stable and still.drift_sigma < 3.0
    warming = hold_stats(8000.0 + np.linspace(0.0, 30.0, 200) + rng.normal(0.0, 1.5, 200), RATE)
    assert not warming.stable and warming.drift_sigma > 10.0
    short = hold_stats([8000.0, 8001.0, 8000.0, 7999.0], RATE)
    assert not short.stable  # too few samples to judge


def test_quiet_hold_noise_floor() -> None:
    hs = const_hold(1234.0)
    assert hs.std == 0.0
    # uniform rounding error of one unit has standard deviation 1/sqrt(12) [textbook]
    assert hs.noise == pytest.approx(1.0 / math.sqrt(12.0))


def test_bad_holds_are_refused() -> None:
    with pytest.raises(CalibrationError, match="at least 3"):
        hold_stats([1.0, 2.0], RATE)
    with pytest.raises(CalibrationError, match="invalid"):
        hold_stats([1.0, math.nan, 2.0, 3.0], RATE)
    with pytest.raises(CalibrationError):
        hold_stats([1.0, 2.0, 3.0], 0.0)


# --------------------------------------------------------------------- monotone cubic


xs_strategy = st.lists(st.floats(min_value=0.01, max_value=10.0), min_size=2, max_size=8).map(
    lambda steps: list(np.cumsum(steps))
)


@settings(max_examples=200, deadline=None)
@given(xs=xs_strategy, data=st.data())
def test_pchip_matches_scipy(xs: list[float], data: st.DataObject) -> None:
    interp = pytest.importorskip("scipy.interpolate")
    ys = data.draw(
        st.lists(st.floats(min_value=-100.0, max_value=100.0), min_size=len(xs), max_size=len(xs))
    )
    # the reference warns on overflow for nearly flat data (its answer is still right)
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        ref = interp.PchipInterpolator(xs, ys)
        ref_slopes = list(ref.derivative()(xs))
        grid = np.linspace(xs[0], xs[-1], 97)
        ref_values = list(ref(grid))
    # reference library: scipy.interpolate.PchipInterpolator slopes and values
    assert pchip_slopes(xs, ys) == pytest.approx(ref_slopes, rel=1e-9, abs=1e-9)
    ours = Pchip(xs, ys)
    assert [ours(float(g)) for g in grid] == pytest.approx(ref_values, rel=1e-9, abs=1e-9)


def test_pchip_holds_ends_and_inverts() -> None:
    curve = Pchip([0.0, 1.0, 3.0, 4.0], [0.0, 0.2, 0.9, 1.0])
    assert curve(-5.0) == 0.0 and curve(10.0) == 1.0 and curve(math.nan) == 0.0
    for y in (0.05, 0.2, 0.5, 0.95):
        assert curve(curve.inverse(y)) == pytest.approx(y, abs=1e-12)


# --------------------------------------------------------------- fitted calibrations


def law_hold(n0: float, c: float) -> HoldStats:
    return const_hold(n0 / (1.0 + c))


def fit_law(
    law: object, distances: list[float], n0: float = 20000.0, model: str = "auto"
) -> ChannelCalibration:
    far, near = max(distances), min(distances)
    mid = [d for d in distances if d not in (far, near)]

    def cap(d: float) -> Capture:
        return Capture(law_hold(n0, law(d)), distance_m=d)  # type: ignore[operator]

    return fit_calibration(
        "count",
        const_hold(n0),
        cap(far),
        cap(near),
        [cap(d) for d in mid],
        model=model,  # type: ignore[arg-type]
    )


def test_power_fit_recovers_its_own_parameters() -> None:
    # Self-consistency (not an outside check): points generated with c = a/(u + s)^alpha,
    # u = 1 - position, must give back a, s and alpha.
    a, s, alpha = 0.004, 0.15, 1.7
    pos = [0.0, 0.3, 0.55, 0.8, 1.0]
    holds = [law_hold(20000.0, a / (1.0 - p + s) ** alpha) for p in pos]
    cal = fit_calibration(
        "count",
        const_hold(20000.0),
        holds[0],
        holds[-1],
        [Capture(h, position=p) for h, p in zip(holds[1:-1], pos[1:-1])],
    )
    assert cal.model == "power"
    assert cal.params["a"] == pytest.approx(a, rel=1e-5)
    assert cal.params["s"] == pytest.approx(s, rel=1e-5)
    assert cal.params["alpha"] == pytest.approx(alpha, rel=1e-5)
    assert cal.fit_error < 1e-6


def test_two_points_inverse_distance_is_exact() -> None:
    # Physics of DOMAIN.md section 2: if the hand's coupling goes as 1/(d + d0), the
    # two-point default (alpha = 1, offset from the ratio) is exact at every distance.
    def law(d: float) -> float:
        return 0.0015 / (d + 0.04)

    cal = fit_law(law, [0.55, 0.05])
    assert cal.model == "power" and cal.params["alpha"] == 1.0
    for d in np.linspace(0.05, 0.55, 21):
        assert cal.position(law(float(d))) == pytest.approx((0.55 - d) / 0.5, abs=1e-9)
    # and the offset s is (d_near + d0)/(d_far - d_near) = 0.09/0.5
    assert cal.params["s"] == pytest.approx(0.18, rel=1e-9)


def hand_sphere_c(d: float) -> float:
    """c for a hand at d metres from a small spherical electrode (physically motivated).

    Hand: a conducting sphere of radius 5 cm; electrode: radius 2 cm; fixed capacitance
    10 pF. The coupling between two spheres far apart compared with their radii is
    4 pi eps0 r1 r2 / D, D the distance between centres (leading image-charge term
    [book: electrostatics of two spheres, memory]); the forearm adds a second 4 cm
    sphere 25 cm further back. The sum is not a single power law.
    """
    ra, rh, rf = 0.02, 0.05, 0.04
    dist = d + ra + rh
    k = 4.0 * math.pi * EPS0 * ra
    return (k * rh / dist + k * rf / (dist + 0.25)) / 10e-12


@pytest.mark.parametrize(
    "distances,model,tol",
    [
        ([0.6, 0.03], "auto", 0.03),  # two points: alpha = 1 assumed
        ([0.6, 0.3, 0.03], "auto", 0.01),  # power law fitted
        ([0.6, 0.45, 0.3, 0.15, 0.08, 0.03], "pchip", 0.01),  # monotone cubic
        ([0.6, 0.45, 0.3, 0.15, 0.08, 0.03], "linear", 0.05),
    ],
)
def test_position_is_linear_in_distance(distances: list[float], model: str, tol: float) -> None:
    cal = fit_law(hand_sphere_c, distances, model=model)
    far, near = max(distances), min(distances)
    # check at distances that were not captured
    for d in np.linspace(near, far, 57):
        want = (far - d) / (far - near)
        assert cal.position(hand_sphere_c(float(d))) == pytest.approx(want, abs=tol)


def test_poorly_fitting_points_switch_to_pchip() -> None:
    # an S-shaped response that no single power law follows
    pos = [0.0, 0.25, 0.5, 0.75, 1.0]
    cs = [0.010, 0.011, 0.030, 0.049, 0.050]
    holds = [law_hold(20000.0, c) for c in cs]
    cal = fit_calibration(
        "count",
        const_hold(20000.0),
        holds[0],
        holds[-1],
        [Capture(h, position=p) for h, p in zip(holds[1:-1], pos[1:-1])],
    )
    assert cal.model == "pchip"
    assert any("power law misses" in n for n in cal.notes)
    for p, c in zip(pos, cs):
        assert cal.position(cal.points[pos.index(p)].c) == pytest.approx(p, abs=1e-9)
        assert cal.c_at(p) == pytest.approx(c, rel=1e-6)


def test_far_within_noise_falls_back_to_linear() -> None:
    rng = np.random.default_rng(1)
    empty = hold_stats(10000.0 + rng.normal(0.0, 3.0, 200), RATE)
    far = const_hold(9999.0)  # c_far ~ 1e-4, about a third of a noise unit
    near = const_hold(9700.0)
    cal = fit_calibration("count", empty, far, near)
    assert cal.model == "linear"
    assert cal.notes and "middle point" in cal.notes[0]


def test_period_board_calibrates_the_same_way() -> None:
    p0 = 480000.0
    law = [0.02 / (d + 0.05) for d in (0.6, 0.3, 0.05)]
    holds = [const_hold(p0 * (1.0 + c)) for c in law]  # periods rise with c
    cal = fit_calibration(
        "period",
        const_hold(p0),
        Capture(holds[0], distance_m=0.6),
        Capture(holds[2], distance_m=0.05),
        [Capture(holds[1], distance_m=0.3)],
    )
    assert cal.kind == "period"
    assert cal.position_of_raw(p0 * (1.0 + 0.02 / 0.35)) == pytest.approx(
        (0.6 - 0.3) / 0.55, abs=1e-6
    )


# ---------------------------------------------------------------- bad captures refused


def test_swapped_far_and_near_is_refused() -> None:
    with pytest.raises(CalibrationError, match="not beyond the far hold.*fewer counts"):
        fit_calibration("count", const_hold(10000.0), const_hold(9500.0), const_hold(9900.0))
    with pytest.raises(CalibrationError, match="longer periods"):
        fit_calibration("period", const_hold(10000.0), const_hold(10500.0), const_hold(10100.0))


def test_range_smaller_than_noise_is_refused() -> None:
    rng = np.random.default_rng(2)
    empty = hold_stats(10000.0 + rng.normal(0.0, 5.0, 200), RATE)
    with pytest.raises(CalibrationError, match="ground connection"):
        fit_calibration("count", empty, const_hold(9990.0), const_hold(9985.0))


def test_dead_oscillator_hold_is_refused() -> None:
    with pytest.raises(CalibrationError, match="60.0 cm.*no usable"):
        fit_calibration(
            "count",
            const_hold(10000.0),
            Capture(const_hold(0.0), distance_m=0.6),
            Capture(const_hold(9500.0), distance_m=0.05),
        )


def test_moving_hand_during_a_hold_is_noted() -> None:
    rng = np.random.default_rng(8)
    moving = hold_stats(np.linspace(9750.0, 9650.0, 100) + rng.normal(0.0, 1.0, 100), RATE)
    cal = fit_calibration(
        "count",
        const_hold(10000.0),
        Capture(const_hold(9900.0), distance_m=0.6),
        Capture(const_hold(9500.0), distance_m=0.05),
        [Capture(moving, distance_m=0.3)],
    )
    assert any("30.0 cm hold drifted" in n for n in cal.notes)
    assert any("30.0 cm hold drifted" in w for w in resolution_report(cal, window_s=0.1).warnings)


def test_far_beyond_empty_is_refused() -> None:
    with pytest.raises(CalibrationError, match="hand-absent hold again"):
        fit_calibration("count", const_hold(10000.0), const_hold(10050.0), const_hold(9500.0))


def test_out_of_order_middle_point_is_named() -> None:
    empty = const_hold(10000.0)
    far = Capture(const_hold(9900.0), distance_m=0.6)
    near = Capture(const_hold(9500.0), distance_m=0.05)
    good = Capture(const_hold(9800.0), distance_m=0.4)
    bad = Capture(const_hold(9910.0), distance_m=0.2)  # reads less hand than the far point
    with pytest.raises(CalibrationError, match=r"20\.0 cm.*capture that point again"):
        fit_calibration("count", empty, far, near, [good, bad])


def test_inconsistent_positions_are_refused() -> None:
    empty = const_hold(10000.0)
    far = Capture(const_hold(9900.0), distance_m=0.6)
    near = Capture(const_hold(9500.0), distance_m=0.05)
    with pytest.raises(CalibrationError, match="must too"):
        fit_calibration("count", empty, far, near, [Capture(const_hold(9700.0), position=0.5)])
    with pytest.raises(CalibrationError, match="outside the playing range"):
        fit_calibration("count", empty, far, near, [Capture(const_hold(9700.0), distance_m=0.7)])
    with pytest.raises(CalibrationError, match="larger than near"):
        fit_calibration("count", empty, near, far)
    with pytest.raises(CalibrationError, match="strictly between"):
        fit_calibration(
            "count",
            empty,
            const_hold(9900.0),
            const_hold(9500.0),
            [Capture(const_hold(9700.0), position=1.0)],
        )
    with pytest.raises(CalibrationError, match="share position"):
        fit_calibration(
            "count",
            empty,
            const_hold(9900.0),
            const_hold(9500.0),
            [Capture(const_hold(9700.0), position=0.5), Capture(const_hold(9650.0), position=0.5)],
        )


@settings(max_examples=150, deadline=None)
@given(
    raws=st.lists(st.floats(1.0, 30000.0), min_size=2, max_size=6),
    noise=st.floats(0.0, 50.0),
    model=st.sampled_from(["auto", "power", "pchip", "linear"]),
)
def test_any_capture_gives_a_curve_or_a_calibration_error(
    raws: list[float], noise: float, model: str
) -> None:
    # whatever was captured: a usable curve, or a CalibrationError that says what to redo
    empty = hold_stats(10000.0 + noise * np.tile([-1.0, 1.0], 50), RATE)
    far, near, *mid = (const_hold(r) for r in raws)
    between = [Capture(h, position=(k + 1) / (len(mid) + 1)) for k, h in enumerate(mid)]
    try:
        cal = fit_calibration("count", empty, far, near, between, model=model)  # type: ignore[arg-type]
    except CalibrationError:
        return
    ps = [cal.position(c) for c in np.linspace(-0.5, 2.0, 200)]
    assert all(0.0 <= p <= 1.0 for p in ps)
    assert all(b >= a for a, b in itertools.pairwise(ps))
    for pt in cal.points:
        assert abs(cal.position(pt.c) - pt.position) <= max(cal.fit_error, 1e-9) + 1e-9


# ---------------------------------------------------- monotone, inverse, finite always


@st.composite
def calibrations(draw: st.DrawFn) -> ChannelCalibration:
    model: ModelName = draw(st.sampled_from(["power", "pchip", "linear"]))
    if model == "power":
        a = draw(st.floats(1e-4, 1.0))
        s = draw(st.floats(1e-3, 10.0))
        alpha = draw(st.floats(0.3, 4.0))
        pts = [CalPoint(position=p, c=a / (1.0 - p + s) ** alpha) for p in (0.0, 1.0)]
        assume(pts[1].c > pts[0].c * (1 + 1e-9))
        return ChannelCalibration(
            kind="count",
            baseline=10000.0,
            noise=1.0,
            points=pts,
            model="power",
            params={"a": a, "s": s, "alpha": alpha},
        )
    n = draw(st.integers(2, 6))
    steps = draw(st.lists(st.floats(1e-3, 1.0), min_size=n - 1, max_size=n - 1))
    c0 = draw(st.floats(-0.001, 0.05))
    cs = [c0, *(c0 + float(v) for v in np.cumsum(steps) * 0.05)]
    inner = sorted(
        draw(st.lists(st.floats(0.01, 0.99), min_size=n - 2, max_size=n - 2, unique=True))
    )
    pos = [0.0, *inner, 1.0]
    assume(all(b - a > 1e-3 for a, b in itertools.pairwise(pos)))
    params = {"shift": max(1e-4, 1e-4 - c0)} if model == "pchip" else {}
    pts = [CalPoint(position=p, c=c) for p, c in zip(pos, cs)]
    return ChannelCalibration(
        kind="count", baseline=10000.0, noise=1.0, points=pts, model=model, params=params
    )


@settings(max_examples=150, deadline=None)
@given(cal=calibrations(), p=st.floats(0.0, 1.0))
def test_inverse_round_trip(cal: ChannelCalibration, p: float) -> None:
    c = cal.c_at(p)
    assert math.isfinite(c)
    assert cal.position(c) == pytest.approx(p, abs=1e-7)


@settings(max_examples=150, deadline=None)
@given(cal=calibrations(), cs=st.lists(st.floats(-1.0, 10.0), min_size=2, max_size=30))
def test_position_monotone_and_clamped(cal: ChannelCalibration, cs: list[float]) -> None:
    ps = [cal.position(c) for c in sorted(cs)]
    assert all(0.0 <= p <= 1.0 for p in ps)
    assert all(b >= a - 1e-12 for a, b in itertools.pairwise(ps))


@settings(max_examples=60, deadline=None)
@given(cal=calibrations())
def test_position_finite_for_any_input(cal: ChannelCalibration) -> None:
    for c in (0.0, -1.0, -5.0, math.nan, math.inf, -math.inf, 1e308, -1e308, 1e-308):
        p = cal.position(c)
        assert math.isfinite(p) and 0.0 <= p <= 1.0
    assert cal.position(math.nan) == 0.0 and cal.position(math.inf) == 1.0
    for p in (math.nan, -3.0, 7.0, math.inf):
        assert math.isfinite(cal.c_at(p))
    for raw in (0.0, -1.0, math.nan, math.inf, 1e300):
        assert 0.0 <= cal.position_of_raw(raw) <= 1.0


# ------------------------------------------------------------------- stored in TOML


def test_calibration_round_trips_through_toml() -> None:
    cal = fit_law(hand_sphere_c, [0.6, 0.3, 0.03])
    text = tomlkit.dumps({"pitch": cal.model_dump()})
    back = ChannelCalibration.model_validate(tomlkit.parse(text).unwrap()["pitch"])
    assert back == cal
    assert back != fit_law(hand_sphere_c, [0.6, 0.35, 0.03])
    for c in (0.01, 0.05, 0.1):
        assert back.position(c) == cal.position(c)
    # an unknown distance is left out, never written as a null TOML cannot hold
    pts = ChannelCalibration(
        kind="count",
        baseline=1.0,
        noise=0.0,
        model="linear",
        points=[CalPoint(position=0, c=0.01), CalPoint(position=1, c=0.1)],
    )
    assert "distance_m" not in pts.model_dump()["points"][0]
    tomlkit.dumps(pts.model_dump())


def test_stored_calibration_is_validated() -> None:
    good = fit_law(hand_sphere_c, [0.6, 0.3, 0.03]).model_dump()
    with pytest.raises(ValidationError, match="extra"):
        ChannelCalibration.model_validate({**good, "colour": "red"})
    with pytest.raises(ValidationError, match="needs params"):
        ChannelCalibration.model_validate({**good, "params": {"a": 1.0}})
    with pytest.raises(ValidationError, match="start at position 0"):
        ChannelCalibration.model_validate({**good, "points": good["points"][::-1]})
    bent = [dict(p) for p in good["points"]]
    bent[1]["c"] = bent[2]["c"] * 1.1  # the middle point reads more hand than the near one
    with pytest.raises(ValidationError, match="rise"):
        ChannelCalibration.model_validate({**good, "points": bent})
    with pytest.raises(ValidationError):
        ChannelCalibration.model_validate({**good, "baseline": -1.0})
    with pytest.raises(ValidationError, match="overflow"):
        ChannelCalibration.model_validate(
            {**good, "model": "power", "params": {"a": 1.0, "s": 0.01, "alpha": 500.0}}
        )


# ------------------------------------------------------------------ resolution report


def linear_cal(n0: float, n_far: float, n_near: float, noise: float) -> ChannelCalibration:
    return ChannelCalibration(
        kind="count",
        baseline=n0,
        noise=noise,
        model="linear",
        points=[
            CalPoint(position=0.0, c=n0 / n_far - 1.0),
            CalPoint(position=1.0, c=n0 / n_near - 1.0),
        ],
    )


def test_cents_per_count_worked_example() -> None:
    # Worked by hand from DOMAIN.md section 2 (one count changes c by N0/N^2) and the
    # chain rule cents/count = (dc/dN) * (dposition/dc) * (span in cents):
    #   N0 = 10000, far N = 9900, near N = 9500, position linear in c, span 24 semitones.
    #   c_far = 10000/9900 - 1 = 0.0101010; c_near = 10000/9500 - 1 = 0.0526316
    #   dposition/dc = 1/(0.0526316 - 0.0101010) = 1/0.0425306 = 23.5125
    #   near: N0/N^2 = 10000/9500^2 = 1.10803e-4 -> 1.10803e-4 * 23.5125 * 2400 = 6.2526 cents
    #   far:  N0/N^2 = 10000/9900^2 = 1.02030e-4 -> 1.02030e-4 * 23.5125 * 2400 = 5.7575 cents
    #   middle: c = 0.0313663, N = 10000/1.0313663 = 9695.88,
    #           N0/N^2 = 1.06373e-4 -> 6.0026 cents; noise 2 counts -> 12.005 cents RMS
    #   frequency change far -> near: 1 - 9500/9900 = 4.0404 %
    cal = linear_cal(10000.0, 9900.0, 9500.0, noise=2.0)
    rep = resolution_report(cal, window_s=0.02, pitch_span_semitones=24.0)
    assert rep.cents_per_count_near == pytest.approx(6.2526, abs=1e-3)
    assert rep.cents_per_count_far == pytest.approx(5.7575, abs=1e-3)
    assert rep.cents_per_count_middle == pytest.approx(6.0026, abs=1e-3)
    assert rep.pitch_noise_cents == pytest.approx(12.005, abs=2e-3)
    assert rep.total_change_pct == pytest.approx(4.0404, abs=1e-4)
    # the same chain rule written out with N in place of c
    n_mid = 10000.0 / (1.0 + (cal.points[0].c + cal.points[1].c) / 2.0)
    by_hand = 10000.0 / n_mid**2 / (cal.points[1].c - cal.points[0].c) * 2400.0
    assert rep.cents_per_count_middle == pytest.approx(by_hand, rel=1e-6)


def test_smoothed_noise_uses_one_pole_gain() -> None:
    cal = linear_cal(10000.0, 9900.0, 9500.0, noise=2.0)
    rep = resolution_report(cal, window_s=1.0 / 120.0, smoothing_cutoff_hz=1.0)
    # Casiez et al., CHI 2012: alpha(120 Hz, 1 Hz) = 0.0497547 (DOMAIN.md section 4)
    a = 0.0497547
    assert rep.pitch_noise_smoothed_cents == pytest.approx(
        rep.pitch_noise_cents * math.sqrt(a / (2.0 - a)), rel=1e-5
    )
    # reference library check of the white-noise gain sqrt(alpha/(2 - alpha))
    signal = pytest.importorskip("scipy.signal")
    x = np.random.default_rng(5).normal(0.0, 1.0, 400_000)
    y = signal.lfilter([a], [1.0, -(1.0 - a)], x)[2000:]
    assert np.std(y) == pytest.approx(math.sqrt(a / (2.0 - a)), rel=0.02)


@pytest.mark.parametrize(
    "window_s,mains,expected",
    [
        (0.020, 50.0, True),  # 20 ms rejects 50 Hz (DOMAIN.md section 2, common practice)
        (0.020, 60.0, False),
        (0.01667, 60.0, True),  # 16.67 ms rejects 60 Hz (common practice)
        (1.0 / 60.0, 60.0, True),
        (0.01667, 50.0, False),
        (0.100, 50.0, True),  # 100 ms rejects both (common practice)
        (0.100, 60.0, True),
        (0.040, 50.0, True),  # any whole number of periods
        (0.010, 50.0, False),  # half a period
        (0.005, 60.0, False),  # less than one period
    ],
)
def test_hum_rejection_decision(window_s: float, mains: float, expected: bool) -> None:
    assert rejects_hum(window_s, mains) is expected


def test_hum_warning_names_the_fix() -> None:
    cal = linear_cal(10000.0, 9900.0, 9500.0, noise=0.1)
    bad = resolution_report(cal, window_s=0.010)
    assert not bad.rejects_50hz and not bad.rejects_60hz
    assert any("20 ms" in w and "16.67 ms" in w and "100 ms" in w for w in bad.warnings)
    good = resolution_report(cal, window_s=0.100)
    assert good.rejects_50hz and good.rejects_60hz
    assert not any("hum" in w for w in good.warnings)
    only60 = resolution_report(cal, window_s=0.020, mains_hz=60.0)
    assert any("hum" in w for w in only60.warnings)


def test_reciprocal_counting_gain() -> None:
    # DOMAIN.md section 2 [practice]: 10 ms at 555 kHz is 5,550 counts against 480,000
    # ticks of a 48 MHz clock: about 87 times finer.
    counts = linear_cal(5550.0, 5500.0, 5300.0, noise=0.5)
    rep = resolution_report(counts, window_s=0.01, clock_hz=48e6)
    assert rep.reciprocal_gain == pytest.approx(87.0, abs=1.0)
    assert "period-timing board" in str(rep)
    periods = ChannelCalibration(
        kind="period",
        baseline=480000.0,
        noise=3.0,
        model="linear",
        points=[CalPoint(position=0.0, c=0.005), CalPoint(position=1.0, c=0.04)],
    )
    rep = resolution_report(periods, window_s=0.01, osc_hz=555e3)
    assert rep.reciprocal_gain == pytest.approx(87.0, abs=1.0)
    assert "reciprocal counting" in str(rep)


def test_small_range_warns_with_advice() -> None:
    cal = linear_cal(10000.0, 9995.0, 9970.0, noise=1.0)  # 0.25 % across the range
    rep = resolution_report(cal, window_s=0.02)
    assert rep.total_change_pct < 1.0
    text = " ".join(rep.warnings)
    assert "ground connection" in text and "bigger antenna" in text
    # coarse steps at the far end: (1+c)^2/N0 * dp/dc * 2400 ~ 96 cents a count
    assert "period-timing board" in text
    # pitch noise well above the ~3.5 cent JND (Hill & Summers, JASA 2007)
    assert "longer window" in text


def test_healthy_rig_has_no_warnings() -> None:
    # a period board: 480,000 ticks, a 5 % range and 2 ticks of noise, 100 ms window
    cal = ChannelCalibration(
        kind="period",
        baseline=480000.0,
        noise=2.0,
        model="power",
        params={"a": 0.01, "s": 0.2, "alpha": 1.0},
        points=[CalPoint(position=0.0, c=0.01 / 1.2), CalPoint(position=1.0, c=0.05)],
    )
    rep = resolution_report(cal, window_s=0.1, smoothing_cutoff_hz=1.0)
    assert rep.warnings == [], rep.warnings
    assert rep.cents_per_count_far < 3.0


def test_unstable_baseline_and_notes_are_reported() -> None:
    cal = linear_cal(10000.0, 9900.0, 9500.0, noise=0.1).model_copy(
        update={"baseline_stable": False}
    )
    rep = resolution_report(cal, window_s=0.1)
    assert any("warm up" in w for w in rep.warnings)


def test_report_serialises_and_prints() -> None:
    cal = fit_law(hand_sphere_c, [0.6, 0.3, 0.03])
    rep = resolution_report(cal, window_s=0.02, kind="count", smoothing_cutoff_hz=1.0)
    again = type(rep).model_validate_json(rep.model_dump_json())
    assert again == rep
    text = str(rep)
    assert "cents per count" in text and "50 Hz yes" in text
    with pytest.raises(CalibrationError):
        resolution_report(cal, window_s=0.02, kind="period")
    with pytest.raises(CalibrationError):
        resolution_report(cal, window_s=0.0)


# ------------------------------------------------------------- with the simulator


def test_simulated_soundcheck_calibrates_linear_in_distance() -> None:
    # Integration with bridge/sim.py, whose hand law C_hand = C_h0 (d0/(d + d0))^alpha
    # (d0 5 cm, alpha 1.5 by default) was written separately: a soundcheck with one
    # middle mark must recover that law and then follow a slow linear glide.
    from bridge import sim

    s = sim.SimSettings(seed=11, window_s=0.02, drift=sim.DriftSettings(mode="off"))
    perf = sim.soundcheck(5, points=(0.25,), d_near=s.d_near_m, d_far=s.d_far_m)
    t_glide = perf.duration + 1.5
    perf.then(
        sim.Performance(6)
        .silence(0.5)
        .glide(1.0, pitch=s.d_far_m, volume=s.d_far_m)
        .glide(8.0, pitch=s.d_near_m, volume=s.d_near_m, shape="linear")
        .leave(1.0)
    )
    rate = 1.0 / s.window_s
    values, truth = sim.SimBoard(s, perf).run(round(perf.duration * rate))
    pitch = values[:, s.names.index("pitch")].astype(float)

    def cap(label: str) -> Capture:
        m = next(m for m in perf.marks if m.label == label)
        seg = pitch[int((m.start + 0.3) * rate) : int(m.end * rate)]
        d = None if label == "away" else m.d_pitch
        return Capture(hold_stats(seg, rate), distance_m=d)

    cal = fit_calibration("count", cap("away").stats, cap("far"), cap("near"), [cap("mark-0.25")])
    spec = s.channels[0]
    assert cal.model == "power"
    assert cal.params["alpha"] == pytest.approx(spec.hand_alpha, abs=0.05)
    want_s = (s.d_near_m + spec.hand_d0_m) / (s.d_far_m - s.d_near_m)
    assert cal.params["s"] == pytest.approx(want_s, rel=0.05)
    i0, i1 = int(t_glide * rate), int((t_glide + 8.0) * rate)
    pos = np.array([cal.position_of_raw(float(v)) for v in pitch[i0:i1]])
    err = pos - truth.pos_pitch[i0:i1]
    assert float(np.sqrt(np.mean(err**2))) < 0.015
