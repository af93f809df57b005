"""Tests for bridge/humfilter.py: cancelling mains hum without touching the hand signal.

Spectra are measured with numpy's FFT (the reference), over windows that hold a whole
number of cycles of every tone, so each tone sits on one bin. The canceller is the
adaptive noise canceller with a sinusoidal reference (Widrow et al., "Adaptive noise
cancelling: principles and applications", Proc. IEEE 63(12), 1975): after convergence
it removes the component correlated with the reference and, as a narrow notch, leaves
other frequencies as they were.
"""

from __future__ import annotations

import math
import shutil
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from bridge.commands import setup_for
from bridge.demo import demo_channels
from bridge.errors import ConfigError
from bridge.humfilter import (
    HumCanceller,
    MainsFilterSettings,
    MainsReference,
    alias_hz,
    make_cancellers,
)
from bridge.pipeline import ChannelSettings, Engine, VoiceSettings
from bridge.profiles import Store, load_rig
from bridge.sim import DriftSettings, HumSettings, Performance, SimBoard, SimSettings
from bridge.soundcheck import RigCalibration, fit_rig, simulated_holds

RATE = 1000.0
LEVEL = 350_000.0  # a period reading: 48 MHz ticks of ~555 kHz scaled by 4096, roughly
HUM = 35.0  # 100 ppm of it, the simulator's default hum
EXAMPLES = Path(__file__).resolve().parent.parent / "profiles"

FastRig = tuple[SimSettings, list[ChannelSettings], VoiceSettings, RigCalibration]


def run(freqs: list[float], x: np.ndarray, tau: float = 0.5, rate: float = RATE) -> np.ndarray:
    """Every sample of ``x`` through one canceller; the outputs."""
    ref = MainsReference(freqs, rate)
    hum = HumCanceller(ref, tau)
    out = np.empty(len(x))
    for i, v in enumerate(x.tolist()):
        ref.advance()
        out[i] = hum.clean(v)
    return out


def tone(f: float, n: int, amp: float = HUM, phase: float = 0.7, rate: float = RATE) -> np.ndarray:
    return amp * np.sin(2.0 * np.pi * f * np.arange(n) / rate + phase)


def bin_amp(x: np.ndarray, f: float, rate: float = RATE) -> float:
    """Amplitude of the tone at ``f`` (numpy rfft; the window holds whole cycles of it)."""
    k = f * len(x) / rate
    assert abs(k - round(k)) < 1e-9, "the window must hold a whole number of cycles"
    return float(abs(np.fft.rfft(x - np.mean(x))[round(k)]) * 2.0 / len(x))


def db(ratio: float) -> float:
    return 20.0 * math.log10(max(ratio, 1e-300))  # an exact zero counts as very low


# --------------------------------------------------------------------------- the canceller


def test_pure_50hz_sinusoid_on_a_constant_is_cancelled_by_more_than_30_db() -> None:
    n = int(6 * RATE)
    x = LEVEL + tone(50.0, n)
    y = run([50.0], x)
    last = slice(n - int(2 * RATE), n)  # after 8 time constants
    # numpy FFT as reference: the 50 Hz bin of the output against that of the input.
    assert db(bin_amp(y[last], 50.0) / bin_amp(x[last], 50.0)) < -30.0
    # The constant is the hand's level, not hum: it passes (mean by numpy).
    assert np.mean(y[last]) == pytest.approx(LEVEL, rel=1e-9)


def test_hum_in_noise_is_cancelled_and_other_frequencies_pass_unchanged() -> None:
    rng = np.random.default_rng(3)
    n = int(10 * RATE)
    noise = HUM * rng.standard_normal(n)  # as much noise as hum, as on a 1 ms board
    hand = 20.0 * HUM * np.sin(2.0 * np.pi * 5.5 * np.arange(n) / RATE)  # a vibrato
    x = LEVEL + hand + noise + tone(50.0, n)
    y = run([50.0], x, tau=1.0)
    last = slice(n - int(4 * RATE), n)
    residual = (y - LEVEL - hand - noise)[last]
    # LMS theory (Widrow et al. 1975): the estimate's noise is about sigma*sqrt(g) per
    # amplitude, here 3 % of the hum: the residual is far under a tenth of the hum.
    assert db(np.std(residual) / (HUM / math.sqrt(2.0))) < -20.0
    # The vibrato passes as a narrow notch at 50 Hz leaves 5.5 Hz: gain and phase from
    # numpy's FFT, within 2 % and 1 degree.
    k = round(5.5 * 4)
    gain = np.fft.rfft(y[last] - LEVEL)[k] / np.fft.rfft(x[last] - LEVEL)[k]
    assert abs(gain) == pytest.approx(1.0, abs=0.02)
    assert abs(math.degrees(np.angle(gain))) < 1.0


