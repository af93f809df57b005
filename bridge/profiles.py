"""Saved settings: the rig file and the venue profiles, in human-editable TOML.

Two kinds of file, both plain TOML that people edit by hand and the tool rewrites
without losing their comments:

``rig.toml`` (the *rig*: what the instrument is; rarely changes)
    ``schema``, ``kind = "rig"``, then the tables ``[board]`` (counting window),
    ``[source]`` (serial URL, baud), ``[frames]`` (frame format), ``[[channels]]`` (name,
    role: pitch / volume / reference / unused, kind: count / period), ``[[voices]]`` (a
    pitch channel, an optional volume channel, ``[voices.pitch]`` and ``[voices.level]``
    mapping), ``[outputs.midi]`` / ``[outputs.osc]`` / ``[outputs.midifile]``,
    ``[smoothing]``, ``[baseline]``, optional ``[control]`` and ``[sim]``.
``venues/<name>.toml`` (a *venue profile*: how the instrument behaves in one room)
    ``schema``, ``kind = "venue"``, ``created``, ``notes``, ``reference_base``, one
    ``[channels.<channel>]`` calibration per antenna (baseline, noise, captured points,
    fitted model), and optional overrides for this room only: ``[voices.<voice>.pitch]``,
    ``[voices.<voice>.level]``, ``[baseline]``, ``[smoothing]`` (only the keys given
    replace the rig's values).

The examples in the repository's ``profiles/`` folder explain every key.

Cheat sheet::

    store = Store.locate()                    # or Store(Path("/somewhere"))
    rig = store.load_rig()                    # Rig, validated
    venue = store.load_venue("tin-lantern")   # VenueProfile, validated
    played = apply_venue(rig, venue)          # the rig with this room's overrides applied
    store.save_venue("tin-lantern", venue)    # atomic, keeps comments, skips if unchanged
    store.activate("tin-lantern")             # refuses an invalid profile, keeps the old one
    store.list_venues()                       # [VenueSummary(name, created, quality, ...)]
    store.compare("tin-lantern", "saltmarsh-chapel")   # [Difference(path, a, b)]
    setup_parts = played.channels, played.voices, venue.calibration()   # for the daemon

Where the store lives, first match wins:

1. an explicit folder passed by the caller (a command-line option);
2. the environment variable ``FIELDBRIDGE_HOME`` (the service unit sets it);
3. the per-user data folder, ``platformdirs.user_data_dir("fieldbridge")``
   (``~/.local/share/fieldbridge`` on Linux), for people running the tool themselves;
4. the system folder ``/var/lib/fieldbridge``, when the caller asks for the service's
   store (``system=True``).

Inside it: ``rig.toml``, ``venues/*.toml``, and ``active`` (one line: the active venue's
name). Every write goes through :func:`bridge.storage.atomic_write`: a crash or a full
disk leaves the previous file intact, the previous version stays as ``NAME.bak``, and a
file whose bytes would not change is not written at all (SD cards wear with writes).

Every file starts with ``schema = 1``. A file from a newer version of the tool is refused
with a message saying so, rather than half-understood. Every key is checked
(``extra="forbid"``): a typo is named with its path (``voices[0].pitch.span_semitone``)
and the keys allowed there, one line per problem.
"""

from __future__ import annotations

import logging
import math
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from functools import cache
from pathlib import Path
from typing import Annotated, Any, Literal

import platformdirs
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationError,
    create_model,
    field_validator,
    model_validator,
)

from bridge.baseline import BaselineSettings
from bridge.calibrate import ChannelCalibration, resolution_report
from bridge.errors import BridgeError, ConfigError
from bridge.frames import FrameSettings
from bridge.humfilter import MainsFilterSettings
from bridge.mapping import LevelSettings, PitchSettings
from bridge.outputs.midi import MidiSettings
from bridge.outputs.midifile import MidiFileSettings
from bridge.outputs.osc import OscSettings
from bridge.pipeline import ChannelSettings, VoiceSettings
from bridge.sim import SimSettings
from bridge.smoothing import SmoothingSettings
from bridge.soundcheck import RigCalibration
from bridge.sources import SourceSettings
from bridge.storage import (
    ABSENT,
    SCHEMA,
    Difference,
    atomic_write,
    differences,
    load_model,
    loc_text,
    save_model,
    validation_problems,
)

