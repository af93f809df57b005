"""The per-channel pipeline: one frame of raw readings in, one ``Reading`` out.

For every frame::

    reference correction  raw * ref_base / ref_raw        (common-mode oscillator drift)
    hum cancelling        minus the adaptive mains sinusoid (humfilter.py; when the
                          window does not span whole mains periods)
    baseline tracking     N0 follows the hand-absent level (baseline.py)
    capacitance           c = N0/N - 1 or P/P0 - 1        (calibrate.c_from_raw)
    calibration           c -> hand position 0..1, linear in distance
    smoothing             1 Euro filter on the position   (smoothing.py)
    mapping               note, Hz and level per voice    (mapping.py)

A *voice* pairs a pitch channel with an optional volume channel; outputs play voices.
The ``Reading`` and its views are created once and updated in place, so the per-frame
path allocates nothing of its own.

    engine = Engine(channels, voices, calibrations, rate_hz=100.0)
    reading = engine.process(frame.values, seq=frame.seq, t=time.monotonic())
    reading.voices[0].note, reading.voices[0].level
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from .baseline import BaselineSettings, BaselineTracker, ReferenceCorrector
from .calibrate import ChannelCalibration
from .errors import ConfigError
from .humfilter import HumCanceller, MainsFilterSettings, make_cancellers
from .mapping import LevelMap, LevelSettings, PitchMap, PitchSettings
from .smoothing import SmoothingSettings

log = logging.getLogger(__name__)

Role = Literal["pitch", "volume", "reference", "unused"]
Kind = Literal["count", "period"]

_NAME = r"^[A-Za-z][A-Za-z0-9_-]{0,31}$"


class ChannelSettings(BaseModel):
    """One value of the board's frame: its name, what it senses, and what it reports."""

    model_config = ConfigDict(extra="forbid")

    name: str = Field(pattern=_NAME, description="channel name (letters, digits, _ and -)")
    role: Role = "pitch"
    kind: Kind = Field("count", description="count: pulses per window; period: timer ticks")


class VoiceSettings(BaseModel):
    """A playable voice: a pitch antenna and, optionally, a volume antenna."""

    model_config = ConfigDict(extra="forbid")

    name: str = Field("lead", pattern=_NAME)
    pitch_channel: str
    volume_channel: str | None = None
    pitch: PitchSettings = Field(default_factory=PitchSettings)
    level: LevelSettings = Field(default_factory=LevelSettings)
    sound_without_hand: bool = Field(
        False, description="keep sounding the lowest note when no hand is near the pitch antenna"
    )


class ChannelView:
    """What one channel measured in the latest frame (updated in place)."""

    __slots__ = ("name", "role", "kind", "raw", "baseline", "c", "position", "present")

    def __init__(self, name: str, role: Role, kind: Kind) -> None:
        self.name, self.role, self.kind = name, role, kind
        self.raw = 0.0
        self.baseline = 0.0
        self.c = 0.0
        self.position = 0.0
        self.present = False

    def as_dict(self) -> dict[str, object]:
        return {k: getattr(self, k) for k in self.__slots__}


class VoiceView:
    """What one voice plays after the latest frame (updated in place)."""

    __slots__ = ("name", "note", "hz", "level", "present")

    def __init__(self, name: str, note: float, hz: float) -> None:
        self.name = name
        self.note = note
        self.hz = hz
        self.level = 0.0
        self.present = False

    def as_dict(self) -> dict[str, object]:
        return {k: getattr(self, k) for k in self.__slots__}


class Reading:
    """Everything outputs need about one frame. One instance per engine, reused."""

    __slots__ = ("seq", "t", "frame", "channels", "voices")

    def __init__(self, channels: list[ChannelView], voices: list[VoiceView]) -> None:
        self.seq: int | None = None
        self.t = 0.0
        self.frame = 0  # frames processed by this engine, the clock of profile switches
        self.channels = channels
        self.voices = voices

    def as_dict(self) -> dict[str, object]:
        return {
            "seq": self.seq,
            "t": self.t,
            "frame": self.frame,
            "channels": [c.as_dict() for c in self.channels],
            "voices": [v.as_dict() for v in self.voices],
        }