def test_a_step_passes_in_the_same_frame() -> None:
    n = int(6 * RATE)
    k = int(4 * RATE) + 7
    step = 50.0 * HUM  # a hand move: much larger than the hum
    level = np.full(n, LEVEL)
    level[k:] += step
    y = run([50.0], level + tone(50.0, n))
    # The output is the reading minus a sinusoid fixed by earlier frames: the step is all
    # there in frame k (none of it in k - 1), so the canceller adds no delay.
    assert y[k - 1] == pytest.approx(LEVEL, abs=0.01 * HUM)
    assert y[k] - y[k - 1] == pytest.approx(step, rel=1e-3)
    # The step's own 50 Hz content moves the estimate only a little: the clipped update.
    assert np.max(np.abs(y[k:] - level[k:])) < 0.2 * HUM


def test_60hz_setting_cancels_60hz_and_leaves_50hz() -> None:
    n = int(6 * RATE)
    hum60, other = tone(60.0, n), tone(50.0, n, amp=HUM / 2, phase=0.1)
    x = LEVEL + hum60 + other
    y = run([60.0], x)
    last = slice(n - int(1 * RATE), n)  # 1 s: whole cycles of 50 and 60 Hz
    assert db(bin_amp(y[last], 60.0) / bin_amp(x[last], 60.0)) < -30.0  # numpy FFT
    assert bin_amp(y[last], 50.0) == pytest.approx(bin_amp(x[last], 50.0), rel=0.01)
    assert MainsFilterSettings(mains_hz=60).frequencies(RATE) == [60.0]


def test_harmonics_are_cancelled_only_when_asked_for() -> None:
    n = int(6 * RATE)
    x = LEVEL + tone(50.0, n) + tone(100.0, n, HUM / 3, 1.1) + tone(150.0, n, HUM / 2, 2.0)
    last = slice(n - int(1 * RATE), n)
    three = MainsFilterSettings(mains_hz=50, harmonics=3).frequencies(RATE)
    assert three == [50.0, 100.0, 150.0]
    y3 = run(three, x)
    y1 = run([50.0], x)
    for f in (50.0, 100.0, 150.0):  # numpy FFT, bin by bin
        assert db(bin_amp(y3[last], f) / bin_amp(x[last], f)) < -30.0
    assert db(bin_amp(y1[last], 50.0) / bin_amp(x[last], 50.0)) < -30.0
    assert bin_amp(y1[last], 150.0) == pytest.approx(bin_amp(x[last], 150.0), rel=0.01)


def test_hum_at_the_nyquist_frequency_is_cancelled() -> None:
    # 100 frames/s with 10 ms windows: half a mains period, so the window does not reject
    # 50 Hz, which samples as +-A, -+A, ... (Nyquist-Shannon: 50 Hz is rate/2 here).
    rate = 100.0
    assert alias_hz(50.0, rate) == 50.0
    n = int(20 * rate)
    x = LEVEL + HUM * np.cos(np.pi * np.arange(n) + 0.3)
    y = run(MainsFilterSettings(mains_hz=50).frequencies(rate), x, rate=rate)
    last = slice(n - int(2 * rate), n)
    assert db(np.std(y[last]) / np.std(x[last])) < -30.0