log = logging.getLogger(__name__)

APP_NAME = "fieldbridge"
ENV_HOME = "FIELDBRIDGE_HOME"
SYSTEM_HOME = Path("/var/lib/fieldbridge")
RIG_FILE = "rig.toml"
VENUES_DIR = "venues"
ACTIVE_FILE = "active"
NAME_MAX = 64

# Venue names become file names: ASCII letters (folded to lower case), digits, dot,
# underscore, hyphen; a letter or digit first. re.ASCII keeps IGNORECASE from matching
# look-alikes such as the Kelvin sign, which lower-cases to "k".
_NAME_RE = re.compile(r"[a-z0-9][a-z0-9._-]*", re.ASCII | re.IGNORECASE)
# Device names some systems reserve whatever the extension (they would open a device).
_RESERVED = {
    "con",
    "prn",
    "aux",
    "nul",
    *(f"com{i}" for i in range(1, 10)),
    *(f"lpt{i}" for i in range(1, 10)),
}

# Channel and voice names as written in the rig (the same rule as pipeline.py).
_KEY = Annotated[str, StringConstraints(pattern=r"^[A-Za-z][A-Za-z0-9_-]{0,31}$")]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", validate_assignment=True)


# ------------------------------------------------------------------------------ the rig


class BoardSettings(_Model):
    """What the board measures with: its counting window and, for period boards, its clock."""

    window_s: float = Field(
        default=0.02,
        gt=0.0,
        le=1.0,
        description="one frame per window; 20 ms rejects 50 Hz hum, 16.67 ms 60 Hz, 100 ms both",
    )
    clock_hz: float | None = Field(
        default=None,
        gt=0.0,
        description="timer clock of a period-timing board (for the resolution report)",
    )
    mains_hz: Literal[50, 60] | None = Field(
        default=None, description="local mains frequency, so the report can check hum rejection"
    )

    @property
    def rate_hz(self) -> float:
        return 1.0 / self.window_s


class ControlSettings(_Model):
    """The daemon's local control channel (status, activate, rebase, reload requests)."""

    enabled: bool = True
    socket: str | None = Field(
        default=None, description="socket path; unset: control.sock in the per-user runtime folder"
    )
    osc_listen: str | None = Field(
        default=None,
        description="host:port for OSC control messages (activate, rebase) from a phone or "
        "controller; 127.0.0.1 keeps it on this computer. Unset: off",
    )

    @field_validator("osc_listen")
    @classmethod
    def _listen_address(cls, v: str | None) -> str | None:
        if v is not None:
            from .outputs.osc import parse_destination

            parse_destination(v)
        return v


class OutputSettings(_Model):
    """Where readings go. A table that is present is an output that is used."""

    midi: MidiSettings | None = None
    osc: OscSettings | None = None
    midifile: MidiFileSettings | None = None

    def enabled(self) -> dict[str, BaseModel]:
        """Output kind (as in ``bridge.outputs.SINKS``) -> its settings, for those present."""
        return {
            k: v
            for k, v in (("midi", self.midi), ("osc", self.osc), ("midifile", self.midifile))
            if v is not None
        }


class Rig(_Model):
    """The whole ``rig.toml``: the instrument, its outputs and how it is tracked."""

    name: str = Field("", max_length=200, description="a label for logs and status")
    board: BoardSettings = Field(default_factory=BoardSettings)
    source: SourceSettings
    frames: FrameSettings = Field(default_factory=FrameSettings)
    channels: list[ChannelSettings] = Field(min_length=1, max_length=64)
    voices: list[VoiceSettings] = Field(min_length=1, max_length=16)
    outputs: OutputSettings = Field(default_factory=OutputSettings)
    smoothing: SmoothingSettings = Field(default_factory=SmoothingSettings)
    baseline: BaselineSettings = Field(default_factory=BaselineSettings)
    mains_filter: MainsFilterSettings = Field(default_factory=MainsFilterSettings)
    control: ControlSettings | None = None
    sim: SimSettings | None = None

    @model_validator(mode="after")
    def _consistent(self) -> Rig:
        problems = rig_problems(self)
        if problems:
            raise ValueError("\n".join(problems))
        return self

    def channel(self, name: str) -> ChannelSettings:
        for c in self.channels:
            if c.name == name:
                return c
        raise KeyError(name)

    def voice_index(self, name: str) -> int:
        for i, v in enumerate(self.voices):
            if v.name == name:
                return i
        raise KeyError(name)


