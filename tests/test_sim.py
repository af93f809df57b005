"""Tests for bridge/sim.py: the physics formulas against published values, the board's
counting against the exact arithmetic of a free-running counter, noise and drift
behaviour, and reproducibility."""

from __future__ import annotations

import math

import numpy as np
import pytest
from pydantic import ValidationError

from bridge.errors import ConfigError
from bridge.frames import BinaryDecoder, TextDecoder
from bridge.sim import (
    ABSENT,
    CHUNK,
    EPS0,
    ChannelSpec,
    DriftSettings,
    HumSettings,
    NoiseSettings,
    Performance,
    SimBoard,
    SimSettings,
    astable_frequency,
    distance_for_position,
    hand_capacitance,
    hold,
    ideal_position,
    plate_capacitance,
    scenario,
    soundcheck,
    sphere_capacitance,
)

QUIET = {
    "noise": NoiseSettings(freq_ppm=0.0, phase_cycles=0.0),
    "hum": HumSettings(ppm=0.0),
    "drift": DriftSettings(mode="off"),
}


def quiet(**kw: object) -> SimSettings:
    """Settings with every noise and drift source off, unless kw turns one on."""
    return SimSettings(**{**QUIET, "seed": 5, **kw})  # type: ignore[arg-type]


# --------------------------------------------------------------------------- physics


def test_astable_worked_values() -> None:
    # Standard astable timer formula f = 1/(ln2 (RA + 2 RB) C) [book: Horowitz & Hill,
    # The Art of Electronics; recalled from memory], worked values from DOMAIN.md section 2.
    assert astable_frequency(1e3, 10e3, 100e-9) == pytest.approx(686.998, abs=5e-4)
    assert astable_frequency(10e3, 100e3, 1e-6) == pytest.approx(6.870, abs=5e-4)
    # The rule of thumb f ~ 1.44 / ((RA + 2 RB) C) [book, same source]: 1/ln2 = 1.4427.
    assert astable_frequency(1e3, 10e3, 100e-9) * 21e3 * 100e-9 == pytest.approx(1.44, abs=0.005)


def test_frequency_is_inverse_in_capacitance() -> None:
    # Relaxation oscillators have f proportional to 1/C [book: astable formula, DOMAIN.md 2].
    f1 = astable_frequency(4700, 68000, 20e-12)
    assert astable_frequency(4700, 68000, 40e-12) == pytest.approx(f1 / 2, rel=1e-12)
    assert astable_frequency(4700, 68000, 10e-12) == pytest.approx(f1 * 2, rel=1e-12)


def test_eps0_codata() -> None:
    # CODATA 2018 recommended value; CODATA 2022 gives 8.8541878188e-12, 7e-10 away.
    assert EPS0 == pytest.approx(8.8541878128e-12, rel=1e-12)
    assert EPS0 == pytest.approx(8.8541878188e-12, rel=1e-9)


def test_sphere_and_plate_capacitance() -> None:
    # Isolated sphere C = 4 pi eps0 r [book: any electrostatics text]: r = 0.1 m -> 11.1265 pF.
    assert sphere_capacitance(0.1) == pytest.approx(11.1265e-12, abs=0.00005e-12)
    # Parallel plates C = eps0 A / d [book]: 10 cm x 10 cm at 1 mm -> 88.54 pF.
    assert plate_capacitance(0.1 * 0.1, 1e-3) == pytest.approx(88.54e-12, abs=0.005e-12)
    with pytest.raises(ConfigError):
        plate_capacitance(0.01, 0.0)


def test_hand_law_shape_and_playing_range() -> None:
    d = np.array([0.0, 0.01, 0.03, 0.1, 0.3, 0.5, 2.0, ABSENT])
    c = hand_capacitance(d, 2.0, 0.05, 1.5)
    assert c[0] == pytest.approx(2.0)  # bounded at contact
    assert np.all(np.diff(c) < 0)  # strictly falls with distance
    assert c[-1] == 0.0  # a gone hand adds nothing
    # Close in it goes as 1/d**alpha: halving d + d0 multiplies C_hand by 2**1.5.
    assert hand_capacitance(0.05, 1, 0.05, 1.5) / hand_capacitance(
        0.15, 1, 0.05, 1.5
    ) == pytest.approx(2**1.5)
    # The playing range (0.5 m .. 0.03 m) moves the oscillator by a few percent
    # [practice, DOMAIN.md section 1]: the defaults give 2..6 %.
    spec = SimSettings().channels[0]
    f_far = 1 / (1 + spec.hand_ratio(0.5))
    f_near = 1 / (1 + spec.hand_ratio(0.03))
    assert 0.02 < float(f_far - f_near) < 0.06