@pytest.mark.parametrize(("f", "rate"), [(50.0, 1000.0), (60.0, 1000.0), (50.0, 100.0)])
def test_the_hum_left_decays_with_the_set_time_constant(f: float, rate: float) -> None:
    # Widrow et al. 1975: with a sinusoidal reference the LMS error decays exponentially;
    # the step is scaled so that its time constant is time_constant_s (here 2 s), also
    # at 50 Hz sampled 100 times a second (the Nyquist frequency, where the sine is 0).
    tau = 2.0
    n = int(4 * rate)
    x = LEVEL + HUM * np.cos(2.0 * np.pi * f * np.arange(n) / rate + 0.4)
    y = run([f], x, tau=tau, rate=rate)
    w = int(0.1 * rate)  # 5 or 6 whole cycles

    def left(t: float) -> float:
        i = int(t * rate)
        return float(np.std(y[i : i + w]))

    measured = 2.0 / math.log(left(1.0) / left(3.0))  # seconds, from 1 s to 3 s
    assert measured == pytest.approx(tau, rel=0.1)


def test_a_phasor_knocked_off_the_unit_circle_returns_to_it() -> None:
    ref = MainsReference([50.0], RATE)
    ref.cos[0], ref.sin[0] = 1.2, 0.1  # as if rounding had piled up
    ref.advance(50)
    assert math.hypot(ref.cos[0], ref.sin[0]) == pytest.approx(1.0, abs=1e-12)


def test_hum_appearing_after_a_perfectly_steady_stretch_is_learnt() -> None:
    # A reading with no noise at all must not leave the canceller unable to learn.
    n = int(10 * RATE)
    x = np.full(n, LEVEL)
    x[int(5 * RATE) :] += tone(50.0, n - int(5 * RATE))
    y = run([50.0], x)
    last = slice(n - int(1 * RATE), n)
    assert db(bin_amp(y[last], 50.0) / bin_amp(x[last], 50.0)) < -30.0


def test_reference_phasor_stays_on_the_unit_circle_and_in_phase() -> None:
    ref = MainsReference([50.0, 150.0], RATE)
    n = 200_000  # 200 s of frames, 10 million turns of the rotation
    ref.advance(n - 3)
    ref.advance()
    ref.advance(2)
    for i, f in enumerate((50.0, 150.0)):
        # math.cos / math.sin as reference for the angle 2 pi f n / rate.
        w = 2.0 * math.pi * math.fmod(f * n / RATE, 1.0)
        assert ref.cos[i] == pytest.approx(math.cos(w), abs=1e-6)
        assert ref.sin[i] == pytest.approx(math.sin(w), abs=1e-6)


finite = st.floats(allow_nan=True, allow_infinity=True)


@settings(max_examples=60, deadline=None)
@given(junk=st.lists(finite, min_size=1, max_size=40))
def test_any_input_leaves_the_output_finite_and_learning_goes_on(junk: list[float]) -> None:
    ref = MainsReference([50.0], RATE)
    hum = HumCanceller(ref, 0.1)
    n = int(1.5 * RATE)
    clean = (LEVEL + tone(50.0, n)).tolist()
    for v in clean[:200] + junk + clean[200:]:
        ref.advance()
        y = hum.clean(v)
        if math.isfinite(v):
            assert math.isfinite(y)
        else:
            assert y == v or (math.isnan(y) and math.isnan(v))  # passed on unchanged
    assert all(math.isfinite(a) for a in hum.amplitudes)


def test_settings_are_checked() -> None:
    with pytest.raises(ValidationError):
        MainsFilterSettings(mains_hz=55)  # type: ignore[arg-type]
    with pytest.raises(ValidationError):
        MainsFilterSettings(harmonics=0)
    with pytest.raises(ValidationError):
        MainsFilterSettings(time_constant_s=math.inf)
    with pytest.raises(ValidationError):
        MainsFilterSettings(enable=True)  # type: ignore[call-arg]  # a typo is named


# --------------------------------------------------------------------------- when it runs