def rig_problems(rig: Rig) -> list[str]:
    """Everything that does not fit together in a rig, one line each (empty: fine)."""
    out: list[str] = []
    names = [c.name for c in rig.channels]
    for n in sorted({n for n in names if names.count(n) > 1}):
        out.append(f"channels: the name {n!r} is used twice; channel names must differ")
    roles = {c.name: c.role for c in rig.channels}
    refs = [c.name for c in rig.channels if c.role == "reference"]
    if len(refs) > 1:
        out.append(f"channels: at most one channel may be the reference, found {', '.join(refs)}")
    vnames = [v.name for v in rig.voices]
    for n in sorted({n for n in vnames if vnames.count(n) > 1}):
        out.append(f"voices: the name {n!r} is used twice; voice names must differ")
    for i, v in enumerate(rig.voices):
        for key, want in (("pitch_channel", "pitch"), ("volume_channel", "volume")):
            ch = getattr(v, key)
            if ch is None:
                continue
            if ch not in roles:
                out.append(
                    f"voices[{i}].{key}: no channel named {ch!r} (channels: {', '.join(names)})"
                )
            elif roles[ch] != want:
                out.append(
                    f"voices[{i}].{key}: channel {ch!r} has role {roles[ch]!r}, not {want!r}"
                )
    f = rig.frames
    for ch in f.channel_kinds:
        if ch not in roles:
            out.append(f"frames.channel_kinds: no channel named {ch!r}")
    # The kind belongs in [[channels]]; [frames] may repeat it, but then it must agree.
    if f.kind != FrameSettings.model_fields["kind"].default or f.channel_kinds:
        for c in rig.channels:
            if f.kind_of(c.name) != c.kind:
                out.append(
                    f"frames: says channel {c.name!r} reports {f.kind_of(c.name)}s but "
                    f"channels says {c.kind}s; keep the kind in [[channels]] only"
                )
    midi = rig.outputs.midi
    if midi is not None and midi.mode != "mpe" and midi.channel + len(rig.voices) - 1 > 16:
        out.append(
            f"outputs.midi.channel: voice i plays on channel {midi.channel}+i, and "
            f"{len(rig.voices)} voices do not fit below channel 16"
        )
    if rig.sim is not None:
        out += _sim_problems(rig, rig.sim)
    return out


def _sim_problems(rig: Rig, s: SimSettings) -> list[str]:
    """A simulated board must send exactly what the rig expects to read."""
    out = []
    names = [c.name for c in rig.channels]
    if s.names != names:
        out.append(f"sim: the simulated board sends {s.names}, the rig reads {names} (same order)")
    for c in rig.channels:
        if c.kind != s.kind:
            out.append(
                f"sim.kind: the simulated board reports {s.kind}s, channel {c.name!r} {c.kind}s"
            )
            break
    if s.format != rig.frames.format:
        out.append(f"sim.format: {s.format!r} but frames.format is {rig.frames.format!r}")
    if rig.frames.format == "text" and s.text_seq != rig.frames.leading_seq:
        out.append(f"sim.text_seq: {s.text_seq} but frames.leading_seq is {rig.frames.leading_seq}")
    if not math.isclose(s.window_s, rig.board.window_s, rel_tol=1e-9):
        out.append(f"sim.window_s: {s.window_s} but board.window_s is {rig.board.window_s}")
    return out


# ------------------------------------------------------------------------ venue profiles


def _annotation_with_constraints(info: Any) -> Any:
    ann = info.annotation
    if not info.metadata:
        return ann
    args = (ann, *info.metadata)
    return Annotated[args]  # the same as Annotated[ann, *metadata] (3.11 syntax)


@cache
def overrides_model(cls: type[BaseModel]) -> type[BaseModel]:
    """A model with every field of ``cls`` optional: the keys a venue may override.

    Each field keeps its type and range; checks that span several fields run when the
    override is applied to the rig (see :func:`apply_venue`).
    """
    fields: dict[str, Any] = {
        name: (_annotation_with_constraints(info) | None, Field(None, description=info.description))
        for name, info in cls.model_fields.items()
    }
    return create_model(  # type: ignore[call-overload,no-any-return]
        f"{cls.__name__}Overrides", __config__=ConfigDict(extra="forbid"), **fields
    )