def test_channel_nominal_frequency_from_resistors() -> None:
    spec = ChannelSpec(name="p", hand="pitch", ra_ohm=1e3, rb_ohm=10e3, c_fixed_pf=100e3)
    # 100 nF as 100e3 pF: the DOMAIN.md worked value again, through the channel model.
    assert spec.nominal_hz() == pytest.approx(686.998, abs=5e-4)
    assert ChannelSpec(name="q", f_nominal_hz=5e5).nominal_hz() == 5e5
    with pytest.raises(ValidationError):
        ChannelSpec(name="r")  # no way to know its frequency


def test_ideal_position() -> None:
    pos = ideal_position(np.array([0.5, 0.265, 0.03, 0.01, 0.9, ABSENT]), 0.03, 0.5)
    assert pos.tolist() == pytest.approx([0.0, 0.5, 1.0, 1.0, 0.0, 0.0])
    assert distance_for_position(0.25, 0.03, 0.5) == pytest.approx(0.3825)


# --------------------------------------------------------------------------- the board


def test_counts_are_f_times_window() -> None:
    # A counting board reports N = f T, within one count [DOMAIN.md section 2].
    s = quiet(window_s=0.01)
    board = SimBoard(s, hold(0.1, 0.2, 100.0))
    values, truth = board.run(2000)
    spec = s.channels[0]
    f_expected = spec.nominal_hz() / (1 + float(spec.hand_ratio(0.1)))  # f = k / C
    assert truth.f_hz[:, 0] == pytest.approx(f_expected, rel=1e-12)
    assert np.all(np.abs(values[:, 0] - f_expected * 0.01) < 1.0)
    # Carried phase makes the mean exact to 1/n counts.
    assert values[:, 0].mean() == pytest.approx(f_expected * 0.01, abs=1.0 / 2000 + 1e-9)
    assert values[:, 1].mean() == pytest.approx(truth.f_hz[0, 1] * 0.01, abs=1.0 / 2000 + 1e-9)


def test_doubling_c_halves_the_counts() -> None:
    # f proportional to 1/C: a hand adding C_fixed again (contact, hand_pf = c_fixed_pf)
    # halves the frequency [book: astable formula].
    ch = [
        ChannelSpec(name="pitch", hand="pitch", f_nominal_hz=5e5, c_fixed_pf=20, hand_pf=20),
        ChannelSpec(name="volume", hand="volume", f_nominal_hz=4e5),
    ]
    away = SimBoard(quiet(channels=ch), hold(ABSENT, ABSENT, 10)).run(500)[0]
    touch = SimBoard(quiet(channels=ch), hold(0.0, ABSENT, 10)).run(500)[0]
    assert away[:, 0].mean() == pytest.approx(5000.0, abs=0.01)
    assert touch[:, 0].mean() == pytest.approx(2500.0, abs=0.01)
    assert touch[:, 1].mean() == pytest.approx(away[:, 1].mean(), abs=0.01)


def test_counter_carries_phase_between_windows() -> None:
    # A free-running counter sampled each window: the counts of any run of windows add up
    # to the cycles the oscillator made, within one count [DOMAIN.md section 2].
    s = quiet(
        window_s=0.001,
        noise=NoiseSettings(freq_ppm=200.0, phase_cycles=0.0),
        hum=HumSettings(ppm=500.0),
    )
    board = SimBoard(s, scenario("warmup", seed=2))
    p0 = board.phase_cycles
    total = np.zeros(2)
    for n in (1, 7, CHUNK, 3000, 5):
        values, _ = board.run(n)
        total += values.sum(axis=0)
        gained = board.phase_cycles - p0
        assert np.all(np.abs(total - gained) < 1.0)
    # Each single count is the floor or the ceiling of that window's cycles.
    board2 = SimBoard(s, scenario("warmup", seed=2))
    prev = board2.phase_cycles
    for _ in range(50):
        n_now = np.array(board2.next_values())
        now = board2.phase_cycles
        assert np.all(np.abs(n_now - (now - prev)) < 1.0)
        prev = now