def test_auto_runs_only_where_the_window_lets_hum_through() -> None:
    auto = MainsFilterSettings()
    assert auto.frequencies(RATE) == []  # no mains frequency known
    fifty = auto.with_board_mains(50)
    assert fifty.frequencies(RATE) == [50.0]  # 1 ms windows let 50 Hz through
    # DOMAIN.md section 2 (line-cycle integration, common practice): 20 ms rejects 50 Hz,
    # 16.67 ms 60 Hz, 100 ms both; there the canceller stays off.
    assert fifty.frequencies(50.0) == []
    assert fifty.frequencies(10.0) == []
    assert auto.with_board_mains(60).frequencies(1.0 / (1.0 / 60.0)) == []
    assert auto.with_board_mains(60).frequencies(100.0) == [60.0]  # 10 ms: not whole periods
    # Forced on it runs wherever hum shows as a tone; a window of whole periods samples
    # it at 0 Hz (rate = mains / k), which is no tone, so even forced on it stays off.
    assert MainsFilterSettings(enabled=True, mains_hz=50).frequencies(RATE) == [50.0]
    assert MainsFilterSettings(enabled=True, mains_hz=50).frequencies(50.0) == []
    assert MainsFilterSettings(enabled=False, mains_hz=50).frequencies(RATE) == []
    # The rig's own mains_hz wins over the board's.
    assert MainsFilterSettings(mains_hz=60).with_board_mains(50).mains_hz == 60


def test_forced_on_without_a_mains_frequency_says_what_to_set() -> None:
    with pytest.raises(ConfigError, match="mains_hz"):
        MainsFilterSettings(enabled=True).frequencies(RATE)


def test_harmonics_that_alias_into_the_hand_band_or_onto_each_other_are_left_out() -> None:
    # Sampling at rate r shows f at |f - m r| (Nyquist-Shannon, textbook).
    assert alias_hz(60.0, 100.0) == pytest.approx(40.0)
    assert alias_hz(100.0, 100.0) == pytest.approx(0.0)
    assert alias_hz(150.0, 100.0) == pytest.approx(50.0)
    # At 100 frames/s: 50 Hz stays (Nyquist), 100 Hz lands on 0 Hz (the hand's band),
    # 150 Hz lands on 50 Hz again (the same component).
    s = MainsFilterSettings(mains_hz=50, harmonics=3)
    assert s.frequencies(100.0) == [50.0]
    # At 52 frames/s the fundamental itself shows at 2 Hz: nothing can be cancelled.
    assert MainsFilterSettings(mains_hz=50).frequencies(52.0) == []


def test_disabled_settings_make_no_canceller() -> None:
    ref, hums = make_cancellers(MainsFilterSettings(enabled=False, mains_hz=50), RATE, 2)
    assert ref is None and hums == []


# --------------------------------------------------------------------------- in the engine


@pytest.fixture(scope="module")
def fast_rig() -> FastRig:
    """A period board at 1000 frames/s (1 ms windows), drift off, calibrated by a
    simulated soundcheck; hum at the simulator's default 100 ppm and 50 Hz."""
    s = SimSettings(kind="period", window_s=0.001, drift=DriftSettings(mode="off"), seed=11)
    channels = demo_channels(s)
    holds = simulated_holds(s, [c.name for c in channels], seed=11, marks=(0.15,), hold_s=1.0)
    cal = fit_rig(channels, holds, rate_hz=RATE)
    voice = VoiceSettings(pitch_channel="pitch", volume_channel="volume")
    return s, channels, voice, cal


def _positions(rig: FastRig, sim: SimSettings, mains: MainsFilterSettings | None) -> np.ndarray:
    s, channels, voice, cal = rig
    perf = Performance(seed=5).silence(0.3).glide(0.2, pitch=0.2, volume=0.25).hold(3.5)
    n = round(perf.duration / sim.window_s)
    values, _ = SimBoard(sim.model_copy(update={"seed": 99}), perf).run(n)
    eng = Engine(channels, [voice], cal.channels, rate_hz=RATE, mains_filter=mains)
    pos = np.empty(n)
    for i, row in enumerate(values.tolist()):
        pos[i] = eng.process(row, seq=i).channels[0].position
    return pos


