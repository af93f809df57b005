#!/usr/bin/env python3
"""Signal quality of the pipeline against the simulator's ground truth.

The simulator knows where the hand really was, so every figure here is the pipeline's
output note compared with the note a perfect instrument would play: the ideal position
(linear in distance, 0 far, 1 near) mapped linearly over the pitch span (default 36
semitones from note 48, so one position unit is 3600 cents). Every board is calibrated
the way a performer would do it: a simulated soundcheck (away, far, near and one mark at
0.15 m, the "3-point capture"), then played with its own noise seed. The engine cancels
the simulator's 50 Hz hum as a rig file with ``board.mains_hz = 50`` does (a 1 ms window
cannot reject it; bridge/humfilter.py).

Main configuration: a period-timing board (reciprocal counting, 48 MHz timer) at 1000
frames a second (1 ms windows). The pulse-counting board at 1 ms is shown beside it:
about 512 counts a window, so one count is 0.2 % of the reading, more than half the
whole change a hand makes at the far end of the range. That coarseness is the physics
of counting for 1 ms (DOMAIN.md section 2), not a flaw of the pipeline.

Figures (``name: value unit``, goals from the "Foundation and signal core" issue):

``pitch_noise``     a still hand at mid-range, tremor off: RMS of the output note about
                    its mean over the last 4 s of a 6 s hold (cents); beside it the
                    same with the hum canceller off.
``lag``             5-semitone moves made in 50 ms (raised cosine) between positions
                    0.43 and 0.57, after 1.5 s still: delay from the input crossing the
                    midpoint of the move to the output crossing it (ms, mean of all
                    moves), and the extra 10-90 % rise time of output over input.
                    Both times are window-centre times: add half a window and the
                    transport for the delay a listener would measure.
``linearity``       19 slow holds at positions 0.05 .. 0.95: worst difference between
                    the mean output note of a hold's steady second and the ideal note
                    (cents); beside it the same for a naive mapping linear in the raw
                    reading between the far and near holds.
``drift``           a 20-minute set with the oscillator gain drifting +1 % (ramp) and the
                    antennas' fixed capacitance +0.2 %, at 100 frames a second (the drift
                    does not depend on the frame rate, the runtime does): mean absolute
                    pitch error over the steady part of every hold (from 0.5 s after the
                    hand stops to the end of the hold), with no tracking (baseline frozen
                    at the soundcheck's), with baseline tracking alone and with the
                    reference oscillator; as the floor, the same set with no drift; and
                    the "bound": what a perfect tracker would leave, one that knew the
                    exact hand-absent reading at every absence but, like any tracker,
                    must hold it while the hand plays (noise-free, from the drift law).

    python benchmarks/signal_quality.py            # the figures (about 15 s)
    python benchmarks/signal_quality.py --quick    # short holds, a 3-minute set
    python benchmarks/signal_quality.py --explore  # smoothing settings and frame rates compared
"""

from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

sys.path.insert(0, str(Path(__file__).resolve().parent))

from common import (  # (the benchmarks folder is not a package)
    FROZEN_BASELINE,
    FloatArray,
    Rig,
    figure,
    header,
    ideal_note,
    make_engine,
    make_rig,
    note,
    play,
    positions_to_distance,
    run_engine,
    smooth_notes,
)

from bridge.humfilter import MainsFilterSettings
from bridge.pipeline import Kind
from bridge.sim import DriftSettings, HumSettings, NoiseSettings, Performance, Truth
from bridge.smoothing import SmoothingSettings

CENTS = 100.0
MID = 0.5
STEP_SEMITONES = 5.0
MOVE_S = 0.05
VOLUME_M = 0.25  # the volume hand rests here while the pitch hand plays


@dataclass
class Sizes:
    still_s: float = 6.0
    settle_s: float = 2.0
    steps: int = 8
    step_hold_s: float = 1.5
    lin_points: int = 19
    lin_hold_s: float = 1.5
    drift_minutes: float = 20.0
    drift_rate_hz: float = 100.0


QUICK = Sizes(still_s=4.0, settle_s=2.0, steps=4, lin_points=7, lin_hold_s=1.2, drift_minutes=3.0)


def _d(rig: Rig, position: float) -> float:
    return float(positions_to_distance(rig, np.array([position]))[0])


# ----------------------------------------------------------------------------- still hand


def still_performance(rig: Rig, sz: Sizes) -> tuple[Performance, float]:
    """Silence, a glide to mid-range, a long still hold; returns it and the hold's start (s)."""
    p = Performance(seed=1).silence(0.5).glide(0.5, pitch=_d(rig, MID), volume=VOLUME_M)
    start = p.duration
    return p.hold(sz.still_s), start