PitchOverrides = overrides_model(PitchSettings)
LevelOverrides = overrides_model(LevelSettings)
BaselineOverrides = overrides_model(BaselineSettings)
SmoothingOverrides = overrides_model(SmoothingSettings)


class VoiceOverrides(_Model):
    """This room's changes to one voice's mapping; only the keys given replace the rig's."""

    pitch: PitchOverrides | None = None  # type: ignore[valid-type]
    level: LevelOverrides | None = None  # type: ignore[valid-type]


class VenueProfile(_Model):
    """One ``venues/<name>.toml``: a room's calibration plus optional overrides."""

    created: datetime = Field(description="when the soundcheck was made")
    notes: str = Field("", max_length=20_000, description="free text for the performer")
    rate_hz: float | None = Field(None, gt=0.0, description="frames a second during the soundcheck")
    reference_base: float | None = Field(
        None, gt=0.0, description="the reference channel's reading with no hand near"
    )
    channels: dict[_KEY, ChannelCalibration] = Field(min_length=1)
    voices: dict[_KEY, VoiceOverrides] = Field(default_factory=dict)
    baseline: BaselineOverrides | None = None  # type: ignore[valid-type]
    smoothing: SmoothingOverrides | None = None  # type: ignore[valid-type]

    @classmethod
    def from_calibration(
        cls, cal: RigCalibration, *, notes: str = "", created: datetime | None = None
    ) -> VenueProfile:
        """A new profile from a soundcheck's result (see bridge.soundcheck.fit_rig)."""
        return cls(
            created=created or datetime.now().astimezone().replace(microsecond=0),
            notes=notes,
            rate_hz=cal.rate_hz or None,
            reference_base=cal.reference_base,
            channels=dict(cal.channels),
        )

    def calibration(self) -> RigCalibration:
        """The calibration in the form the daemon's Setup takes."""
        return RigCalibration(
            dict(self.channels), reference_base=self.reference_base, rate_hz=self.rate_hz or 0.0
        )


def override_problems(venue: VenueProfile) -> list[tuple[str, str]]:
    """Field checks of each override that its plain type cannot make (e.g. a note name).

    Each override is tried on the defaults of its settings model; only problems of the
    keys it gives count here (checks across fields need the rig: see venue_problems).
    """
    parts: list[tuple[tuple[Any, ...], BaseModel | None, type[BaseModel]]] = [
        (("baseline",), venue.baseline, BaselineSettings),
        (("smoothing",), venue.smoothing, SmoothingSettings),
    ]
    for name, ov in venue.voices.items():
        parts += [
            (("voices", name, "pitch"), ov.pitch, PitchSettings),
            (("voices", name, "level"), ov.level, LevelSettings),
        ]
    out = []
    for prefix, given, full in parts:
        if given is None:
            continue
        keys = given.model_dump(exclude_unset=True)
        try:
            full.model_validate({**full().model_dump(), **keys})
        except ValidationError as exc:
            for loc, msg in validation_problems(exc, keys, full):
                head = loc.split(".")[0].split("[")[0]
                if head in keys:
                    out.append((loc_text(prefix) + "." + loc, msg))
    return out


def venue_problems(rig: Rig, venue: VenueProfile) -> list[str]:
    """Why ``venue`` cannot be played with ``rig``, one line each (empty: it can)."""
    out: list[str] = []
    for c in rig.channels:
        if c.role in ("pitch", "volume"):
            cal = venue.channels.get(c.name)
            if cal is None:
                out.append(
                    f"channels.{c.name}: no calibration for the {c.role} channel: run a soundcheck"
                )
            elif cal.kind != c.kind:
                out.append(
                    f"channels.{c.name}.kind: calibrated for {cal.kind}s but the rig's channel "
                    f"reports {c.kind}s: run a soundcheck"
                )
        elif c.role == "reference" and venue.reference_base is None:
            out.append(
                f"reference_base: the rig has a reference channel {c.name!r} but no level for it"
            )
    vnames = [v.name for v in rig.voices]
    for name in venue.voices:
        if name not in vnames:
            out.append(
                f"voices.{name}: the rig has no voice {name!r} (voices: {', '.join(vnames)})"
            )
    if not out:
        try:
            _merged(rig, venue)
        except ValidationError as exc:
            out += [
                f"{loc}: {msg}" if loc else msg
                for loc, msg in validation_problems(exc, _merged_data(rig, venue), Rig)
            ]
    return out