def test_engine_removes_the_simulators_hum(fast_rig: FastRig) -> None:
    s = fast_rig[0]
    quiet = s.model_copy(update={"hum": HumSettings(ppm=0.0)})
    on = MainsFilterSettings().with_board_mains(50)
    # The simulator draws the same noise with or without hum (same seed), so the board
    # with no hum is the exact target and the difference is the hum alone.
    target = _positions(fast_rig, quiet, MainsFilterSettings(enabled=False))
    raw = _positions(fast_rig, s, MainsFilterSettings(enabled=False))
    cleaned = _positions(fast_rig, s, on)
    last = slice(len(target) - 2000, len(target))
    hum_left = np.std((cleaned - target)[last]) / np.std((raw - target)[last])
    assert db(hum_left) < -15.0
    # On a board with no hum the canceller changes next to nothing (a tenth of the noise).
    idle = _positions(fast_rig, quiet, on)
    assert np.std((idle - target)[last]) < 0.1 * np.std(target[last])


def test_engine_follows_the_mains_phase_across_lost_frames(fast_rig: FastRig) -> None:
    s = fast_rig[0]
    n = round(4.0 / s.window_s)
    drop = set(range(3, n, 97))  # frames lost on the link, about 1 %
    seqs = list(range(n))
    keep = [i for i in range(n) if i not in drop]

    def run_kept(with_seq: bool) -> float:
        _, channels, voice, cal = fast_rig
        perf = Performance(seed=5).silence(0.3).glide(0.2, pitch=0.2, volume=0.25).hold(3.5)
        values, _ = SimBoard(s.model_copy(update={"seed": 99}), perf).run(n)
        on = MainsFilterSettings().with_board_mains(50)
        eng = Engine(channels, [voice], cal.channels, rate_hz=RATE, mains_filter=on)
        rows = values.tolist()
        pos = []
        for i in keep:
            r = eng.process(rows[i], seq=seqs[i] if with_seq else None)
            pos.append(r.channels[0].position)
        t = np.array(keep[-1500:]) / RATE
        p = np.array(pos[-1500:])
        # 50 Hz content by correlation with the true mains phase (numpy as reference).
        return float(abs(np.mean((p - p.mean()) * np.exp(-2j * np.pi * 50.0 * t))))

    # With sequence numbers the canceller's phase skips the lost frames; without them it
    # slips 18 degrees at each loss and the hum comes back in part.
    assert run_kept(True) < 0.5 * run_kept(False)


def test_engine_without_the_setting_is_unchanged(fast_rig: FastRig) -> None:
    s = fast_rig[0]
    a = _positions(fast_rig, s, None)
    b = _positions(fast_rig, s, MainsFilterSettings(enabled=False, mains_hz=50))
    assert np.array_equal(a, b)


# --------------------------------------------------------------------------- rig and setup


def test_rig_file_setting_reaches_the_daemon_setup(tmp_path: Path) -> None:
    root = tmp_path / "store"
    (root / "venues").mkdir(parents=True)
    text = (EXAMPLES / "rig.toml").read_text()
    text = text.replace('enabled = "auto"', 'enabled = "auto"\nharmonics = 3\ntime_constant_s = 0.8', 1)
    (root / "rig.toml").write_text(text)
    for p in sorted((EXAMPLES / "venues").glob("*.toml")):
        shutil.copy(p, root / "venues" / p.name)
    rig = load_rig(root / "rig.toml")
    assert rig.mains_filter.harmonics == 3 and rig.mains_filter.mains_hz is None
    venue = sorted(p.stem for p in (root / "venues").glob("*.toml"))[0]
    setup = setup_for(Store(root), venue)
    mf = setup.mains_filter
    assert (mf.mains_hz, mf.harmonics, mf.time_constant_s) == (rig.board.mains_hz, 3, 0.8)
    # The example board counts over 20 ms at 50 Hz mains: whole periods, so auto stays off.
    assert rig.board.window_s == 0.02 and mf.frequencies(setup.rate_hz) == []
    setup.engine()  # builds


def test_rig_file_names_a_misspelt_key(tmp_path: Path) -> None:
    text = (EXAMPLES / "rig.toml").read_text().replace(
        'enabled = "auto"', 'enabled = "auto"\nharmonic = 3', 1)
    path = tmp_path / "rig.toml"
    path.write_text(text)
    with pytest.raises(ConfigError, match="harmonic"):
        load_rig(path)