def pitch_noise(
    rig: Rig,
    sz: Sizes,
    smoothing: SmoothingSettings | None = None,
    mains_filter: MainsFilterSettings | None = None,
) -> tuple[float, float, float]:
    """(output RMS about its mean, output mean minus ideal, unsmoothed RMS), all in cents."""
    perf, start = still_performance(rig, sz)
    values, truth = play(rig, perf)
    trace = run_engine(make_engine(rig, smoothing=smoothing, mains_filter=mains_filter), values)
    seg = truth.t >= start + sz.settle_s
    out = trace.note[seg]
    raw = rig.pitch.span_semitones * trace.position[seg]
    ideal = ideal_note(rig, truth)[seg]
    return (
        float(np.std(out)) * CENTS,
        float(np.mean(out - ideal)) * CENTS,
        float(np.std(raw)) * CENTS,
    )


# ----------------------------------------------------------------------------- fast moves


@dataclass
class Steps:
    perf: Performance
    starts: list[float]  # time each move starts (s)


def step_performance(rig: Rig, sz: Sizes) -> Steps:
    """Still, then 5-semitone moves back and forth about mid-range, each followed by a hold."""
    half = STEP_SEMITONES / rig.pitch.span_semitones / 2.0
    lo, hi = _d(rig, MID - half), _d(rig, MID + half)
    p = Performance(seed=2).silence(0.5).glide(0.5, pitch=lo, volume=VOLUME_M).hold(2.0)
    starts = []
    for k in range(sz.steps):
        starts.append(p.duration)
        p.glide(MOVE_S, pitch=hi if k % 2 == 0 else lo).hold(sz.step_hold_s)
    return Steps(p, starts)


def _crossing(x: FloatArray, i0: int, level: float, rising: bool) -> int:
    """First index >= i0 where x is past ``level`` in the direction of the move."""
    past = x[i0:] >= level if rising else x[i0:] <= level
    k = int(np.argmax(past))
    return i0 + k if past[k] else len(x)


def move_timing(
    t: FloatArray, inp: FloatArray, out: FloatArray, starts: Sequence[float], rate_hz: float
) -> tuple[float, float, float]:
    """(mean 50 % delay, worst 50 % delay, mean extra 10-90 % rise), in ms.

    Levels come from each signal's own settled value before the move (the last 0.3 s)
    and after it (the last 0.3 s of the following hold), so a constant calibration
    offset does not count as lag.
    """
    win = max(1, int(0.3 * rate_hz))
    delays, extra = [], []
    idx = np.searchsorted(t, np.asarray(starts))
    ends = list(idx[1:]) + [len(t)]
    for i0, i1 in zip(idx, ends):
        times = {}
        for name, x in (("in", inp), ("out", out)):
            a = float(np.mean(x[max(0, i0 - win) : i0]))
            b = float(np.mean(x[i1 - win : i1]))
            rising = b > a
            at = {f: _crossing(x, int(i0), a + f * (b - a), rising) for f in (0.1, 0.5, 0.9)}
            times[name] = at
        delays.append((times["out"][0.5] - times["in"][0.5]) / rate_hz)
        rise_in = times["in"][0.9] - times["in"][0.1]
        rise_out = times["out"][0.9] - times["out"][0.1]
        extra.append((rise_out - rise_in) / rate_hz)
    return float(np.mean(delays)) * 1e3, float(np.max(delays)) * 1e3, float(np.mean(extra)) * 1e3


def lag(
    rig: Rig, sz: Sizes, smoothing: SmoothingSettings | None = None
) -> tuple[float, float, float]:
    st = step_performance(rig, sz)
    values, truth = play(rig, st.perf, seed_offset=2000)
    trace = run_engine(make_engine(rig, smoothing=smoothing), values)
    return move_timing(truth.t, ideal_note(rig, truth), trace.note, st.starts, rig.rate_hz)


# ----------------------------------------------------------------------------- linearity