def apply_venue(rig: Rig, venue: VenueProfile) -> Rig:
    """The rig as played in this venue: overrides applied and the whole checked again."""
    problems = venue_problems(rig, venue)
    if problems:
        raise ConfigError("the venue profile does not fit the rig:\n" + "\n".join(problems))
    return _merged(rig, venue)


def _merged_data(rig: Rig, venue: VenueProfile) -> dict[str, Any]:
    data = rig.model_dump()
    for name, ov in venue.voices.items():
        i = rig.voice_index(name)
        for part in ("pitch", "level"):
            given = getattr(ov, part)
            if given is not None:
                data["voices"][i][part].update(given.model_dump(exclude_unset=True))
    for part in ("baseline", "smoothing"):
        given = getattr(venue, part)
        if given is not None:
            data[part].update(given.model_dump(exclude_unset=True))
    return data


def _merged(rig: Rig, venue: VenueProfile) -> Rig:
    return Rig.model_validate(_merged_data(rig, venue))


# ------------------------------------------------------------------------ files


def load_rig(path: Path | str) -> Rig:
    """Read and check a rig file; ConfigError names the file and every bad field."""
    return load_model(path, Rig, "rig")


def load_venue(path: Path | str) -> VenueProfile:
    """Read and check a venue profile; ConfigError names the file and every bad field."""
    return load_model(path, VenueProfile, "venue", check=override_problems)


_RIG_HEADER = "fieldbridge rig file: the instrument, its outputs and how it is tracked."
_VENUE_HEADER = "fieldbridge venue profile: one room's calibration and overrides."


def save_rig(path: Path | str, rig: Rig, *, keep_comments: bool = True) -> bool:
    """Write a rig file atomically; returns False when the file already held these values."""
    return save_model(path, rig, "rig", header=_RIG_HEADER, keep_comments=keep_comments)


def save_venue(path: Path | str, venue: VenueProfile, *, keep_comments: bool = True) -> bool:
    """Write a venue profile atomically; returns False when nothing changed."""
    return save_model(
        path,
        venue,
        "venue",
        header=_VENUE_HEADER,
        keep_comments=keep_comments,
        check=override_problems,
    )


# -------------------------------------------------------------------- names and folders


def check_name(name: object) -> str:
    """A venue name that is safe as a file name, folded to lower case; else ConfigError."""
    if not isinstance(name, str):
        raise ConfigError(f"a profile name must be text, not {type(name).__name__}")
    shown = repr(name) if len(name) <= 80 else repr(name[:80]) + "..."
    if not name:
        raise ConfigError("a profile name cannot be empty")
    if len(name) > NAME_MAX:
        raise ConfigError(f"profile name {shown} has {len(name)} characters; at most {NAME_MAX}")
    if "\x00" in name or "/" in name or "\\" in name:
        raise ConfigError(f"profile name {shown} may not contain slashes or NUL characters")
    if name.startswith("."):
        raise ConfigError(f"profile name {shown} may not start with a dot")
    if ".." in name:
        raise ConfigError(f"profile name {shown} may not contain '..'")
    if not _NAME_RE.fullmatch(name):
        raise ConfigError(
            f"profile name {shown} may use only letters a-z, digits 0-9, '.', '_' and '-', "
            "and must start with a letter or digit"
        )
    folded = name.lower()
    if folded.split(".")[0] in _RESERVED:
        raise ConfigError(f"profile name {shown} is reserved by some systems; choose another")
    return folded


def store_root(
    option: Path | str | None = None,
    *,
    system: bool = False,
    environ: Mapping[str, str] | None = None,
) -> Path:
    """The store folder, by the lookup order in the module docstring (not created here)."""
    if option is not None and str(option) != "":
        return Path(option).expanduser()
    env = os.environ if environ is None else environ
    home = env.get(ENV_HOME, "").strip()
    if home:
        return Path(home).expanduser()
    if system:
        return SYSTEM_HOME
    return Path(platformdirs.user_data_dir(APP_NAME, appauthor=False))


# ---------------------------------------------------------------------------- the store


