"""Shared set-up for the benchmarks: a simulated rig, its soundcheck, an engine, figures.

Every benchmark builds the same thing a performer would: a simulated board
(:mod:`bridge.sim`), a soundcheck cut from the simulator's own soundcheck performance
(:func:`bridge.soundcheck.simulated_holds`), a calibration fitted from it
(:func:`bridge.soundcheck.fit_rig`) and an :class:`bridge.pipeline.Engine`. The board
that plays the benchmark's performance gets a different seed from the soundcheck board,
so the calibration never sees the noise it is judged on. The engine cancels mains hum
as a rig file with ``board.mains_hz`` set to the simulator's hum frequency would.

Figures are printed one per line as ``name: value unit`` (DEVELOPERS.md, "How to
benchmark") and kept in :data:`FIGURES` so that ``run_all.py`` can list them again.

    rig = make_rig("period", window_s=0.001)
    eng = make_engine(rig)
    values, truth = play(rig, performance)
    trace = run_engine(eng, values)
    figure("pitch_noise", 0.8, "cents")
"""

from __future__ import annotations

import math
import os
import platform
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from bridge.baseline import BaselineSettings
from bridge.humfilter import MainsFilterSettings
from bridge.mapping import PitchSettings
from bridge.pipeline import ChannelSettings, Engine, Kind, VoiceSettings
from bridge.sim import DriftSettings, Performance, SimBoard, SimSettings, Truth
from bridge.smoothing import SmoothingSettings
from bridge.soundcheck import RigCalibration, fit_rig, simulated_holds

FloatArray = NDArray[np.float64]

#: The benchmarks' date and machine, as recorded in docs/performance.md.
DATE = "2026-12-01"

#: The intermediate soundcheck mark (metres): far, near and this one make the 3-point capture.
MARK_M = 0.15


# ----------------------------------------------------------------------------- figures


@dataclass
class Figure:
    name: str
    value: float
    unit: str
    goal: str = ""


FIGURES: list[Figure] = []


def figure(name: str, value: float, unit: str, *, goal: str = "", digits: int = 3) -> float:
    """Print ``name: value unit`` (with the goal as a trailing comment) and record it."""
    if isinstance(value, float) and math.isfinite(value):
        shown = f"{value:.{digits}g}" if abs(value) < 10**digits else f"{value:.0f}"
    else:
        shown = str(value)
    tail = f"   # goal {goal}" if goal else ""
    print(f"{name}: {shown} {unit}{tail}", flush=True)
    FIGURES.append(Figure(name, float(value), unit, goal))
    return value


def note(text: str) -> None:
    """A comment line between figures (starts with '#', so parsers of figures skip it)."""
    print(f"# {text}", flush=True)


def machine() -> str:
    """One line about where the figures come from."""
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    return (
        f"{cores} cores, Python {platform.python_version()}, numpy {np.__version__}, "
        f"{platform.machine()} {platform.system()}"
    )


def best_time(fn: Callable[[], object], repeats: int) -> float:
    """Shortest wall time of ``repeats`` calls (s): the run least disturbed by other load."""
    best = math.inf
    for _ in range(max(1, repeats)):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


# ----------------------------------------------------------------------------- the rig


@dataclass
class Rig:
    """A simulated board with its soundcheck calibration and the pipeline's layout."""

    sim: SimSettings
    channels: list[ChannelSettings]
    voices: list[VoiceSettings]
    cal: RigCalibration
    pitch: PitchSettings = field(default_factory=PitchSettings)

    @property
    def rate_hz(self) -> float:
        return 1.0 / self.sim.window_s

    @property
    def kind(self) -> Kind:
        return self.sim.kind


def sim_settings(
    kind: Kind = "period",
    window_s: float = 0.001,
    *,
    with_reference: bool = False,
    drift: DriftSettings | None = None,
    seed: int = 7,
) -> SimSettings:
    """The simulator's default two-antenna board (pitch and volume), drift off unless given."""
    return SimSettings(
        kind=kind,
        window_s=window_s,
        with_reference=with_reference,
        drift=drift or DriftSettings(mode="off"),
        seed=seed,
    )


def make_rig(
    kind: Kind = "period",
    window_s: float = 0.001,
    *,
    with_reference: bool = False,
    drift: DriftSettings | None = None,
    seed: int = 7,
    marks: Sequence[float] = (MARK_M,),
    model: str = "auto",
) -> Rig:
    """Simulate a soundcheck (away, far, near, marks) and fit the rig's calibration from it.

    The soundcheck board runs with ``seed``; :func:`play` uses another seed.
    """
    s = sim_settings(kind, window_s, with_reference=with_reference, drift=drift, seed=seed)
    channels = [
        ChannelSettings(name="pitch", role="pitch", kind=kind),
        ChannelSettings(name="volume", role="volume", kind=kind),
    ]
    if with_reference:
        channels.append(ChannelSettings(name="ref", role="reference", kind=kind))
    names = [c.name for c in channels]
    holds = simulated_holds(s, names, seed=seed, marks=marks)
    cal = fit_rig(channels, holds, rate_hz=1.0 / window_s, model=model)
    voices = [VoiceSettings(pitch_channel="pitch", volume_channel="volume")]
    return Rig(s, channels, voices, cal, voices[0].pitch)