def linearity(rig: Rig, sz: Sizes) -> tuple[float, float, float]:
    """(worst pipeline error, worst naive error, mean |pipeline error|), cents, over slow holds."""
    positions = np.linspace(0.05, 0.95, sz.lin_points)
    p = Performance(seed=4).silence(1.0)
    for k, pos in enumerate(positions):
        p.glide(0.3, pitch=_d(rig, float(pos)), volume=VOLUME_M)
        p.hold(sz.lin_hold_s, label=f"hold-{k}")
    values, truth = play(rig, p, seed_offset=4000)
    trace = run_engine(make_engine(rig), values)
    ideal = ideal_note(rig, truth)

    # The naive map: position linear in the raw reading between the far and near holds.
    cal = rig.cal.channels["pitch"]
    c_far, c_near = cal.points[0].c, cal.points[-1].c
    to_raw = (
        (lambda c: cal.baseline / (1.0 + c))
        if rig.kind == "count"
        else (lambda c: cal.baseline * (1.0 + c))
    )
    raw_far, raw_near = to_raw(c_far), to_raw(c_near)
    col = [c.name for c in rig.channels].index("pitch")

    errs, naive = [], []
    lo, span = rig.pitch.lowest_note, rig.pitch.span_semitones
    for m in p.marks:
        seg = (truth.t >= m.end - (sz.lin_hold_s - 0.5)) & (truth.t < m.end)
        want = float(np.mean(ideal[seg]))
        errs.append(float(np.mean(trace.note[seg])) - want)
        raw = float(np.mean(values[seg, col]))
        pos = (raw - raw_far) / (raw_near - raw_far)
        naive.append(lo + span * pos - want)
    e = np.abs(np.array(errs)) * CENTS
    return float(e.max()), float(np.max(np.abs(naive))) * CENTS, float(e.mean())


# ----------------------------------------------------------------------------- drift


@dataclass
class SetList:
    perf: Performance
    steady: list[tuple[float, float]]  # (start, end) of the steady part of every hold (s)


def drift_set(seconds: float, rig: Rig, seed: int = 5) -> SetList:
    """A long set: phrases of 3-6 holds at random places (glides between), short absences."""
    rng = np.random.default_rng(seed)
    p = Performance(seed=seed).silence(2.0)
    steady = []
    while p.duration < seconds - 10.0:
        for _ in range(int(rng.integers(3, 7))):
            p.glide(0.3, pitch=_d(rig, float(rng.uniform(0.05, 0.95))), volume=VOLUME_M)
            hold_s = float(rng.uniform(2.0, 5.0))
            steady.append((p.duration + 0.5, p.duration + hold_s))
            p.hold(hold_s)
        p.leave(float(rng.uniform(1.5, 3.0)))
    p.silence(max(1.0, seconds - p.duration))
    return SetList(p, steady)


def drift(sz: Sizes, gain_percent: float = 1.0) -> dict[str, tuple[float, float, float]]:
    """Mean and 95th-percentile |error| (cents) on steady frames, and the share of time
    played, for each way of handling drift."""
    window = 1.0 / sz.drift_rate_hz
    # Calibrated at the start of the set, when nothing has drifted yet.
    rig = make_rig("period", window, with_reference=True)
    sl = drift_set(sz.drift_minutes * 60.0, rig)
    drifting = DriftSettings(
        mode="ramp",
        gain_percent=gain_percent,
        c_fixed_percent=0.2,
        duration_s=1200.0,
        ref_fraction=0.1,
    )
    out: dict[str, tuple[float, float, float]] = {}
    for label, sim in (
        ("no_drift", rig.sim),
        ("drifting", rig.sim.model_copy(update={"drift": drifting})),
    ):
        values, truth = play(Rig(sim, rig.channels, rig.voices, rig.cal, rig.pitch), sl.perf)
        ideal = ideal_note(rig, truth)
        steady = np.zeros(len(truth.t), dtype=bool)
        for a, b in sl.steady:
            steady[np.searchsorted(truth.t, a) : np.searchsorted(truth.t, b)] = True
        steady &= truth.present_pitch
        played = float(np.mean(truth.present_pitch))
        configs = {
            "frozen": {"baseline": FROZEN_BASELINE, "use_reference": False},
            "tracking": {"use_reference": False},
            "reference": {"use_reference": True},
        }
        if label == "no_drift":
            configs = {"reference": configs["reference"]}
        else:
            out.update(drift_bounds(rig, truth, ideal, steady, drifting))
        for name, kw in configs.items():
            trace = run_engine(make_engine(rig, **kw), values)  # type: ignore[arg-type]
            err = np.abs(trace.note[steady] - ideal[steady]) * CENTS
            key = f"{label}_{name}" if label == "no_drift" else name
            out[key] = (float(np.mean(err)), float(np.percentile(err, 95)), played)
    return out