@dataclass(frozen=True)
class VenueSummary:
    """One line of a venue list.

    ``range_pct`` is the smallest oscillator change from far to near over the calibrated
    channels; ``worst_cents_per_count`` the coarsest pitch step (at the far end) over the
    pitch channels, using the voice's span when the rig is known. ``problem`` says why
    the profile cannot be used, if it cannot.
    """

    name: str
    path: Path
    created: datetime | None
    modified: datetime
    active: bool
    range_pct: float | None = None
    worst_cents_per_count: float | None = None
    problem: str | None = None
    unit: str = "count"

    @property
    def quality(self) -> str:
        """A short line such as ``worst 2.6 cents/tick, range 4.5 %``."""
        if self.problem:
            return "unusable: " + self.problem.splitlines()[0]
        parts = []
        if self.worst_cents_per_count is not None:
            parts.append(f"worst {self.worst_cents_per_count:.2g} cents/{self.unit}")
        if self.range_pct is not None:
            parts.append(f"range {self.range_pct:.2g} %")
        return ", ".join(parts) or "no figures"


class Store:
    """The folder holding ``rig.toml``, ``venues/`` and the ``active`` marker.

    Nothing is read or created until a method needs it.
    """

    def __init__(self, root: Path | str) -> None:
        self.root = Path(root)

    @classmethod
    def locate(cls, option: Path | str | None = None, *, system: bool = False) -> Store:
        return cls(store_root(option, system=system))

    def __repr__(self) -> str:
        return f"Store({str(self.root)!r})"

    @property
    def rig_path(self) -> Path:
        return self.root / RIG_FILE

    @property
    def venues_dir(self) -> Path:
        return self.root / VENUES_DIR

    @property
    def active_path(self) -> Path:
        return self.root / ACTIVE_FILE

    def venue_path(self, name: str) -> Path:
        """The file of venue ``name``; refuses names or links that lead out of the store."""
        name = check_name(name)
        path = self.venues_dir / f"{name}.toml"
        folder = self.venues_dir.resolve()
        real = path.resolve()
        if real.parent != folder:
            raise ConfigError(
                f"profile {name!r}: {path} leads to {real}, outside {folder} (a symbolic link?); "
                "refused"
            )
        return path

    # -- the rig

    def load_rig(self) -> Rig:
        if not self.rig_path.exists():
            raise ConfigError(
                f"{self.rig_path}: no rig file yet; copy profiles/rig.toml from the "
                "fieldbridge sources there and edit it for your board"
            )
        return load_rig(self.rig_path)

    def save_rig(self, rig: Rig, *, keep_comments: bool = True) -> bool:
        self.root.mkdir(parents=True, exist_ok=True)
        return save_rig(self.rig_path, rig, keep_comments=keep_comments)

    # -- venues

    def load_venue(self, name: str) -> VenueProfile:
        path = self.venue_path(name)
        if not path.exists():
            known = ", ".join(self.venue_names()) or "none yet"
            raise ConfigError(f"{path}: no venue profile {check_name(name)!r} (venues: {known})")
        return load_venue(path)

    def save_venue(self, name: str, profile: VenueProfile, *, keep_comments: bool = True) -> bool:
        path = self.venue_path(name)
        self.venues_dir.mkdir(parents=True, exist_ok=True)
        return save_venue(path, profile, keep_comments=keep_comments)

    def venue_names(self) -> list[str]:
        """Names of the venue files, sorted; files whose name is not a valid one are skipped."""
        if not self.venues_dir.is_dir():
            return []
        names = []
        for p in sorted(self.venues_dir.glob("*.toml")):
            try:
                name = check_name(p.stem)
            except ConfigError as exc:
                log.warning("%s: ignored: %s", p, exc)
                continue
            if name != p.stem:
                log.warning("%s: ignored: rename it to %s.toml (names are lower case)", p, name)
                continue
            names.append(name)
        return names

    def list_venues(self) -> list[VenueSummary]:
        """Every venue profile with its dates and quality; an unusable one says why."""
        active = self.active
        try:
            rig: Rig | None = self.load_rig() if self.rig_path.exists() else None
        except ConfigError:
            rig = None
        out = []
        for name in self.venue_names():
            path = self.venues_dir / f"{name}.toml"
            try:
                mtime = path.stat().st_mtime
            except OSError:  # a dangling link: its own time, and load_venue says why
                mtime = path.lstat().st_mtime
            modified = datetime.fromtimestamp(mtime).astimezone()
            try:
                venue = load_venue(self.venue_path(name))
            except ConfigError as exc:
                out.append(
                    VenueSummary(name, path, None, modified, name == active, problem=str(exc))
                )
                continue
            problems = venue_problems(rig, venue) if rig is not None else []
            range_pct, cents = _quality(venue, rig)
            kinds = {c.kind for c in venue.channels.values()}
            out.append(
                VenueSummary(
                    name,
                    path,
                    venue.created,
                    modified,
                    name == active,
                    range_pct,
                    cents,
                    "\n".join(problems) or None,
                    "tick" if kinds == {"period"} else "count",
                )
            )
        return out

    # -- the active venue

    @property
    def active(self) -> str | None:
        """The active venue's name, or None (no marker, or a marker that makes no sense)."""
        try:
            text = self.active_path.read_text(encoding="utf-8").strip()
        except FileNotFoundError:
            return None
        except (OSError, UnicodeDecodeError) as exc:
            log.warning("%s: cannot read the active venue: %s", self.active_path, exc)
            return None
        if not text:
            return None
        try:
            return check_name(text)
        except ConfigError as exc:
            log.warning("%s: ignored: %s", self.active_path, exc)
            return None

    def activate(self, name: str) -> VenueProfile:
        """Make ``name`` the active venue after checking it (against the rig, if there is one).

        An invalid profile is refused with the reasons and the active venue stays as it was.
        """
        name = check_name(name)
        keeping = self.active
        stays = f"{keeping!r} stays active" if keeping else "no venue is active"
        try:
            venue = self.load_venue(name)
            if self.rig_path.exists():
                problems = venue_problems(self.load_rig(), venue)
                if problems:
                    raise ConfigError("\n".join(f"{self.venue_path(name)}: {p}" for p in problems))
        except ConfigError as exc:
            raise ConfigError(f"venue {name!r} not activated ({stays}):\n{exc}") from exc
        self.root.mkdir(parents=True, exist_ok=True)
        atomic_write(self.active_path, f"{name}\n".encode(), backup=False)
        return venue

    def compare(self, a: str | VenueProfile, b: str | VenueProfile) -> list[Difference]:
        """Field-by-field differences between two venues (names or loaded profiles)."""
        pa = self.load_venue(a) if isinstance(a, str) else a
        pb = self.load_venue(b) if isinstance(b, str) else b
        return differences(pa, pb)


