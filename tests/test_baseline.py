"""Tests for bridge/baseline.py: drift tracking, presence, re-baseline, reference correction.

The behaviour checked is the capacitive-sensing practice summarised in DOMAIN.md section 3
[practice: described the same way in many application notes]: slow follow while absent,
freeze while present, fast recovery from readings beyond empty, threshold plus hysteresis
with debounce, re-baseline after a sustained reverse reading, ratiometric reference.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from bridge.baseline import BaselineSettings, BaselineTracker, ReferenceCorrector
from bridge.calibrate import CalPoint, ChannelCalibration, c_from_raw
from bridge.errors import CalibrationError

RATE = 100.0
N0 = 10000.0
SIGMA = 2.0  # counts of noise


def tracker(**overrides: float) -> BaselineTracker:
    return BaselineTracker(
        BaselineSettings.model_validate(overrides),
        base=N0,
        noise=SIGMA,
        kind="count",
        rate_hz=RATE,
    )


def counts_for_c(c: float, base: float = N0) -> float:
    # inverse of c = N0/N - 1 (DOMAIN.md section 2)
    return base / (1.0 + c)


@pytest.mark.parametrize("direction", [-1.0, 1.0])
def test_slow_drift_followed_while_absent(direction: float) -> None:
    # 1 % drift over 10 minutes at 100 frames/s, either way, with 2 counts of noise:
    # the baseline stays within one noise unit of the true empty level and no hand is seen.
    n = 60_000
    rng = np.random.default_rng(11)
    true = N0 * (1.0 + direction * 0.01 * np.arange(n) / n)
    raw = true + rng.normal(0.0, SIGMA, n)
    tr = tracker()
    err = np.empty(n)
    seen = False
    for i, x in enumerate(raw.tolist()):
        err[i] = tr.update(x) - true[i]
        seen = seen or tr.present
    assert not seen
    assert np.max(np.abs(err)) < SIGMA
    assert abs(tr.baseline - true[-1]) < SIGMA
    # without tracking the error would have reached 100 counts
    assert abs(true[-1] - N0) == pytest.approx(100.0, rel=1e-3)


def test_frozen_while_present() -> None:
    rng = np.random.default_rng(2)
    tr = tracker()
    for x in (N0 + rng.normal(0.0, SIGMA, 200)).tolist():
        tr.update(x)
    before = tr.baseline
    hand = counts_for_c(0.02)  # 2 % of the reading: about 100 noise units
    frames = (hand + rng.normal(0.0, SIGMA, 6000)).tolist()
    out, present = [], []
    for x in frames:
        out.append(tr.update(x))
        present.append(tr.present)
    assert tr.present
    onset = present.index(True)
    # At onset the baseline may step back to where it stood before the hand came (the
    # roll-back undoes what the follower absorbed of the approach); from then on it is frozen.
    assert len(set(out[onset:])) == 1
    assert abs(out[onset] - before) < SIGMA


def test_fast_recovery_after_hand_leaves() -> None:
    # While a hand was present the room drifted up 0.5 % (50 counts). When the hand
    # leaves, the reading is beyond empty: the baseline must catch up within about a
    # second, not the slow follow.
    rng = np.random.default_rng(4)
    tr = tracker()
    for x in (counts_for_c(0.02) + rng.normal(0.0, SIGMA, 500)).tolist():
        tr.update(x)
    assert tr.present
    new_empty = N0 * 1.005
    trace = [tr.update(x) for x in (new_empty + rng.normal(0.0, SIGMA, 300)).tolist()]
    assert not tr.present
    assert abs(trace[int(1.0 * RATE)] - new_empty) < SIGMA
    # a 5 s follow alone would still be 50 * exp(-1/5) = 41 counts short after 1 s
    assert abs(trace[10] - new_empty) > 20.0  # and it is not an instant jump either


def test_rebaseline_when_started_with_hand_near() -> None:
    # Power-up with a hand near: the tracker starts from the hand's reading. When the
    # hand leaves, the sustained reverse reading re-baselines after rebase_after_s.
    # The fast follower is slowed right down here so the jump itself is what is seen.
    hand = counts_for_c(0.02)
    tr = BaselineTracker(
        BaselineSettings(recover_tau_s=1e6, rebase_after_s=0.5),
        base=hand,
        noise=SIGMA,
        kind="count",
        rate_hz=RATE,
    )
    out = [tr.update(N0) for _ in range(80)]
    assert not tr.present
    jump = int(0.5 * RATE) - 1  # the 50th reverse frame
    assert out[jump - 1] == pytest.approx(hand, abs=0.01)
    assert out[jump] == N0
    assert out[-1] == N0 and tr.deviation == pytest.approx(0.0)


def test_held_hand_does_not_fade() -> None:
    # A hand held still for ten minutes keeps its position: nothing moves the baseline.
    cal = ChannelCalibration(
        kind="count",
        baseline=N0,
        noise=SIGMA,
        model="power",
        params={"a": 0.004, "s": 0.2, "alpha": 1.0},
        points=[CalPoint(position=0.0, c=0.004 / 1.2), CalPoint(position=1.0, c=0.02)],
    )
    rng = np.random.default_rng(9)
    tr = tracker()
    held = counts_for_c(cal.c_at(0.5))
    pos = []
    for x in (held + rng.normal(0.0, SIGMA, 60_000)).tolist():
        base = tr.update(x)
        pos.append(cal.position(c_from_raw(x, base, "count")))
    assert tr.present
    first, last = np.mean(pos[:100]), np.mean(pos[-100:])
    assert first == pytest.approx(0.5, abs=0.01)
    assert last == pytest.approx(first, abs=0.01)


def test_hovering_hand_is_absorbed_no_faster_than_the_cap() -> None:
    # A hand hovering just under the presence threshold (5 noise units, 10 counts): a
    # 0.1 s follower alone would absorb it within half a second; the default cap of
    # 0.02 % of the reading a second lets the baseline move only 2 counts a second.
    tr = tracker(follow_tau_s=0.1)
    hover = counts_for_c(5 * SIGMA / N0)
    out = [tr.update(hover) for _ in range(int(2 * RATE))]
    assert not tr.present
    assert N0 - out[-1] == pytest.approx(2e-4 * N0 * 2.0, rel=1e-3)
    assert out[-1] - hover > 5.0


def test_hysteresis_and_debounce_on_a_crafted_sequence() -> None:
    # T = 6, H = 2: on above 8 noise units, off below 4; three frames of debounce.
    # Followers are stopped so every z is measured against the same baseline.
    tr = BaselineTracker(
        BaselineSettings(
            threshold_sigma=6,
            hysteresis_sigma=2,
            debounce_frames=3,
            follow_tau_s=1e12,
            recover_tau_s=1e12,
            rebase_after_s=1e9,
        ),
        base=N0,
        noise=10.0,
        kind="count",
        rate_hz=RATE,
    )
    sigma_c = 10.0 / N0
    z_seq = [0, 9, 9, 9, 5, 3, 3, 5, 3, 3, 3, 9, 7.9, 9, 9, 9, 4.1, 3.9, 3.9, 3.9]
    want = [0, 0, 0, 1, 1, 1, 1, 1, 1, 1, 0, 0, 0, 0, 0, 1, 1, 1, 1, 0]
    got = [(tr.update(counts_for_c(z * sigma_c)), tr.present)[1] for z in z_seq]
    assert got == [bool(w) for w in want]


def test_period_board_sees_the_hand_as_longer_periods() -> None:
    p0 = 480000.0
    tr = BaselineTracker(BaselineSettings(), base=p0, noise=3.0, kind="period", rate_hz=RATE)
    for _ in range(5):
        tr.update(p0 * 1.01)  # a hand raises periods
    assert tr.present
    tr2 = BaselineTracker(BaselineSettings(), base=p0, noise=3.0, kind="period", rate_hz=RATE)
    for _ in range(200):
        tr2.update(p0 * 0.99)  # beyond empty for a period board
    assert not tr2.present and tr2.baseline == pytest.approx(p0 * 0.99, rel=1e-6)


def test_noise_floor_keeps_a_quiet_board_from_hair_triggering() -> None:
    # noise 0: the threshold comes from noise_floor_c (1e-5 of the reading), so a
    # one-count wobble on 10,000 counts (c = 1e-4 = 10 floor units) counts, half a
    # count (c = 5e-5, 5 units) does not.
    quiet = BaselineTracker(BaselineSettings(), base=N0, noise=0.0, kind="count", rate_hz=RATE)
    for _ in range(10):
        quiet.update(N0 - 0.5)
    assert not quiet.present
    for _ in range(3):
        quiet.update(N0 - 1.0)
    assert quiet.present


def test_missing_readings_change_nothing() -> None:
    tr = tracker()
    for bad in (0.0, -5.0, math.nan, math.inf, -math.inf):
        assert tr.update(bad) == N0
    assert not tr.present and tr.baseline == N0


def test_rebase_command() -> None:
    tr = tracker()
    for _ in range(10):
        tr.update(counts_for_c(0.02))
    assert tr.present
    tr.rebase()  # to the last reading: the hand becomes the new empty level
    assert not tr.present and tr.baseline == pytest.approx(counts_for_c(0.02))
    tr.rebase(9000.0)
    assert tr.baseline == 9000.0
    with pytest.raises(CalibrationError):
        tr.rebase(math.nan)


def test_settings_are_checked() -> None:
    with pytest.raises(ValidationError, match="hysteresis"):
        BaselineSettings(threshold_sigma=2, hysteresis_sigma=2)
    with pytest.raises(ValidationError, match="extra"):
        BaselineSettings(treshold_sigma=5)  # type: ignore[call-arg]
    with pytest.raises(CalibrationError):
        BaselineTracker(BaselineSettings(), base=0.0, noise=1.0, kind="count", rate_hz=RATE)
    with pytest.raises(CalibrationError):
        BaselineTracker(
            BaselineSettings(),
            base=1.0,
            noise=1.0,
            kind="volts",  # type: ignore[arg-type]
            rate_hz=RATE,
        )


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(allow_nan=True, allow_infinity=True), max_size=200))
def test_baseline_always_finite_and_positive(raws: list[float]) -> None:
    tr = tracker(rebase_after_s=0.05)
    for x in raws:
        b = tr.update(x)
        assert 0.0 < b < math.inf


# ----------------------------------------------------------------- reference channel


@pytest.mark.parametrize("kind", ["count", "period"])
def test_reference_cancels_common_mode_gain_exactly(kind: str) -> None:
    # Every oscillator's gain g(t) drifts alike: counts scale by g, periods by 1/g
    # (f ~ 1/C, DOMAIN.md section 2), for the sensing and reference channels alike.
    t = np.linspace(0.0, 600.0, 2001)
    g = 1.0 + 0.02 * np.sin(2 * np.pi * t / 300.0) + 0.01 * t / 600.0
    scale = g if kind == "count" else 1.0 / g
    sensor_true = 9500.0 + 300.0 * np.sin(t)  # a moving hand
    ref_base = 7300.0
    corr = ReferenceCorrector(ref_base)
    out = [corr.correct(s * k, ref_base * k) for s, k in zip(sensor_true, scale)]
    assert out == pytest.approx(list(sensor_true), rel=1e-12)
    assert corr.correct(123.0, 0.0) == 123.0  # missing reference: unchanged
    assert corr.correct(123.0, math.nan) == 123.0


def test_reference_keeps_a_held_hand_in_place_while_gain_drifts() -> None:
    # Frozen tracker + 1 % gain drift: without the reference the held position moves,
    # with it the position stays.
    cal = ChannelCalibration(
        kind="count",
        baseline=N0,
        noise=SIGMA,
        model="linear",
        points=[CalPoint(position=0.0, c=0.002), CalPoint(position=1.0, c=0.03)],
    )
    held = counts_for_c(cal.c_at(0.5))
    ref_base = 8000.0
    corr = ReferenceCorrector(ref_base)
    plain, fixed = tracker(), tracker()
    for k in np.linspace(1.0, 0.99, 3000).tolist():
        b_plain = plain.update(held * k)
        raw_fixed = corr.correct(held * k, ref_base * k)
        b_fixed = fixed.update(raw_fixed)
    assert plain.present and fixed.present
    assert cal.position(c_from_raw(raw_fixed, b_fixed, "count")) == pytest.approx(0.5, abs=1e-9)
    drifted = cal.position(c_from_raw(held * 0.99, b_plain, "count"))
    assert abs(drifted - 0.5) > 0.3  # 1 % of gain is about a third of this range


def test_simulated_comings_and_goings_with_drift() -> None:
    # Integration with bridge/sim.py: a hand enters and leaves sixty times over four
    # minutes while the oscillators drift 1 % (C_fixed) and 0.5 % (gain) in ten minutes.
    from bridge import sim
    from bridge.calibrate import hold_stats

    s = sim.SimSettings(
        seed=1,
        window_s=0.01,
        drift=sim.DriftSettings(mode="ramp", c_fixed_percent=1.0, gain_percent=0.5),
    )
    perf = sim.comings_and_goings(1, times=60)
    rate = 1.0 / s.window_s
    n = int(perf.duration * rate)
    values, truth = sim.SimBoard(s, perf).run(n)
    raw = values[:, 0].astype(float)
    empty = hold_stats(raw[:80], rate)
    tr = BaselineTracker(
        BaselineSettings(), base=empty.mean, noise=empty.noise, kind="count", rate_hz=rate
    )
    present = np.zeros(n, dtype=bool)
    base = np.zeros(n)
    for i, x in enumerate(raw.tolist()):
        base[i] = tr.update(x)
        present[i] = tr.present

    def settled(mask: np.ndarray, frames: int = 10) -> np.ndarray:
        out = mask.copy()
        for k in range(1, frames + 1):
            out[k:] &= mask[:-k]
            out[:k] = False
        return out

    in_range = truth.d_pitch <= s.d_far_m
    gone = np.isinf(truth.d_pitch)
    assert present[settled(in_range)].mean() > 0.999
    assert (~present[settled(gone)]).mean() > 0.999
    true_empty = truth.f_hz[:, 0] * s.window_s  # the hand-absent count where the hand is gone
    drift = abs(true_empty[gone][-1] - true_empty[gone][0])
    assert drift > 10 * empty.noise  # the test is about something
    assert np.max(np.abs(base[gone] - true_empty[gone])) < 2 * empty.noise