def make_engine(
    rig: Rig,
    *,
    smoothing: SmoothingSettings | None = None,
    baseline: BaselineSettings | None = None,
    use_reference: bool = True,
    mains_filter: MainsFilterSettings | None = None,
) -> Engine:
    """An engine for the rig. ``use_reference=False`` ignores a reference channel (role unused).

    ``mains_filter`` defaults to the rig file's default with ``board.mains_hz`` set to the
    simulator's hum frequency (50 Hz); pass ``MainsFilterSettings(enabled=False)`` for none.
    """
    channels = rig.channels
    if not use_reference:
        channels = [
            c.model_copy(update={"role": "unused"}) if c.role == "reference" else c
            for c in channels
        ]
    return Engine(
        channels,
        rig.voices,
        rig.cal.channels,
        rate_hz=rig.rate_hz,
        baseline=baseline,
        smoothing=smoothing,
        reference_base=rig.cal.reference_base if use_reference else None,
        mains_filter=(mains_filter or MainsFilterSettings()).with_board_mains(board_mains(rig)),
    )


def board_mains(rig: Rig) -> int | None:
    """The ``board.mains_hz`` a rig file would give for the simulator's hum (50 or 60)."""
    hz = rig.sim.hum.hz
    return int(hz) if hz in (50.0, 60.0) else None


#: Baseline settings that never move the baseline: the one captured at soundcheck stays.
FROZEN_BASELINE = BaselineSettings(
    follow_tau_s=1e12, recover_tau_s=1e12, max_follow_c_per_s=0.0, rebase_after_s=1e12
)


def play(
    rig: Rig, performance: Performance, *, seed_offset: int = 1000
) -> tuple[NDArray[np.int64], Truth]:
    """Run the performance on a board like the soundcheck's, but with its own noise seed."""
    seed = (rig.sim.seed or 0) + seed_offset
    board = SimBoard(rig.sim.model_copy(update={"seed": seed}), performance)
    n = round(performance.duration / rig.sim.window_s)
    return board.run(n)


@dataclass
class Trace:
    """What the engine produced for every frame."""

    note: FloatArray  # output note of voice 0 (fractional MIDI note)
    position: FloatArray  # the pitch channel's unsmoothed position
    c: FloatArray  # the pitch channel's c
    present: NDArray[np.bool_]  # the pitch channel's presence
    seconds: float  # wall time of the loop


def run_engine(engine: Engine, values: NDArray[np.int64]) -> Trace:
    """Feed every frame (rows of ``values``) through the engine; collect voice 0 and channel 0."""
    n = len(values)
    note = np.empty(n)
    pos = np.empty(n)
    c = np.empty(n)
    present = np.empty(n, dtype=bool)
    rows = values.tolist()
    process = engine.process
    reading = engine.reading
    voice = reading.voices[0]
    pitch_view = next(v for v in reading.channels if v.role == "pitch")
    t0 = time.perf_counter()
    for i, row in enumerate(rows):
        process(row)
        note[i] = voice.note
        pos[i] = pitch_view.position
        c[i] = pitch_view.c
        present[i] = pitch_view.present
    seconds = time.perf_counter() - t0
    return Trace(note, pos, c, present, seconds)


def ideal_note(rig: Rig, truth: Truth) -> FloatArray:
    """The note a perfect calibration would play: linear in distance over the span."""
    p = rig.pitch
    pos = truth.pos_pitch if p.higher_when_near else 1.0 - truth.pos_pitch
    return p.lowest_note + p.span_semitones * pos


def smooth_notes(rig: Rig, position: FloatArray, smoothing: SmoothingSettings) -> FloatArray:
    """What the engine's voice would play for these unsmoothed positions with ``smoothing``.

    The engine filters the pitch channel's position and maps it linearly (no scale pull):
    doing only that step here lets one engine run serve many smoothing settings.
    """
    out = np.empty(len(position))
    p = rig.pitch
    lo, span = p.lowest_note, p.span_semitones
    if smoothing.enabled:
        f = smoothing.make(rig.rate_hz).filter
        for i, x in enumerate(position.tolist()):
            out[i] = f(x)
    else:
        out[:] = position
    return lo + span * np.clip(out, 0.0, 1.0)


def positions_to_distance(rig: Rig, positions: FloatArray) -> FloatArray:
    """Distances (m) for ideal positions on the rig's playing range."""
    s = rig.sim
    return s.d_far_m - np.asarray(positions) * (s.d_far_m - s.d_near_m)


def header(title: str) -> None:
    note(
        f"{title} ({DATE}; {machine()}; {' '.join([os.path.basename(sys.argv[0])] + sys.argv[1:])})"
    )