def _quality(venue: VenueProfile, rig: Rig | None) -> tuple[float | None, float | None]:
    """Smallest range % over the channels; worst far-end cents per count over pitch channels."""
    spans: dict[str, float] = {}
    window_s = 1.0 / venue.rate_hz if venue.rate_hz else 0.01
    if rig is not None:
        window_s = rig.board.window_s
        try:
            played = _merged(rig, venue)
        except (ValidationError, KeyError):
            played = rig
        for v in played.voices:
            spans[v.pitch_channel] = max(spans.get(v.pitch_channel, 0.0), v.pitch.span_semitones)
    ranges, cents = [], []
    for ch, cal in venue.channels.items():
        try:
            rep = resolution_report(cal, window_s=window_s, pitch_span_semitones=spans.get(ch))
        except BridgeError:
            continue
        ranges.append(rep.total_change_pct)
        if ch in spans:
            cents.append(rep.cents_per_count_far)
    return (min(ranges) if ranges else None, max(cents) if cents else None)


__all__ = [
    "ABSENT",
    "ACTIVE_FILE",
    "ENV_HOME",
    "NAME_MAX",
    "RIG_FILE",
    "SCHEMA",
    "SYSTEM_HOME",
    "VENUES_DIR",
    "BaselineOverrides",
    "BoardSettings",
    "ControlSettings",
    "Difference",
    "LevelOverrides",
    "OutputSettings",
    "PitchOverrides",
    "Rig",
    "SmoothingOverrides",
    "Store",
    "VenueProfile",
    "VenueSummary",
    "VoiceOverrides",
    "apply_venue",
    "check_name",
    "differences",
    "load_rig",
    "load_venue",
    "override_problems",
    "overrides_model",
    "rig_problems",
    "save_rig",
    "save_venue",
    "store_root",
    "venue_problems",
]