class _Sensing:
    """The state of one antenna channel: tracker, calibration curve, filter."""

    __slots__ = ("index", "view", "tracker", "curve", "count", "filter", "ring", "ring_i", "hum")

    def __init__(
        self,
        index: int,
        view: ChannelView,
        cal: ChannelCalibration,
        baseline: BaselineSettings,
        smoothing: SmoothingSettings,
        rate_hz: float,
    ) -> None:
        self.index = index
        self.view = view
        self.tracker = BaselineTracker(
            baseline, base=cal.baseline, noise=cal.noise, kind=cal.kind, rate_hz=rate_hz
        )
        self.curve = cal.curve
        self.count = cal.kind == "count"
        self.filter = smoothing.make(rate_hz) if smoothing.enabled else None
        view.baseline = cal.baseline
        # the last mean_frames readings (allocated once); empty when averaging is off
        k = smoothing.mean_frames(rate_hz)
        self.ring: list[float] = [0.0] * k if k > 1 else []
        self.ring_i = -1  # -1: not filled yet
        self.hum: HumCanceller | None = None


class _Voice:
    __slots__ = ("view", "pitch", "volume", "pitch_map", "level_map", "always")

    def __init__(
        self, view: VoiceView, pitch: _Sensing, volume: _Sensing | None, s: VoiceSettings
    ) -> None:
        self.view = view
        self.pitch = pitch
        self.volume = volume
        self.pitch_map = PitchMap(s.pitch)
        self.level_map = LevelMap(s.level)
        self.always = s.sound_without_hand


def check_layout(channels: Sequence[ChannelSettings], voices: Sequence[VoiceSettings]) -> None:
    """Raise ConfigError unless channel names are unique and voices name existing channels."""
    names = [c.name for c in channels]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise ConfigError(f"channel names must be unique; repeated: {', '.join(sorted(dup))}")
    roles = {c.name: c.role for c in channels}
    if sum(1 for c in channels if c.role == "reference") > 1:
        raise ConfigError("at most one channel may have the role 'reference'")
    if not voices:
        raise ConfigError("the rig needs at least one voice (a pitch channel to play)")
    for i, v in enumerate(voices):
        for field, want in (("pitch_channel", "pitch"), ("volume_channel", "volume")):
            name = getattr(v, field)
            if name is None:
                continue
            if name not in roles:
                raise ConfigError(
                    f"voices[{i}].{field}: no channel named {name!r}; channels are "
                    f"{', '.join(names)}"
                )
            if roles[name] != want:
                raise ConfigError(
                    f"voices[{i}].{field}: channel {name!r} has role {roles[name]!r}, "
                    f"expected {want!r}"
                )


