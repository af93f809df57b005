"""Tests for bridge/pipeline.py: frames of raw readings in, one reused Reading out.

The accuracy tests play the simulator (bridge/sim.py) through a calibration fitted by the
same soundcheck code a performer uses (bridge/soundcheck.py), and compare the pitch with
the ideal one: hand position linear in distance, mapped linearly to semitones over the
span (DOMAIN.md section 5). Tolerances come from the calibration's resolution report
(bridge/calibrate.py), not from what the code happened to produce.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from bridge.calibrate import ChannelCalibration, c_per_unit, resolution_report
from bridge.demo import demo_board_settings, demo_channels
from bridge.errors import ConfigError
from bridge.frames import MAX_VALUE
from bridge.mapping import LevelSettings, PitchMap, PitchSettings
from bridge.pipeline import ChannelSettings, Engine, Reading, VoiceSettings, check_layout
from bridge.sim import DriftSettings, Performance, SimBoard, SimSettings, Truth
from bridge.soundcheck import RigCalibration, fit_rig, simulated_holds

SPAN = 36.0  # semitones over the playing range (the PitchSettings default)
LOWEST = 48.0


def lead(**kw: object) -> VoiceSettings:
    return VoiceSettings(name="lead", pitch_channel="pitch", volume_channel="volume", **kw)


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def still() -> tuple[SimSettings, list[ChannelSettings], RigCalibration]:
    """The demo board with its slow random drift switched off, calibrated by a simulated
    soundcheck (away, far, near and marks at 0.25 m and 0.1 m).

    The default drift walks C_fixed by about 0.04 % over the ~20 s soundcheck, which moves
    the far end of the range by several percent of its small c: that is a property of the
    soundcheck, tested elsewhere, and would hide the pipeline's own accuracy here.
    """
    s = demo_board_settings().model_copy(update={"drift": DriftSettings(mode="off")})
    channels = demo_channels(s)
    holds = simulated_holds(s, [c.name for c in channels], seed=7, marks=(0.25, 0.1))
    return s, channels, fit_rig(channels, holds, rate_hz=1.0 / s.window_s)


def engine_for(
    channels: Sequence[ChannelSettings], cal: RigCalibration, voice: VoiceSettings, rate: float
) -> Engine:
    return Engine(channels, [voice], cal.channels, rate_hz=rate,
                  reference_base=cal.reference_base)


def play(
    engine: Engine, sim: SimSettings, perf: Performance, seed: int
) -> tuple[dict[str, np.ndarray], Truth]:
    """Every frame of ``perf`` through ``engine``; per-frame note, level, presence."""
    board = SimBoard(sim.model_copy(update={"seed": seed}), perf)
    n = int(round(perf.duration / sim.window_s))
    values, truth = board.run(n)
    out = {k: np.empty(n) for k in ("note", "level", "present", "position")}
    for i in range(n):
        r = engine.process(values[i].tolist(), i, i * sim.window_s)
        v = r.voices[0]
        out["note"][i], out["level"][i], out["present"][i] = v.note, v.level, v.present
        out["position"][i] = r.channels[0].position
    return out, truth


def cents_per_tick(cal: ChannelCalibration, p: float, span: float, h: float = 0.01) -> float:
    """Local cents per raw unit at position p: the resolution report's chain rule
    (cents per unit = 100 * span * dp/dc * dc/dN), evaluated at any position."""
    p0, p1 = max(p - h, 0.0), min(p + h, 1.0)
    dp_dc = (p1 - p0) / (cal.c_at(p1) - cal.c_at(p0))
    return 100.0 * span * dp_dc * c_per_unit(cal.c_at(p), cal.baseline, cal.kind)


# --------------------------------------------------------------------------- accuracy


def test_held_hand_plays_the_ideal_linear_in_distance_pitch(still) -> None:
    sim, channels, cal = still
    pcal = cal.channels["pitch"]
    report = resolution_report(pcal, window_s=sim.window_s, pitch_span_semitones=SPAN,
                               smoothing_cutoff_hz=0.5)
    # The local slope function must agree with the report at its three figures.
    for p, fig in ((0.0, report.cents_per_count_far), (0.5, report.cents_per_count_middle),
                   (1.0, report.cents_per_count_near)):
        assert cents_per_tick(pcal, p, SPAN) == pytest.approx(fig, rel=1e-6)
    # Smoothing keeps sqrt(alpha / (2 - alpha)) of white noise (one-pole low-pass at
    # 0.5 Hz, the SmoothingSettings default cutoff; the report's own formula).
    keep = report.pitch_noise_smoothed_cents / report.pitch_noise_cents

    distances = [0.45, 0.3, 0.2, 0.12, 0.06, 0.035]
    perf = Performance(11, tremor_m=0.0003).silence(1.0)
    for d in distances:
        perf.glide(0.5, pitch=d, volume=0.3).hold(3.0, label=f"at-{d}")
    engine = engine_for(channels, cal, lead(), 1.0 / sim.window_s)
    got, truth = play(engine, sim, perf, seed=99)
    pm = PitchMap(PitchSettings(lowest_note=LOWEST, span_semitones=SPAN))

    means = []
    for mark in perf.marks:
        i0 = int((mark.start + 1.5) / sim.window_s)  # 1.5 s for the smoothing to settle
        i1 = int(mark.end / sim.window_s)
        pos = truth.pos_pitch[i0:i1]
        ideal = np.array([pm.note(p) for p in pos])
        # The ideal is linear in distance: lowest + span * (d_far - d) / (d_far - d_near)
        # (DOMAIN.md section 5, "map calibrated hand position linearly to semitones").
        d_lin = LOWEST + SPAN * (sim.d_far_m - truth.d_pitch[i0:i1]) / (sim.d_far_m - sim.d_near_m)
        np.testing.assert_allclose(ideal, np.clip(d_lin, LOWEST, LOWEST + SPAN), atol=1e-9)
        err = (got["note"][i0:i1] - ideal) * 100.0
        rms = float(np.sqrt(np.mean(err**2)))
        p = float(np.mean(pos))
        sigma = pcal.noise * cents_per_tick(pcal, p, SPAN)  # raw pitch noise, cents RMS
        # Tolerance: half a noise unit of baseline offset (the tracker settles about a
        # quarter unit above the empty mean, baseline.py), three smoothed standard
        # deviations, the fit's own miss at its points, and 3 cents for the 0.3 mm
        # tremor (about 2.3 cents at 13 mm a semitone) -- about the pitch JND of
        # 3.5 cents (Hill & Summers, JASA 121(4), 2007).
        tol = sigma * (0.5 + 3.0 * keep) + pcal.fit_error * SPAN * 100.0 + 3.0
        assert got["present"][i0:i1].all(), mark.label
        assert rms <= tol, f"{mark.label}: pitch error {rms:.1f} cents RMS > {tol:.1f}"
        means.append(float(np.mean(got["note"][i0:i1])))
    # Nearer is higher, by the intervals the distances ask for.
    assert means == sorted(means)


def test_level_is_zero_while_the_pitch_hand_is_away(still) -> None:
    sim, channels, cal = still
    perf = (Performance(5, tremor_m=0.0003).silence(1.0)
            .glide(0.4, pitch=0.2, volume=0.3).hold(2.0)
            .leave(2.5, "pitch"))  # the volume hand stays at 0.3 m
    held = slice(int(2.0 / sim.window_s), int(3.4 / sim.window_s))
    gone = slice(int(4.5 / sim.window_s), int(perf.duration / sim.window_s))

    quiet, _ = play(engine_for(channels, cal, lead(), 100.0), sim, perf, seed=21)
    assert quiet["present"][held].all() and (quiet["level"][held] > 0.0).all()
    assert not quiet["present"][gone].any()
    assert (quiet["level"][gone] == 0.0).all()  # sound_without_hand False: silence

    # The contrast that shows the test can fail: with sound_without_hand the voice keeps
    # sounding at the volume hand's level.
    drone, _ = play(engine_for(channels, cal, lead(sound_without_hand=True), 100.0),
                    sim, perf, seed=21)
    assert (drone["level"][gone] > 0.0).all()
    assert np.allclose(drone["note"][gone], LOWEST)


def test_reference_channel_cancels_one_percent_gain_drift(still) -> None:
    sim, channels, cal = still
    # Every oscillator's gain (supply, timing resistors) ramps by 1 % over 12 s, while the
    # hand holds still from 1.4 s on, so the frozen baseline cannot follow.
    drifting = sim.model_copy(update={"drift": DriftSettings(
        mode="ramp", gain_percent=1.0, c_fixed_percent=0.0, duration_s=12.0)})
    perf = Performance(2, tremor_m=0.0003).silence(1.0).glide(0.4, pitch=0.12,
                                                              volume=0.3).hold(10.6)
    last = slice(int(10.0 / sim.window_s), int(12.0 / sim.window_s))

    with_ref, truth = play(engine_for(channels, cal, lead(), 100.0), drifting, perf, seed=4)
    no_ref_channels = [c if c.role != "reference" else c.model_copy(update={"role": "unused"})
                       for c in channels]
    no_ref_engine = Engine(no_ref_channels, [lead()], cal.channels, rate_hz=100.0)
    without, _ = play(no_ref_engine, drifting, perf, seed=4)

    ideal = LOWEST + SPAN * truth.pos_pitch[last]
    err_ref = float(np.sqrt(np.mean(((with_ref["note"][last] - ideal) * 100.0) ** 2)))
    err_raw = float(np.sqrt(np.mean(((without["note"][last] - ideal) * 100.0) ** 2)))
    pcal = cal.channels["pitch"]
    sigma = pcal.noise * cents_per_tick(pcal, float(np.mean(truth.pos_pitch[last])), SPAN)
    # 1 % gain moves a period reading by 1 %, c by about 0.01: a fifth of the whole
    # playing range (the range moves the oscillator ~4.5 %, sim.py). Uncorrected, that
    # is semitones of error; the reference (baseline.py ReferenceCorrector) divides it out.
    assert err_raw > 300.0
    assert err_ref < sigma + 5.0, f"{err_ref:.1f} cents with the reference channel"
    assert with_ref["present"][last].all()


# --------------------------------------------------------------------------- robustness

_SPECIAL = [0, 1, 2, MAX_VALUE, MAX_VALUE - 1, 383_490, 405_322, 421_590]


def _value() -> st.SearchStrategy[float]:
    return st.one_of(
        st.sampled_from(_SPECIAL),
        st.integers(0, MAX_VALUE),
        st.integers(370_000, 440_000),  # around the demo board's readings
        st.sampled_from([math.nan, math.inf, -math.inf, -1.0, 1e300, 5e-324]),
    )


@pytest.fixture(scope="module")
def count_rig() -> tuple[SimSettings, list[ChannelSettings], RigCalibration]:
    s = SimSettings(seed=3, kind="count", with_reference=True)
    channels = demo_channels(s)
    holds = simulated_holds(s, [c.name for c in channels], seed=3)
    return s, channels, fit_rig(channels, holds, rate_hz=1.0 / s.window_s)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    frames=st.lists(st.tuples(_value(), _value(), _value()), min_size=1, max_size=40),
    always=st.booleans(),
    which=st.sampled_from(["period", "count"]),
)
def test_any_values_give_finite_in_range_notes_and_levels(
    demo_cal, count_rig, frames: list[tuple[float, float, float]], always: bool, which: str
) -> None:
    # Values the decoder can deliver (0 .. 2**32-1), plus what a direct caller might pass
    # (NaN, infinities, negatives, denormals): none may leak out as a wild note or level.
    channels, cal = (demo_cal.channels, demo_cal.calibration) if which == "period" else (
        count_rig[1], count_rig[2])
    level = LevelSettings(ceiling=0.8)
    voice = lead(level=level, sound_without_hand=always,
                 pitch=PitchSettings(lowest_note=40.0, span_semitones=48.0))
    engine = engine_for(channels, cal, voice, 100.0)
    for i, values in enumerate(frames):
        r = engine.process(values, i, i * 0.01)
        v = r.voices[0]
        assert math.isfinite(v.note) and 40.0 <= v.note <= 88.0
        assert math.isfinite(v.hz) and v.hz > 0.0
        assert math.isfinite(v.level) and 0.0 <= v.level <= 0.8
        for ch in r.channels:
            assert 0.0 <= ch.position <= 1.0
            assert math.isfinite(ch.baseline) and ch.baseline > 0.0


# --------------------------------------------------------------------------- layout


def _channels(*spec: tuple[str, str]) -> list[ChannelSettings]:
    return [ChannelSettings(name=n, role=r) for n, r in spec]  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("channels", "voice", "needle"),
    [
        (_channels(("pitch", "pitch"), ("volume", "volume")),
         VoiceSettings(pitch_channel="ptich", volume_channel="volume"),
         ["voices[0].pitch_channel", "'ptich'"]),
        (_channels(("pitch", "pitch"), ("volume", "volume")),
         VoiceSettings(pitch_channel="pitch", volume_channel="loudness"),
         ["voices[0].volume_channel", "'loudness'"]),
        (_channels(("pitch", "pitch"), ("volume", "volume")),
         VoiceSettings(pitch_channel="pitch", volume_channel="pitch"),
         ["voices[0].volume_channel", "role 'pitch'", "expected 'volume'"]),
        (_channels(("pitch", "pitch"), ("ref", "reference")),
         VoiceSettings(pitch_channel="ref"),
         ["voices[0].pitch_channel", "role 'reference'", "expected 'pitch'"]),
        (_channels(("pitch", "pitch"), ("volume", "volume"), ("pitch", "unused")),
         VoiceSettings(pitch_channel="pitch"),
         ["unique", "pitch"]),
        (_channels(("pitch", "pitch"), ("r1", "reference"), ("r2", "reference")),
         VoiceSettings(pitch_channel="pitch"),
         ["reference"]),
    ],
    ids=["unknown-pitch", "unknown-volume", "volume-is-pitch", "pitch-is-reference",
         "duplicate", "two-references"],
)
def test_check_layout_names_the_field(
    channels: list[ChannelSettings], voice: VoiceSettings, needle: list[str]
) -> None:
    with pytest.raises(ConfigError) as e:
        check_layout(channels, [voice])
    for n in needle:
        assert n in str(e.value)
    # The engine refuses the same layout before building anything.
    with pytest.raises(ConfigError):
        Engine(channels, [voice], {}, rate_hz=100.0)


def test_check_layout_names_the_second_voice() -> None:
    channels = _channels(("p1", "pitch"), ("p2", "pitch"))
    voices = [VoiceSettings(name="a", pitch_channel="p1"),
              VoiceSettings(name="b", pitch_channel="p3")]
    with pytest.raises(ConfigError, match=r"voices\[1\]\.pitch_channel"):
        check_layout(channels, voices)
    check_layout(channels, voices[:1])  # the valid part alone passes
    with pytest.raises(ConfigError, match="at least one voice"):
        check_layout(channels, [])


def test_engine_names_a_missing_or_mismatched_calibration(demo_cal) -> None:
    channels, cal = demo_cal.channels, demo_cal.calibration
    without_volume = {"pitch": cal.channels["pitch"]}
    with pytest.raises(ConfigError, match="'volume'"):
        Engine(channels, [lead()], without_volume, rate_hz=100.0)
    counts = [c.model_copy(update={"kind": "count"}) for c in channels]
    with pytest.raises(ConfigError, match="'pitch' reports counts"):
        Engine(counts, [lead()], cal.channels, rate_hz=100.0)
    for bad in (0.0, -5.0, math.nan, math.inf):
        with pytest.raises(ConfigError, match="frame rate"):
            Engine(channels, [lead()], cal.channels, rate_hz=bad)


@pytest.mark.parametrize("bad", ["1pitch", "pi tch", "", "p" * 33, "pitch!"])
def test_channel_names_are_checked_by_the_settings_model(bad: str) -> None:
    with pytest.raises(ValidationError) as e:
        ChannelSettings(name=bad)
    assert e.value.errors()[0]["loc"] == ("name",)
    with pytest.raises(ValidationError) as e2:
        ChannelSettings(name="pitch", rolle="pitch")  # type: ignore[call-arg]
    assert e2.value.errors()[0]["loc"] == ("rolle",)


# --------------------------------------------------------------------------- reuse


def test_reading_and_views_are_reused_every_frame(demo_cal) -> None:
    engine = engine_for(demo_cal.channels, demo_cal.calibration, lead(), 100.0)
    board = SimBoard(demo_cal.sim.model_copy(update={"seed": 1}),
                     Performance(0).glide(0.5, pitch=0.1, volume=0.2).hold(1.0))
    first = engine.process(board.next_values(), 0, 0.0)
    chans, voices = list(first.channels), list(first.voices)
    ids = [id(x) for x in (*chans, *voices)]
    seen = []
    for k in range(1, 60):
        r = engine.process(board.next_values(), k, k * 0.01)
        assert r is first and isinstance(r, Reading)
        assert [id(x) for x in (*r.channels, *r.voices)] == ids
        seen.append(r.channels[0].raw)
        assert r.seq == k and r.frame == k + 1
    assert len(set(seen)) > 1  # updated in place, not frozen
    with pytest.raises(ValueError, match="expected 3 values"):
        engine.process([1, 2], 0, 0.0)