def drift_bounds(
    rig: Rig,
    truth: Truth,
    ideal: FloatArray,
    steady: NDArray[np.bool_],
    drifting: DriftSettings,
) -> dict[str, tuple[float, float, float]]:
    """The error a perfect tracker would leave: one that knows the exact hand-absent
    reading at the last moment the hand was away, and must hold it while the hand plays.

    Noise-free, from the simulator's own drift law (ramp): the reading's gain g and the
    antenna's fixed capacitance x have moved on since the last absence (time t_a), so the
    pipeline sees c = (1 + x + hand)/(1 + g) * (1 + g_a)/(1 + x_a) - 1 instead of
    hand/(1 + x). With the reference oscillator g cancels and only x is left.
    """
    t = truth.t
    away = np.where(truth.present_pitch, -np.inf, t)
    t_a = np.maximum.accumulate(away)
    t_a[~np.isfinite(t_a)] = 0.0
    hand = rig.sim.channels[0].hand_ratio(truth.d_pitch)
    curve = rig.cal.channels["pitch"].curve
    out = {}
    for name, gain in (("bound_tracking", drifting.gain_percent), ("bound_reference", 0.0)):
        g, g_a = (gain / 100.0 * u / drifting.duration_s for u in (t, t_a))
        x, x_a = (drifting.c_fixed_percent / 100.0 * u / drifting.duration_s for u in (t, t_a))
        c = (1.0 + x + hand) / (1.0 + g) * (1.0 + g_a) / (1.0 + x_a) - 1.0
        pos = np.array([curve.position(v) for v in c[steady].tolist()])
        note_ = rig.pitch.lowest_note + rig.pitch.span_semitones * pos
        err = np.abs(note_ - ideal[steady]) * CENTS
        out[name] = (float(np.mean(err)), float(np.percentile(err, 95)), 0.0)
    return out


# ----------------------------------------------------------------------------- explore


def explore(sz: Sizes) -> None:
    """Smoothing settings and frame rates side by side: still-hand noise, move lag, vibrato.

    Vibrato depth is measured on a noise-free board (so it is the filter's doing alone):
    the 5.5 Hz component of the output over that of the input, for the simulator's
    4 mm (about 30-cent) vibrato at mid-range.
    """
    note("explore: smoothing settings on the period board (unsmoothed positions computed once)")
    for rate in (1000.0, 500.0, 250.0, 100.0):
        rig = make_rig("period", 1.0 / rate)
        quiet = make_rig("period", 1.0 / rate)
        quiet.sim = quiet.sim.model_copy(
            update={
                "noise": NoiseSettings(freq_ppm=0.0, phase_cycles=0.0),
                "hum": HumSettings(ppm=0.0),
            }
        )
        perf, start = still_performance(rig, sz)
        v, tr = play(rig, perf)
        still_pos = run_engine(
            make_engine(rig, smoothing=SmoothingSettings(enabled=False)), v
        ).position
        still_seg = tr.t >= start + sz.settle_s
        st = step_performance(rig, sz)
        v2, tr2 = play(rig, st.perf, seed_offset=2000)
        step_pos = run_engine(
            make_engine(rig, smoothing=SmoothingSettings(enabled=False)), v2
        ).position
        step_in = ideal_note(rig, tr2)
        vib = (
            Performance(seed=3)
            .silence(0.5)
            .glide(0.5, pitch=_d(rig, MID), volume=VOLUME_M)
            .hold(1.0)
            .vibrato(4.0, rate_hz=5.5)
        )
        v3, tr3 = play(quiet, vib, seed_offset=3000)
        vib_pos = run_engine(
            make_engine(quiet, smoothing=SmoothingSettings(enabled=False)), v3
        ).position
        vib_in = ideal_note(quiet, tr3)
        vseg = (tr3.t >= 2.5) & (tr3.t < 4.5)
        phasor = np.exp(-2j * np.pi * 5.5 * tr3.t[vseg])

        def depth(
            x: FloatArray, seg: NDArray[np.bool_] = vseg, ph: NDArray[np.complex128] = phasor
        ) -> float:
            y = x[seg] - np.mean(x[seg])
            return float(abs(np.mean(y * ph)))

        settings = [SmoothingSettings()]
        if rate == 1000.0:
            settings += [
                SmoothingSettings(min_cutoff_hz=mc, beta=b, derivative_cutoff_hz=dc)
                for mc, b, dc in [
                    (0.5, 2.0, 3.0),
                    (0.5, 1.0, 3.0),
                    (0.5, 0.5, 10.0),
                    (0.2, 1.0, 3.0),
                    (0.5, 5.0, 1.0),
                    (0.5, 2.0, 1.0),
                    (1.0, 5.0, 0.3),
                ]
            ]
        for s in settings:
            noise = float(np.std(smooth_notes(rig, still_pos, s)[still_seg])) * CENTS
            d50, worst, _ = move_timing(
                tr2.t, step_in, smooth_notes(rig, step_pos, s), st.starts, rig.rate_hz
            )
            keep = depth(smooth_notes(quiet, vib_pos, s)) / depth(vib_in)
            note(
                f"{rate:6.0f} frames/s  min_cutoff_hz={s.min_cutoff_hz:<4g} beta={s.beta:<4g} "
                f"derivative_cutoff_hz={s.derivative_cutoff_hz:<4g}: still {noise:5.2f} cents rms, "
                f"move delay {d50:5.1f} ms (worst {worst:4.1f}), vibrato kept {keep:4.0%}"
            )