class Engine:
    """Turns frames of raw readings into a ``Reading``; one per running rig.

    ``calibrations`` maps each antenna channel (role pitch or volume) to its calibration;
    ``reference_base`` is the reference channel's hand-absent reading from the same
    soundcheck (needed when the rig has a reference channel). ``mains_filter`` (with
    its ``mains_hz`` resolved, see ``MainsFilterSettings.with_board_mains``) cancels
    mains hum on every antenna channel and the reference before anything else.
    """

    def __init__(
        self,
        channels: Sequence[ChannelSettings],
        voices: Sequence[VoiceSettings],
        calibrations: Mapping[str, ChannelCalibration],
        *,
        rate_hz: float,
        baseline: BaselineSettings | None = None,
        smoothing: SmoothingSettings | None = None,
        reference_base: float | None = None,
        mains_filter: MainsFilterSettings | None = None,
    ) -> None:
        check_layout(channels, voices)
        if not (rate_hz > 0 and math.isfinite(rate_hz)):
            raise ConfigError(f"frame rate must be positive, got {rate_hz}")
        self.rate_hz = rate_hz
        baseline = baseline or BaselineSettings()
        smoothing = smoothing or SmoothingSettings()
        self.n_values = len(channels)
        views = [ChannelView(c.name, c.role, c.kind) for c in channels]
        self._sensing: list[_Sensing] = []
        by_name: dict[str, _Sensing] = {}
        for i, (c, view) in enumerate(zip(channels, views)):
            if c.role not in ("pitch", "volume"):
                continue
            cal = calibrations.get(c.name)
            if cal is None:
                raise ConfigError(
                    f"no calibration for channel {c.name!r}: run a soundcheck for this rig"
                )
            if cal.kind != c.kind:
                raise ConfigError(
                    f"channel {c.name!r} reports {c.kind}s but its calibration was made "
                    f"for {cal.kind}s: run a soundcheck again"
                )
            s = _Sensing(i, view, cal, baseline, smoothing, rate_hz)
            self._sensing.append(s)
            by_name[c.name] = s
        self._ref_index = next((i for i, c in enumerate(channels) if c.role == "reference"), -1)
        self._other = [i for i, c in enumerate(channels) if c.role == "unused"]
        self._ref: ReferenceCorrector | None = None
        if self._ref_index >= 0:
            if reference_base is None:
                log.warning("reference channel present but no reference level in the profile")
            else:
                self._ref = ReferenceCorrector(reference_base)
                views[self._ref_index].baseline = reference_base
        self._voices = []
        vviews = []
        for v in voices:
            pm = PitchMap(v.pitch)
            vv = VoiceView(v.name, pm.low, pm.hz(pm.low))
            vviews.append(vv)
            vol = by_name[v.volume_channel] if v.volume_channel else None
            self._voices.append(_Voice(vv, by_name[v.pitch_channel], vol, v))
        self.reading = Reading(views, vviews)
        n_hum = len(self._sensing) + (1 if self._ref_index >= 0 else 0)
        self._mains, hums = make_cancellers(mains_filter or MainsFilterSettings(), rate_hz, n_hum)
        for s, hum in zip(self._sensing, hums):
            s.hum = hum
        self._ref_hum = hums[-1] if hums and self._ref_index >= 0 else None
        self._max_gap = max(1, int(rate_hz))  # lost frames the hum phase follows (1 s)
        self._last_seq: int | None = None

    def process(self, values: Sequence[int], seq: int | None = None, t: float = 0.0) -> Reading:
        """Run one frame through every channel and voice; returns the (reused) Reading."""
        r = self.reading
        r.seq, r.t = seq, t
        r.frame += 1
        if len(values) != self.n_values:
            # The decoder guarantees the count; this guards direct callers.
            raise ValueError(f"expected {self.n_values} values, got {len(values)}")
        views = r.channels
        mains = self._mains
        if mains is not None:
            # The mains phase moves on by the frames since the last one, lost ones included.
            steps = 1
            if seq is not None:
                last = self._last_seq
                self._last_seq = seq
                if last is not None and 1 < seq - last <= self._max_gap:
                    steps = seq - last
            mains.advance(steps)
        scale = 1.0
        if self._ref_index >= 0:
            ref_raw = float(values[self._ref_index])
            views[self._ref_index].raw = ref_raw
            ref = self._ref
            if ref is not None and 0.0 < ref_raw < math.inf:
                if self._ref_hum is not None:
                    ref_raw = self._ref_hum.clean(ref_raw)
                if ref_raw > 0.0:
                    scale = ref.ref_base / ref_raw
        for i in self._other:  # unused channels: their raw value is still reported
            views[i].raw = float(values[i])
        for s in self._sensing:
            view = s.view
            raw = float(values[s.index])
            view.raw = raw
            x = raw * scale
            hum = s.hum
            if hum is not None and 0.0 < x < math.inf:
                # Before the mean and the tracker: hum is not hand, and it does not
                # average away over a few readings (the mean spans a fraction of a period).
                x = hum.clean(x)
            ring = s.ring
            if ring and 0.0 < x < math.inf:
                # Mean of the last k readings before the curve: the curve is not linear, so
                # curving noisy single readings and smoothing afterwards biases the pitch
                # (by tens of cents at 1000 frames/s). For a period board the mean of k
                # windows is one k-times-longer reciprocal measurement.
                i = s.ring_i
                if i < 0:
                    ring[:] = [x] * len(ring)
                    i = 0
                ring[i] = x
                s.ring_i = i + 1 if i + 1 < len(ring) else 0
                x = sum(ring) / len(ring)
            base = s.tracker.update(x)
            view.baseline = base
            # c_from_raw inlined: c = N0/N - 1 (counts) or P/P0 - 1 (periods).
            if x > 0.0 and base > 0.0:
                c = (base / x - 1.0) if s.count else (x / base - 1.0)
                if c > 10.0:  # the same bound as calibrate.c_from_raw: always finite
                    c = 10.0
            else:
                c = 0.0
            view.c = c
            view.position = s.curve.position(c)
            view.present = s.tracker.present
        for v in self._voices:
            vv = v.view
            p = v.pitch.view
            pos = p.position
            f = v.pitch.filter
            if f is not None:
                pos = f.filter(pos)
            note = v.pitch_map.note(pos)
            vv.note = note
            vv.hz = v.pitch_map.hz(note)
            vv.present = p.present
            if v.volume is not None:
                q = v.volume.view.position
                g = v.volume.filter
                if g is not None:
                    q = g.filter(q)
                level = v.level_map.level(q)
            else:
                level = v.level_map.settings.ceiling
            vv.level = level if (p.present or v.always) else 0.0
        return r

    def rebase(self) -> None:
        """Take the current readings as the new hand-absent levels (re-capture of baseline)."""
        for s in self._sensing:
            if s.view.raw > 0.0:
                s.tracker.rebase()  # the last valid (reference-corrected) reading
        if self._ref is not None:
            raw = self.reading.channels[self._ref_index].raw
            if raw > 0:
                self._ref.rebase(raw)

    @property
    def baselines(self) -> dict[str, float]:
        return {s.view.name: s.tracker.baseline for s in self._sensing}
