"""From holds to a calibration: the logic of a soundcheck, without any terminal or port.

A soundcheck is a list of *holds*: the hands away (hand-absent baseline), at the far
playing position, at the nearest, and optionally at marked distances in between. Each
hold is a block of frames; ``fit_rig`` turns the holds into one calibration per antenna
channel plus the reference channel's level.

``simulated_holds`` runs the simulator's soundcheck performance and cuts its holds out,
so the demo, the tests and the benchmarks calibrate exactly as a performer would.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from .calibrate import Capture, ChannelCalibration, fit_calibration, hold_stats
from .errors import CalibrationError
from .pipeline import ChannelSettings

log = logging.getLogger(__name__)

AWAY, FAR, NEAR = "away", "far", "near"


@dataclass
class Hold:
    """One hold: frames (rows) of raw values (columns in the rig's channel order)."""

    label: str
    values: np.ndarray
    distance_m: float | None = None
    position: float | None = None


@dataclass
class RigCalibration:
    """What a soundcheck produces: a calibration per antenna channel, the reference level."""

    channels: dict[str, ChannelCalibration]
    reference_base: float | None = None
    rate_hz: float = 0.0
    notes: list[str] = field(default_factory=list)


def fit_rig(
    channels: Sequence[ChannelSettings],
    holds: Sequence[Hold],
    *,
    rate_hz: float,
    model: str = "auto",
) -> RigCalibration:
    """Fit every pitch/volume channel from the holds; measure the reference level.

    The holds must include ``away``, ``far`` and ``near``; any others are intermediate
    points and need a distance (when far and near have one) or a position.
    """
    by_label = {h.label: h for h in holds}
    for need in (AWAY, FAR, NEAR):
        if need not in by_label:
            raise CalibrationError(f"the soundcheck has no {need!r} hold: capture it")
    between = [h for h in holds if h.label not in (AWAY, FAR, NEAR)]
    out = RigCalibration({}, rate_hz=rate_hz)
    for i, ch in enumerate(channels):
        if ch.role == "reference":
            out.reference_base = float(np.mean(by_label[AWAY].values[:, i]))
            continue
        if ch.role not in ("pitch", "volume"):
            continue

        def cap(h: Hold, i: int = i) -> Capture:
            return Capture(hold_stats(h.values[:, i], rate_hz), h.distance_m, h.position)

        try:
            out.channels[ch.name] = fit_calibration(
                ch.kind,
                hold_stats(by_label[AWAY].values[:, i], rate_hz),
                cap(by_label[FAR]),
                cap(by_label[NEAR]),
                [cap(h) for h in between],
                model=model,  # type: ignore[arg-type]
            )
        except CalibrationError as e:
            raise CalibrationError(f"channel {ch.name!r}: {e}") from e
    return out


def simulated_holds(
    board_settings: object,
    channel_names: Sequence[str],
    *,
    seed: int = 0,
    marks: Sequence[float] = (0.25,),
    hold_s: float = 2.0,
    settle_s: float = 0.3,
) -> list[Hold]:
    """Run the simulator's soundcheck and cut out its holds (minus a settling time).

    ``marks`` are the intermediate distances in metres; the columns come back in
    ``channel_names`` order, which must be the simulator's own channel names.
    """
    from . import sim

    s = board_settings if isinstance(board_settings, sim.SimSettings) else sim.SimSettings()
    perf = sim.soundcheck(seed, points=marks, hold_s=hold_s, d_near=s.d_near_m, d_far=s.d_far_m)
    board = sim.SimBoard(s, perf)
    n = int(round(perf.duration / s.window_s))
    values, _ = board.run(n)
    order = [s.names.index(c) for c in channel_names]
    values = values[:, order]
    holds = []
    for m in perf.marks:
        i0 = int((m.start + settle_s) / s.window_s)
        i1 = int(m.end / s.window_s)
        dist = None if m.label == AWAY else float(m.d_pitch)
        holds.append(Hold(m.label, values[i0:i1].astype(float), distance_m=dist))
    return holds


def holds_summary(holds: Sequence[Hold], names: Sequence[str]) -> Mapping[str, dict[str, float]]:
    """Mean of every channel in every hold, for logs and reports."""
    return {
        h.label: {n: float(np.mean(h.values[:, i])) for i, n in enumerate(names)} for h in holds
    }


# ------------------------------------------------------------------ the guided capture


@dataclass
class Step:
    """One hold the performer is asked for. ``distance_m`` is None for the hand-absent hold."""

    label: str
    prompt: str
    distance_m: float | None = None


def default_steps(d_far: float, d_near: float, marks: Sequence[float] = ()) -> list[Step]:
    steps = [
        Step(AWAY, "Step away: both hands well away from both antennas, nobody near."),
        Step(FAR, f"Both hands at the FAR playing position (about {d_far * 100:.0f} cm).", d_far),
        Step(NEAR, f"Both hands at the NEAREST playing position (about {d_near * 100:.0f} cm).",
             d_near),
    ]
    for d in marks:
        steps.append(Step(f"mark-{d:.2f}", f"Both hands at the mark {d * 100:.0f} cm away.", d))
    return steps


@dataclass
class HoldVerdict:
    """Whether a hold can be used, and why not."""

    ok: bool
    problems: list[str]


def judge_hold(
    values: np.ndarray,
    channels: Sequence[ChannelSettings],
    *,
    rate_hz: float,
    max_drift_sigma: float = 4.0,
    max_drift_c: float = 3e-4,
) -> HoldVerdict:
    """Reject a hold whose readings drifted (a hand moving, a board warming up).

    A drift counts when it stands out of the noise (``max_drift_sigma``) and is large
    enough to matter musically: ``max_drift_c`` of relative capacitance, about 1 % of a
    typical playing range of a few percent (DOMAIN.md section 1). A quiet board's slow
    thermal creep passes; a hand that moved during the hold does not.
    """
    problems = []
    if values.shape[0] < 10:
        return HoldVerdict(False, ["too few frames arrived: is the board sending?"])
    for i, ch in enumerate(channels):
        if ch.role not in ("pitch", "volume"):
            continue
        st = hold_stats(values[:, i], rate_hz, max_drift_sigma=max_drift_sigma)
        if not st.stable and abs(st.drift) > max_drift_c * abs(st.mean):
            problems.append(
                f"{ch.name}: the reading moved by {st.drift_sigma:.1f} noise units during the "
                "hold; keep the hand still and try again"
            )
    return HoldVerdict(not problems, problems)


def paced_performance(
    steps: Sequence[Step], *, move_s: float, settle_s: float, hold_s: float, seed: int = 0
) -> object:
    """A simulated performer who follows a paced soundcheck exactly (for --simulate)."""
    from . import sim

    p = sim.Performance(seed, tremor_m=0.0003)
    for st in steps:
        if st.distance_m is None:
            p.leave(move_s).silence(settle_s + hold_s, label=st.label)
        else:
            d = st.distance_m
            p.glide(move_s, pitch=d, volume=d).hold(settle_s + hold_s, label=st.label)
    return p.leave(2.0)