@pytest.mark.parametrize("mains_hz", [50.0, 60.0])
def test_whole_mains_periods_reject_hum(mains_hz: float) -> None:
    # A window of whole mains periods integrates hum to zero [practice: line-cycle
    # integration, DOMAIN.md section 2]: 20 ms at 50 Hz, 16.67 ms at 60 Hz.
    hum = HumSettings(hz=mains_hz, ppm=2000.0, phase_rad=0.3)
    whole = SimBoard(quiet(window_s=1 / mains_hz, hum=hum), hold(0.2, 0.2, 60)).run(600)[0]
    part = SimBoard(quiet(window_s=0.75 / mains_hz, hum=hum), hold(0.2, 0.2, 60)).run(800)[0]
    # Whole periods: only the +-1 quantization is left.
    assert whole[:, 0].std() < 0.6
    assert np.ptp(whole[:, 0]) <= 1
    # Three quarters of a period: the hum shows, many counts peak to peak.
    assert part[:, 0].std() > 5 * whole[:, 0].std()
    assert part[:, 0].std() > 2.0


def test_frequency_noise_size() -> None:
    # White frequency noise of freq_ppm at 10 ms: count std = ppm * f T (quantization adds
    # ~0.3 counts, negligible next to 1000 ppm of 5000 counts = 5 counts).
    s = quiet(noise=NoiseSettings(freq_ppm=1000.0, phase_cycles=0.0), window_s=0.01)
    values, truth = SimBoard(s, hold(0.3, 0.3, 100)).run(8000)
    expected = 1e-3 * truth.f_hz[0, 0] * 0.01
    assert values[:, 0].std() == pytest.approx(expected, rel=0.1)


def test_gain_drift_reaches_the_reference_channel() -> None:
    # The oscillator gain drifts for all channels alike; a reference oscillator with no
    # antenna sees it too, and dividing by it cancels it [practice, DOMAIN.md section 3].
    s = quiet(
        with_reference=True,
        drift=DriftSettings(mode="ramp", c_fixed_percent=0.0, gain_percent=-1.0, duration_s=20.0),
    )
    values, truth = SimBoard(s, hold(0.1, 0.3, 30)).run(2000)  # 20 s at 10 ms
    start, end = values[:100].mean(axis=0), values[-100:].mean(axis=0)
    ratio = end / start
    assert ratio == pytest.approx([0.99, 0.99, 0.99], abs=0.0005)
    # The pitch channel normalised by the reference does not drift.
    norm = values[:, 0] / values[:, 2]
    assert norm[-100:].mean() == pytest.approx(norm[:100].mean(), rel=2e-5)
    assert truth.c[-1, 0] == pytest.approx(truth.c[0, 0])  # the hand's true c is unchanged


def test_c_fixed_drift_moves_antennas_more_than_reference() -> None:
    s = quiet(
        with_reference=True,
        drift=DriftSettings(
            mode="ramp", c_fixed_percent=1.0, gain_percent=0.0, duration_s=20.0, ref_fraction=0.1
        ),
    )
    values, truth = SimBoard(s, hold(ABSENT, ABSENT, 30)).run(2000)
    ratio = values[-100:].mean(axis=0) / values[:100].mean(axis=0)
    # f proportional to 1/C: +1 % C_fixed -> 1/1.01, the reference only 1/1.001.
    assert ratio == pytest.approx([1 / 1.01, 1 / 1.01, 1 / 1.001], abs=0.0005)
    assert np.all(truth.c == 0.0)  # no hand: drift is not a hand


def test_random_walk_drift_has_the_configured_size() -> None:
    # A random walk whose std after duration_s is c_fixed_percent: check over 30 channels.
    ch = [ChannelSpec(name=f"a{i}", hand="pitch", f_nominal_hz=1e5) for i in range(30)]
    s = quiet(
        channels=ch,
        window_s=0.01,
        drift=DriftSettings(mode="walk", c_fixed_percent=2.0, gain_percent=0.0, duration_s=10.0),
    )
    _, truth = SimBoard(s, hold(ABSENT, ABSENT, 20)).run(1000)
    rel = truth.f_hz[-1] / 1e5 - 1  # ~ -x for small x
    assert 0.012 < float(np.sqrt(np.mean(rel**2))) < 0.03


def test_period_board_reports_ticks_proportional_to_c() -> None:
    # A period board reports P proportional to C [DOMAIN.md section 2]; P = scale clk / f.
    ch = [
        ChannelSpec(name="pitch", hand="pitch", f_nominal_hz=5e5, c_fixed_pf=20, hand_pf=20),
        ChannelSpec(name="volume", hand="volume", f_nominal_hz=4e5),
    ]
    s = quiet(channels=ch, kind="period", clock_hz=48e6, period_scale=4096)
    board = SimBoard(s, hold(ABSENT, ABSENT, 10))
    assert board.nominal_values() == pytest.approx([4096 * 96.0, 4096 * 120.0])
    away = board.run(300)[0]
    touch = SimBoard(s, hold(0.0, ABSENT, 10)).run(300)[0]
    assert away[5:, 0].mean() == pytest.approx(4096 * 96.0, rel=1e-5)
    assert touch[5:, 0].mean() == pytest.approx(2 * 4096 * 96.0, rel=1e-5)