# ----------------------------------------------------------------------------- main


def run(quick: bool = False, explore_too: bool = False, drift_minutes: float | None = None) -> None:
    sz = QUICK if quick else Sizes()
    if drift_minutes is not None:
        sz.drift_minutes = drift_minutes
    header("signal quality")
    boards: list[tuple[Kind, str]] = [("period", ""), ("count", "count_board_")]
    for kind, prefix in boards:
        rig = make_rig(kind, 0.001)
        main = kind == "period"
        note(
            f"{kind} board, 1000 frames/s, calibrated from far, near and a mark at 0.15 m "
            f"(model {rig.cal.channels['pitch'].model})"
        )
        rms, bias, raw = pitch_noise(rig, sz)
        figure(f"{prefix}pitch_noise_still_mid", rms, "cents_rms", goal="< 1" if main else "")
        figure(f"{prefix}pitch_noise_unsmoothed_mid", raw, "cents_rms")
        figure(f"{prefix}pitch_offset_still_mid", bias, "cents")
        if main:
            off = MainsFilterSettings(enabled=False)
            rms, _, raw = pitch_noise(rig, sz, mains_filter=off)
            figure(f"{prefix}pitch_noise_still_mid_hum_not_cancelled", rms, "cents_rms")
            figure(f"{prefix}pitch_noise_unsmoothed_mid_hum_not_cancelled", raw, "cents_rms")
        d50, worst, rise = lag(rig, sz)
        figure(f"{prefix}lag_5_semitone_move_50pct", d50, "ms", goal="< 10" if main else "")
        figure(f"{prefix}lag_5_semitone_move_50pct_worst", worst, "ms")
        figure(f"{prefix}lag_5_semitone_move_extra_rise_10_90", rise, "ms")
        worst_lin, naive, mean_lin = linearity(rig, sz)
        figure(f"{prefix}linearity_worst_3point", worst_lin, "cents", goal="< 10" if main else "")
        figure(f"{prefix}linearity_mean_3point", mean_lin, "cents")
        figure(f"{prefix}linearity_worst_naive_linear_raw", naive, "cents")
    if sz.drift_minutes > 0:
        note(
            f"drift: period board with reference oscillator, {sz.drift_rate_hz:g} frames/s, "
            f"{sz.drift_minutes:g}-minute set, gain +1 % and C_fixed +0.2 % per 20 minutes"
        )
        res = drift(sz)
        goals = {"tracking": "< 15", "reference": "< 5"}
        keys = (
            "frozen",
            "tracking",
            "reference",
            "no_drift_reference",
            "bound_tracking",
            "bound_reference",
        )
        for key in keys:
            mean, p95, _ = res[key]
            figure(f"drift_{key}_mean_abs_error", mean, "cents", goal=goals.get(key, ""))
            figure(f"drift_{key}_p95_abs_error", p95, "cents")
        figure("drift_set_time_played", res["reference"][2] * 100.0, "percent")
        note("drift again with the gain falling 1 % (the tracker's slow, capped direction)")
        res = drift(sz, gain_percent=-1.0)
        for key in ("frozen", "tracking", "reference", "bound_tracking"):
            mean, p95, _ = res[key]
            figure(f"drift_gain_down_{key}_mean_abs_error", mean, "cents")
    if explore_too:
        explore(sz)


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="short holds and a 3-minute set")
    ap.add_argument("--explore", action="store_true", help="also compare smoothing settings")
    ap.add_argument("--drift-minutes", type=float, default=None, help="length of the drift set")
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING)
    run(args.quick, args.explore, args.drift_minutes)
    return 0


if __name__ == "__main__":
    sys.exit(main())