def test_reciprocal_counting_is_much_finer() -> None:
    # Timing whole periods with a 48 MHz clock resolves a tick, not a cycle: far finer than
    # counting over the same window [practice: reciprocal frequency counters, DOMAIN.md 2].
    kw = {"window_s": 0.01, "noise": NoiseSettings(freq_ppm=0.0, phase_cycles=0.0)}
    perf = hold(0.4, 0.4, 100)
    counts = SimBoard(quiet(**kw), perf).run(3000)[0][:, 0].astype(float)
    periods = SimBoard(quiet(kind="period", **kw), perf).run(3000)[0][5:, 0].astype(float)
    rel_count = counts.std() / counts.mean()
    rel_period = periods.std() / periods.mean()
    assert rel_count > 20 * rel_period


def test_reproducible_from_seed() -> None:
    s = SimSettings(seed=11, with_reference=True)
    a = SimBoard(s, scenario("comings-and-goings", seed=4)).run(3000)
    b = SimBoard(s, scenario("comings-and-goings", seed=4)).run(3000)
    assert np.array_equal(a[0], b[0])
    assert np.array_equal(a[1].d_pitch, b[1].d_pitch)
    c = SimBoard(SimSettings(seed=12, with_reference=True), scenario("comings-and-goings", seed=4))
    assert not np.array_equal(a[0], c.run(3000)[0])
    d = SimBoard(s, scenario("comings-and-goings", seed=5)).run(3000)
    assert not np.array_equal(a[1].d_pitch, d[1].d_pitch)  # the performance's own seed


def test_run_equals_repeated_next_values() -> None:
    s = SimSettings(seed=3, with_reference=True, kind="period")
    n = 2 * CHUNK + 300
    values, truth = SimBoard(s, scenario("warmup", seed=1)).run(n)
    board = SimBoard(s, scenario("warmup", seed=1))
    one_by_one = np.array([board.next_values() for _ in range(n)])
    assert np.array_equal(values, one_by_one)
    assert board.truth.t == pytest.approx(truth.t[-1])
    assert board.time == pytest.approx(n * 0.01)
    # Mixed reads: frames, a block across a chunk edge, frames again.
    mixed = SimBoard(s, scenario("warmup", seed=1))
    first = [mixed.next_values() for _ in range(10)]
    block = mixed.run(CHUNK)[0]
    rest = [mixed.next_values() for _ in range(5)]
    assert np.array_equal(np.vstack([first, block, rest]), values[: 15 + CHUNK])


def test_truth_follows_the_performance() -> None:
    s = quiet()
    perf = Performance(seed=0).silence(1.0).glide(2.0, pitch=0.03, volume=0.2, shape="linear")
    board = SimBoard(s, perf.leave(1.0))
    values, truth = board.run(400)
    assert np.all(np.isinf(truth.d_pitch[:100])) and not truth.present_pitch[:100].any()
    mid = 200  # t = 2.005 s, half way through the glide from 2 m to 0.03 m
    assert truth.d_pitch[mid] == pytest.approx(2.0 + (0.03 - 2.0) * (1.005 / 2.0))
    # t = 2.995 s, 5 ms before the glide ends: d = 2 - 1.97 * 1.995 / 2 m.
    assert truth.pos_pitch[299] == pytest.approx((0.5 - (2 - 1.97 * 1.995 / 2)) / 0.47)
    assert np.all(np.isinf(truth.d_pitch[-50:]))
    # Counts fall as the hand nears (the hand adds capacitance), rise as it leaves.
    assert values[299, 0] < values[50, 0] * 0.96
    assert values[-1, 0] == pytest.approx(values[50, 0], abs=2)


def test_vibrato_rate_and_depth() -> None:
    perf = (
        Performance(seed=0)
        .hold(0.5, pitch=0.2, volume=0.2)
        .vibrato(4.0, rate_hz=6.0, depth_m=0.004)
    )
    t = np.arange(0.5, 4.5, 0.001)
    dp, dv = perf.distances(t)
    core = dp[(t > 1.0) & (t < 4.0)] - 0.2
    assert np.max(np.abs(core)) == pytest.approx(0.004, rel=0.01)
    crossings = np.count_nonzero(np.diff(np.signbit(core)))
    assert crossings / 3.0 == pytest.approx(12.0, abs=0.4)  # 2 crossings per cycle at 6 Hz
    assert np.all(dv == 0.2)


def test_soundcheck_marks() -> None:
    perf = soundcheck(points=(0.4, 0.1), hold_s=2.0, move_s=0.5)
    labels = [m.label for m in perf.marks]
    assert labels == ["away", "far", "near", "mark-0.40", "mark-0.10"]
    for m in perf.marks[1:]:
        t = np.linspace(m.start + 0.1, m.end - 0.1, 50)
        dp, dv = perf.distances(t)
        assert np.allclose(dp, m.d_pitch, atol=0.001)  # tremor 0.3 mm at most
        assert np.allclose(dv, m.d_volume, atol=0.001)
    assert perf.marks[1].d_pitch == 0.5 and perf.marks[2].d_pitch == 0.03
    away = perf.marks[0]
    assert np.all(np.isinf(perf.distances(np.array([away.start, away.end - 0.01]))[0]))


def test_performance_end_loop_and_concatenation() -> None:
    a = Performance(seed=0).hold(1.0, pitch=0.1, volume=0.2)
    b = Performance(seed=0).glide(1.0, pitch=0.3).hold(1.0, label="rest")
    joined = a.then(b)
    assert joined.duration == pytest.approx(3.0)
    assert joined.marks[0].start == pytest.approx(2.0)
    assert joined.distances(10.0)[0][0] == pytest.approx(0.3)  # holds its end after the end
    looped = Performance(seed=0, loop=True).hold(1.0, pitch=0.1).hold(1.0, pitch=0.2)
    assert looped.distances(np.array([0.5, 1.5, 2.5, 3.5]))[0].tolist() == [0.1, 0.2, 0.1, 0.2]
    with pytest.raises(ConfigError):
        Performance().hold(0.0)
    with pytest.raises(ConfigError):
        scenario("no-such-scenario")


def test_wander_is_seeded_and_in_range() -> None:
    t = np.linspace(0.0, 10.0, 5000)
    a = Performance(seed=9).hold(0.1, pitch=0.3).wander(10.0, near=0.05, far=0.45)
    b = Performance(seed=9).hold(0.1, pitch=0.3).wander(10.0, near=0.05, far=0.45)
    da, db = a.distances(t)[0], b.distances(t)[0]
    assert np.array_equal(da, db)
    assert da[t > 1].min() >= 0.05 - 1e-12 and da.max() <= 0.45 + 1e-12
    assert np.ptp(da) > 0.1  # it does move


def test_text_bytes_decode_back() -> None:
    s = SimSettings(seed=8, with_reference=True, text_seq=True)
    ref = SimBoard(s, scenario("warmup"))
    board = SimBoard(s, scenario("warmup"))
    dec = TextDecoder(s.names, leading_seq=True, synced=True)
    got = []
    for _ in range(200):
        got += dec.feed(board.next_bytes())
    assert [f.values for f in got] == [ref.next_values() for _ in range(200)]
    assert [f.seq for f in got] == list(range(200))
    assert sum(dec.drops.values()) == 0


def test_named_text_and_binary_bytes_decode_back() -> None:
    named = SimBoard(SimSettings(seed=8, text_names=True), scenario("warmup"))
    line = named.next_bytes()
    assert line.startswith(b"pitch=") and b" volume=" in line
    frames = TextDecoder(["volume", "pitch"], synced=True).feed(line)  # names, any order
    plain = SimBoard(SimSettings(seed=8), scenario("warmup")).next_values()
    assert frames[0].values == [plain[1], plain[0]]
    s = SimSettings(seed=8, format="binary", kind="period")
    board, ref = SimBoard(s, scenario("soundcheck")), SimBoard(s, scenario("soundcheck"))
    dec = BinaryDecoder(2, synced=True)
    got = []
    for _ in range(100):
        got += dec.feed(board.next_bytes())
    assert [f.values for f in got] == [ref.next_values() for _ in range(100)]
    assert dec.drops["bad_crc"] == 0


def test_settings_reject_typos_and_clashes() -> None:
    with pytest.raises(ValidationError):
        SimSettings(windw_s=0.01)  # type: ignore[call-arg]
    with pytest.raises(ValidationError):
        SimSettings(with_reference=True, reference=ChannelSpec(name="pitch", f_nominal_hz=5e5))
    with pytest.raises(ValidationError):
        SimSettings(d_near_m=0.6)
    assert SimSettings(with_reference=True).names == ["pitch", "volume", "ref"]
    with pytest.raises(ConfigError):
        _ = SimBoard().truth  # no frame yet
    assert math.isfinite(SimBoard().nominal_values()[0])
