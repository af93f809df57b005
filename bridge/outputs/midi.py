"""MIDI output: hand pitch and level in, raw MIDI 1.0 bytes out.

Three layers, each usable alone:

* the protocol table (:data:`MESSAGES`, :data:`CC`, :data:`RPN` and the bend constants):
  every number of the MIDI 1.0 Detailed Specification and of MPE (RP-053) this module
  uses, in one place;
* :class:`MidiVoice`: pure logic, no I/O. It turns ``(note, level, present, t)`` into a
  list of raw messages (``bytes``), sends only changes, caps the rate of each continuous
  stream and never loses a note-off;
* :class:`MidiSink`: the output contract of :mod:`bridge.outputs`; one voice per played
  voice of the rig, bytes written to every port (see :mod:`bridge.outputs.midiports`
  and :mod:`bridge.outputs.midifile`).

Playing modes (``MidiSettings.mode``):

``"slide"``
    One held note, the pitch between notes carried by pitch bend. When the hand leaves
    the bend range the held note moves (see :meth:`MidiVoice._move`).
``"steps"``
    Plain notes: the nearest semitone, changed only when the pitch is past the boundary by
    a hysteresis margin, so a hand resting between two notes does not flutter.
``"mpe"``
    Lower MPE zone: every note gets its own member channel (round robin), with its own
    pitch bend (48 semitones by default), pressure and timbre (CC74).

Safety: a calibration error or a lost sensor can produce a sudden loud tone. The level
ramps in after start and after every :meth:`MidiVoice.silence`, an optional ceiling
limits it, and every exit path ends held notes. Check levels at low volume first.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Sequence
from typing import Any, Literal, NamedTuple, Protocol

from pydantic import BaseModel, ConfigDict, Field, model_validator

from bridge.errors import ConfigError, DeviceError
from bridge.outputs import Sink

log = logging.getLogger(__name__)

# ---------------------------------------------------------------------------------------
# Protocol table. Sources: MIDI 1.0 Detailed Specification (MMA; IEC 63035:2017) and
# MIDI Polyphonic Expression RP-053 v1.0 (MMA/AMEI, 2018). Everything below is built
# from these rows; nothing else in the module spells a status byte or controller number.
# ---------------------------------------------------------------------------------------


class MessageKind(NamedTuple):
    """One channel-voice message layout: status high nibble and total length in bytes."""

    status: int
    size: int


#: Channel-voice messages by name (the names are the ones mido uses, so tests can cross-check).
MESSAGES: dict[str, MessageKind] = {
    "note_off": MessageKind(0x80, 3),  # key, release velocity
    "note_on": MessageKind(0x90, 3),  # key, velocity (velocity 0 means note-off)
    "polytouch": MessageKind(0xA0, 3),  # key, pressure
    "control_change": MessageKind(0xB0, 3),  # controller, value
    "program_change": MessageKind(0xC0, 2),  # program
    "aftertouch": MessageKind(0xD0, 2),  # channel pressure
    "pitchwheel": MessageKind(0xE0, 3),  # LSB, MSB of 0..16383, centre 8192
}

#: Message name by status high nibble (0x8..0xE), for counting and logs.
KIND_BY_NIBBLE: dict[int, str] = {k.status >> 4: name for name, k in MESSAGES.items()}

#: Controller numbers.
CC: dict[str, int] = {
    "data_entry": 6,  # RPN/NRPN value MSB
    "volume": 7,
    "expression": 11,
    "lsb_offset": 32,  # controllers 0-31 are MSBs; n + 32 carries the LSB
    "data_entry_lsb": 38,
    "timbre": 74,  # MPE: third dimension of control ("sound controller 5")
    "rpn_lsb": 100,
    "rpn_msb": 101,
    "all_sound_off": 120,
    "reset_controllers": 121,
    "all_notes_off": 123,
}

#: Registered parameter numbers as (CC101 value, CC100 value).
RPN: dict[str, tuple[int, int]] = {
    "bend_range": (0, 0),  # pitch-bend sensitivity: CC6 semitones, CC38 cents
    "mpe_config": (0, 6),  # MPE configuration message: CC6 = number of member channels
    "null": (127, 127),  # deselect, so stray data entry changes nothing
}

BEND_CENTRE = 8192
BEND_MAX = 16383
#: How often the sink checks that a JACK server under its ports is still the same one.
PORT_CHECK_S = 0.2

#: Release velocity sent with note-off (the spec's default for devices without it).
NOTE_OFF_VELOCITY = 64
#: A DIN link: 31,250 baud, 10 bits a byte, 3 bytes a message: ~1042 messages a second.
DIN_MESSAGES_PER_S = 31250 / 10 / 3
#: MPE: the manager channel of the lower zone is channel 1; members follow it.
MPE_MANAGER = 0


def channel_message(kind: str, channel: int, *data: int) -> bytes:
    """Build one channel message; ``channel`` is 0-based (0..15), data bytes 0..127."""
    spec = MESSAGES[kind]
    return bytes((spec.status | channel, *data))


def cc(channel: int, controller: int, value: int) -> bytes:
    return bytes((MESSAGES["control_change"].status | channel, controller, value))


def rpn(channel: int, name: str, msb: int, lsb: int | None = None) -> list[bytes]:
    """Select RPN ``name``, write its value (CC6, and CC38 when ``lsb`` is given), then null."""
    num_msb, num_lsb = RPN[name]
    out = [
        cc(channel, CC["rpn_msb"], num_msb),
        cc(channel, CC["rpn_lsb"], num_lsb),
        cc(channel, CC["data_entry"], msb),
    ]
    if lsb is not None:
        out.append(cc(channel, CC["data_entry_lsb"], lsb))
    null_msb, null_lsb = RPN["null"]
    out += [cc(channel, CC["rpn_msb"], null_msb), cc(channel, CC["rpn_lsb"], null_lsb)]
    return out


def bend_value(semitones: float, bend_range: float) -> int:
    """Pitch-bend value for an offset in semitones: ``8192 + round(8192*s/R)``, clamped.

    The spec leaves the scale to the receiver's bend sensitivity R; this convention maps
    -R exactly to 0 and +R to 16383 (one step short of 16384).
    """
    v = BEND_CENTRE + round(BEND_CENTRE * semitones / bend_range)
    return 0 if v < 0 else BEND_MAX if v > BEND_MAX else v


def bend_message(channel: int, value: int) -> bytes:
    return bytes((MESSAGES["pitchwheel"].status | channel, value & 0x7F, value >> 7))


# ---------------------------------------------------------------------------------------
# Settings
# ---------------------------------------------------------------------------------------


class MidiSettings(BaseModel):
    """Everything the MIDI output needs; lives in the rig file under the MIDI output."""

    model_config = ConfigDict(extra="forbid")

    # -- where the bytes go (see bridge.outputs.midiports) --
    api: Literal["alsa", "jack"] = "alsa"
    virtual: bool = Field(default=True, description="create our own port client_name:port_name")
    client_name: str = Field(default="fieldbridge", min_length=1)
    port_name: str = Field(default="out", min_length=1)
    connect: list[str] = Field(
        default_factory=list,
        description="existing ports to send to; ALSA's trailing 'client:port' numbers optional",
    )
    close_wait_s: float = Field(
        default=0.1,
        ge=0.0,
        le=5.0,
        description="JACK: time for the last note-offs to leave before the port closes",
    )

    # -- what is played --
    mode: Literal["slide", "steps", "mpe"] = "slide"
    channel: int = Field(
        default=1, ge=1, le=16, description="channel of the first voice; voice i uses channel+i"
    )
    program: int | None = Field(
        default=None, ge=0, le=127, description="program change sent at start"
    )
    bend_range: int = Field(
        default=12, ge=1, le=96, description="semitones; sent as RPN 0 at start"
    )
    move_margin: float = Field(
        default=0.5,
        ge=0.0,
        description="slide/mpe: move the held note when the bend is this close to the range end",
    )
    step_hysteresis_cents: float = Field(default=20.0, ge=0.0, le=49.0)

    # -- level --
    level_out: Literal["cc7", "cc14", "pressure", "velocity-only"] = "cc7"
    controller: int = Field(
        default=11, ge=0, le=119, description="7 volume, 11 expression; cc14 adds n+32"
    )
    level_law: Literal["sqrt", "linear"] = Field(
        default="sqrt",
        description="sqrt: value = full*sqrt(gain), right for a 40*log10(v/127) dB volume response",
    )
    level_ceiling: float = Field(default=1.0, ge=0.0, le=1.0)
    ramp_s: float = Field(
        default=1.0, ge=0.0, description="fade-in time after start and after silence"
    )
    on_level: float = Field(
        default=0.003, ge=0.0, le=1.0, description="note on when level rises above this"
    )
    off_level: float = Field(
        default=0.001, ge=0.0, le=1.0, description="note off when level falls to this"
    )
    off_when_absent: bool = True
    velocity: int | None = Field(
        default=None, ge=1, le=127, description="fixed note-on velocity; None: from level"
    )

    # -- traffic --
    max_rate_hz: float = Field(
        default=500.0, gt=0.0, description="per continuous stream (bend, level, timbre)"
    )
    setup_refresh_s: float | None = Field(
        default=5.0,
        gt=0.0,
        description="repeat the bend range (RPN 0) before a new note when this long since the last",
    )
    din_link: bool = Field(
        default=False, description="share the ~1042 messages/s of a 31,250-baud DIN link"
    )
    din_reserve: float = Field(
        default=0.25, ge=0.0, lt=1.0, description="part of the DIN budget kept for notes"
    )

    # -- MPE (lower zone) --
    mpe_members: int = Field(default=15, ge=1, le=15)
    mpe_bend_range: int = Field(default=48, ge=1, le=96)
    mpe_timbre: int | Literal["level"] = Field(
        default=64, description="CC74 value at note on, or follow the level"
    )

    @model_validator(mode="after")
    def _consistent(self) -> MidiSettings:
        if self.off_level > self.on_level:
            raise ValueError(
                f"off_level {self.off_level} must not be above on_level {self.on_level}"
            )
        if self.level_out == "cc14" and self.controller > 31:
            raise ValueError("cc14 needs a controller 0-31 (its LSB is controller + 32)")
        if isinstance(self.mpe_timbre, int) and not 0 <= self.mpe_timbre <= 127:
            raise ValueError("mpe_timbre must be 0-127 or 'level'")
        bend = self.mpe_bend_range if self.mode == "mpe" else self.bend_range
        if self.move_margin >= bend:
            raise ValueError(f"move_margin {self.move_margin} must be below the bend range {bend}")
        return self


def stream_rate(settings: MidiSettings, voices: int = 1) -> float:
    """Highest update rate (Hz) of one continuous stream, with the DIN budget applied.

    On a DIN link the total is about 1042 messages/s. ``din_reserve`` of it is kept for
    notes; the rest is shared by every stream of every voice, weighted by messages per
    update (a 14-bit controller costs two).
    """
    rate = settings.max_rate_hz
    if settings.din_link:
        weight = 0 if settings.mode == "steps" else 1  # bend
        weight += {"cc7": 1, "cc14": 2, "pressure": 1, "velocity-only": 0}[settings.level_out]
        if settings.mode == "mpe" and settings.mpe_timbre == "level":
            weight += 1
        if weight:
            share = DIN_MESSAGES_PER_S * (1.0 - settings.din_reserve) / (weight * max(1, voices))
            rate = min(rate, share)
    return rate


# ---------------------------------------------------------------------------------------
# Voice logic (pure)
# ---------------------------------------------------------------------------------------


class _Stream:
    """One continuous value (bend, level, timbre): send changes only, at most one per interval.

    A value that arrives too soon is held as ``pending``; the next offer (or :meth:`MidiVoice.flush`)
    after the interval sends the latest value, so the receiver always ends on it.
    """

    __slots__ = ("interval", "sent", "sent_t", "pending")

    def __init__(self, interval: float) -> None:
        self.interval = interval
        self.sent: int | None = None
        self.sent_t = -math.inf
        self.pending: int | None = None

    def offer(self, value: int, t: float) -> bool:
        """True when ``value`` should go out now (and is then recorded as sent)."""
        if value == self.sent:
            self.pending = None
            return False
        if t - self.sent_t >= self.interval or t < self.sent_t:
            self.sent, self.sent_t, self.pending = value, t, None
            return True
        self.pending = value
        return False

    def force(self, value: int, t: float) -> bool:
        """Record ``value`` as sent regardless of the rate; True if it differs from the last."""
        changed = value != self.sent
        self.sent, self.pending = value, None
        if changed:
            self.sent_t = t
        return changed

    def forget(self) -> None:
        """The receiver's value is unknown (new channel, port reopened): send the next one."""
        self.sent, self.pending, self.sent_t = None, None, -math.inf


class MidiVoice:
    """Pure MIDI logic for one played voice: ``(note, level, present, t)`` -> raw messages.

    ``index`` and ``count`` place this voice among the rig's voices: outside MPE voice
    ``i`` plays on ``settings.channel + i``; in MPE the zone's member channels are split
    into ``count`` blocks and voice ``i`` takes block ``i`` (and voice 0 sends the zone
    configuration).

    Every method returns a new list of complete messages, in the order they must be
    sent. :meth:`update` may be called without :meth:`start`; it starts on first use.
    """

    def __init__(self, settings: MidiSettings, *, index: int = 0, count: int = 1) -> None:
        self.s = settings
        self.index = index
        self._mpe = settings.mode == "mpe"
        self._slide = settings.mode != "steps"
        if self._mpe:
            if count > settings.mpe_members:
                raise ConfigError(
                    f"{count} voices need at least {count} MPE member channels; "
                    f"mpe_members is {settings.mpe_members}"
                )
            size, extra = divmod(settings.mpe_members, count)
            first = 1 + index * size + min(index, extra)
            self.channels = list(range(first, first + size + (1 if index < extra else 0)))
            self.range = float(settings.mpe_bend_range)
        else:
            ch = settings.channel - 1 + index
            if ch > 15:
                raise ConfigError(
                    f"voice {index + 1} would need channel {ch + 1}; "
                    f"start at a lower channel (now {settings.channel})"
                )
            self.channels = [ch]
            self.range = float(settings.bend_range)
        self._move_at = self.range - settings.move_margin
        self._step_at = 0.5 + settings.step_hysteresis_cents / 100.0
        interval = 1.0 / stream_rate(settings, count)
        self._bend = _Stream(interval)
        self._level = _Stream(interval)
        self._timbre = _Stream(interval)
        self._level_on = settings.level_out != "velocity-only"
        self._level_full = 16383 if settings.level_out == "cc14" else 127
        self._timbre_follows = self._mpe and settings.mpe_timbre == "level"
        self._sqrt = settings.level_law == "sqrt"
        self.started = False
        self.note: int | None = None  # key of the sounding note
        self.note_channel = self.channels[0]  # channel of the sounding (or last) note
        self._next = 0  # round robin position among member channels
        self._t0: float | None = None  # ramp start
        self._setup_t: float | None = None  # when the bend range was last sent with a note

    # -- lifecycle --------------------------------------------------------------------

    def start(self) -> list[bytes]:
        """Set-up messages: program, bend sensitivity (RPN 0), MPE zone, centred bend, level 0."""
        s = self.s
        out: list[bytes] = []
        if self._mpe and self.index == 0:
            # RP-053: the configuration message is RPN 6 on the manager channel.
            out += rpn(MPE_MANAGER, "mpe_config", s.mpe_members)
            if s.program is not None:
                out.append(channel_message("program_change", MPE_MANAGER, s.program))
        for ch in self.channels:
            if s.program is not None:
                out.append(channel_message("program_change", ch, s.program))
            out += rpn(ch, "bend_range", int(self.range), 0)
            out.append(bend_message(ch, BEND_CENTRE))
            if self._level_on:
                out += self._level_bytes(ch, 0, None)
        self._bend.force(BEND_CENTRE, -math.inf)
        self._level.force(0, -math.inf)
        self._timbre.forget()
        self.started = True
        self._t0 = None
        self._setup_t = None
        return out

    def silence(self) -> list[bytes]:
        """Note-off for the sounding note and level 0. A second call returns nothing."""
        out: list[bytes] = []
        ch = self.note_channel
        if self.note is not None:
            out.append(channel_message("note_off", ch, self.note, NOTE_OFF_VELOCITY))
            self.note = None
        if self._level_on and self._level.sent not in (0, None):
            prev = self._level.sent
            self._level.force(0, self._level.sent_t)
            out += self._level_bytes(ch, 0, prev)
        self._level.pending = self._bend.pending = self._timbre.pending = None
        self._t0 = None  # fade in again when playing resumes
        return out

    def stop(self) -> list[bytes]:
        """Silence, then All Notes Off (CC123) on every channel this voice may use."""
        out = self.silence()
        for ch in self.channels:
            out.append(cc(ch, CC["all_notes_off"], 0))
        self.started = False
        return out

    # -- per frame --------------------------------------------------------------------

    def update(self, note: float, level: float, present: bool, t: float) -> list[bytes]:
        """Messages for one frame: ``note`` fractional MIDI note, ``level`` gain 0..1."""
        out: list[bytes] = [] if self.started else self.start()
        s = self.s
        if not (math.isfinite(note) and math.isfinite(level)) or (
            not present and s.off_when_absent
        ):
            level = 0.0
            gate = False
        else:
            level = 0.0 if level < 0.0 else 1.0 if level > 1.0 else level
            gate = level > (s.off_level if self.note is not None else s.on_level)
        if self._t0 is None:
            self._t0 = t
        if s.ramp_s > 0.0:
            ramp = (t - self._t0) / s.ramp_s
            level *= 0.0 if ramp < 0.0 else 1.0 if ramp > 1.0 else ramp
        level *= s.level_ceiling

        if self.note is not None and not gate:
            ch = self.note_channel
            out.append(channel_message("note_off", ch, self.note, NOTE_OFF_VELOCITY))
            self.note = None
        if not gate:
            if not self._mpe and self._level_on:
                self._offer_level(out, 0, t)
            return out

        target = 0.0 if note < 0.0 else 127.0 if note > 127.0 else note
        value = self._level_value(level)
        if self.note is None:
            self._note_on(out, round(target), target, value, level, t, None)
            return out
        offset = target - self.note
        if self._slide:
            if abs(offset) > self._move_at and round(target) != self.note:
                self._note_on(out, round(target), target, value, level, t, self.note)
                return out
            if self._bend.offer(bend_value(offset, self.range), t):
                out.append(bend_message(self.note_channel, self._bend.sent or 0))
        elif abs(offset) > self._step_at:
            self._note_on(out, round(target), target, value, level, t, self.note)
            return out
        if self._level_on:
            self._offer_level(out, value, t)
        if self._timbre_follows and self._timbre.offer(round(127 * level), t):
            out.append(cc(self.note_channel, CC["timbre"], self._timbre.sent or 0))
        return out

    def flush(self, t: float) -> list[bytes]:
        """Send values held back by the rate cap whose interval has passed by ``t``."""
        out: list[bytes] = []
        ch = self.note_channel
        if self._bend.pending is not None and self._bend.offer(self._bend.pending, t):
            out.append(bend_message(ch, self._bend.sent or 0))
        if self._level.pending is not None:
            prev = self._level.sent
            if self._level.offer(self._level.pending, t):
                out += self._level_bytes(ch, self._level.sent or 0, prev)
        if self._timbre.pending is not None and self._timbre.offer(self._timbre.pending, t):
            out.append(cc(ch, CC["timbre"], self._timbre.sent or 0))
        return out

    # -- helpers ----------------------------------------------------------------------

    def _note_on(
        self,
        out: list[bytes],
        key: int,
        target: float,
        value: int,
        level: float,
        t: float,
        old: int | None,
    ) -> None:
        """Start ``key`` (with everything it needs first), then end ``old`` if given.

        Moving a held note (``old`` set) is legato: the new note-on goes out before the old
        note-off, so a mono synth glides instead of re-triggering its envelope. On one
        channel the bend is shared, so the order of the re-centred bend matters:

        1. bend re-centred for the new key, 2. new note-on, 3. old note-off.

        The new note therefore never sounds at a wrong pitch, not even for one message;
        only the ending note is off by the key difference, for the ~1 ms until its
        note-off (one message time on DIN, the same audio cycle on USB or JACK).
        Sending the bend after the note-on would instead start the new note off by the
        same amount. The sounding pitch, note + bend, is continuous across the move. Moves
        happen only past ``bend_range - move_margin`` and land on the nearest key (bend
        within half a semitone), so the next move is as far away as possible.
        In MPE the new note gets its own member channel and nothing shifts at all.
        """
        old_channel = self.note_channel
        ch = old_channel
        if self._mpe:
            ch = self.channels[self._next % len(self.channels)]
            self._next += 1
            if ch != old_channel:
                self._bend.forget()
                self._level.forget()
                self._timbre.forget()
        self.note_channel = ch
        # A synth connected after start (a patchbay, a restarted synth, a JACK connection
        # that took effect a cycle late) missed the set-up: repeat the bend range before
        # the first note and then at most every `setup_refresh_s` seconds.
        refresh = self.s.setup_refresh_s
        if (
            old is None
            and refresh is not None
            and (self._setup_t is None or not 0.0 <= t - self._setup_t < refresh)
        ):
            out += rpn(ch, "bend_range", int(self.range), 0)
            self._setup_t = t
        if self._level_on:
            prev = self._level.sent
            if self._level.force(value, t):
                out += self._level_bytes(ch, value, prev)
        if self._mpe:
            fixed = self.s.mpe_timbre
            timbre = fixed if isinstance(fixed, int) else round(127 * level)
            if self._timbre.force(timbre, t):
                out.append(cc(ch, CC["timbre"], timbre))
        if self._slide:
            bend = bend_value(target - key, self.range)
            if self._bend.force(bend, t):
                out.append(bend_message(ch, bend))
        out.append(channel_message("note_on", ch, key, self._velocity(level)))
        self.note = key
        if old is not None:
            out.append(channel_message("note_off", old_channel, old, NOTE_OFF_VELOCITY))

    def _offer_level(self, out: list[bytes], value: int, t: float) -> None:
        prev = self._level.sent
        if self._level.offer(value, t):
            out += self._level_bytes(self.note_channel, value, prev)

    def _level_value(self, level: float) -> int:
        g = math.sqrt(level) if self._sqrt else level
        return round(self._level_full * g)

    def _velocity(self, level: float) -> int:
        if self.s.velocity is not None:
            return self.s.velocity
        g = math.sqrt(level) if self._sqrt else level
        v = round(127 * g)
        return 1 if v < 1 else 127 if v > 127 else v

    def _level_bytes(self, ch: int, value: int, prev: int | None) -> list[bytes]:
        """Messages carrying ``value`` given the last value ``prev`` the receiver has."""
        kind = self.s.level_out
        if kind == "pressure":
            return [channel_message("aftertouch", ch, value)]
        n = self.s.controller
        if kind == "cc7":
            return [cc(ch, n, value)]
        # 14-bit: MSB on n, LSB on n + 32. A receiver clears its LSB when a new MSB
        # arrives, so the LSB always follows an MSB; a change within one MSB step needs
        # the LSB alone (MIDI 1.0 Detailed Specification, controller numbers 0-63).
        msb, lsb = value >> 7, value & 0x7F
        if prev is not None and prev >> 7 == msb:
            return [cc(ch, n + CC["lsb_offset"], lsb)]
        return [cc(ch, n, msb), cc(ch, n + CC["lsb_offset"], lsb)]


# ---------------------------------------------------------------------------------------
# The sink
# ---------------------------------------------------------------------------------------


class RawPort(Protocol):
    """Where bytes go: one complete MIDI message per :meth:`send`."""

    name: str

    def send(self, data: bytes) -> None: ...

    def close(self) -> None: ...


class MidiSink(Sink):
    """Readings in, MIDI bytes out to every port.

    ``ports`` hands over ports that are already open (the sink owns them from then on and
    closes them); without it :meth:`open` opens the ports the settings name. ``voices``
    sets the number of played voices up front; otherwise the first reading sets it.

    A port that fails is logged and counted; the sink keeps playing on the others, and on
    close still tries every note-off on every port, message by message.
    """

    kind = "midi"

    def __init__(
        self,
        settings: MidiSettings,
        ports: Sequence[RawPort] | None = None,
        *,
        voices: int | None = None,
    ) -> None:
        self.settings = settings
        self._given = list(ports) if ports is not None else None
        self.ports: list[RawPort] = []
        self._senders: list[tuple[Any, bool]] = []
        self._n_voices = voices
        self.voices: list[MidiVoice] = []
        self._opened = False
        self._last_t: float | None = None
        self._by_nibble = [0] * 16
        self.port_errors: dict[str, int] = {}
        self._jack_ports: list[int] = []
        self._next_check = 0.0
        self.reopened = 0
        self._dirty: set[int] = set()  # ports that failed since their last good send

    # -- contract ---------------------------------------------------------------------

    def open(self) -> None:
        if self._opened:
            return
        if self._given is not None:
            self.ports = self._given
        else:
            from bridge.outputs.midiports import open_ports

            self.ports = open_ports(self.settings)
        self._senders = [(p.send, bool(getattr(p, "timed", False))) for p in self.ports]
        self._jack_ports = [i for i, p in enumerate(self.ports) if getattr(p, "server", None)]
        self._opened = True
        log.info("MIDI output open: %s", ", ".join(p.name for p in self.ports) or "(no ports)")
        if self._n_voices:
            self._setup(self._n_voices)

    def send(self, reading: Any) -> None:
        if not self._opened or self._closed:
            raise DeviceError(
                "MIDI output is not open: call open() first (or use it in a with block)"
            )
        voices = reading.voices
        t = reading.t
        self._last_t = t
        if self._jack_ports:
            now = time.monotonic()
            if now >= self._next_check:
                self._next_check = now + PORT_CHECK_S
                self._check_jack_ports()
        if len(voices) != len(self.voices):
            self._setup(len(voices))
        for v, mv in zip(voices, self.voices):
            msgs = mv.update(v.note, v.level, v.present, t)
            if msgs:
                self._emit(msgs, t)

    def silence(self, reason: str) -> None:
        ended = 0
        for mv in self.voices:
            sounding = mv.note is not None
            msgs = mv.silence()
            if msgs:
                ended += sounding
                self._emit_each(msgs, self._last_t)
        if ended:
            log.info("MIDI silenced (%s): %d note(s) ended", reason, ended)

    def _release(self) -> None:
        for mv in self.voices:
            self._emit_each(mv.stop(), self._last_t)
        for port in self.ports if self._opened else self._given or []:
            try:
                port.close()
            except Exception as exc:  # noqa: BLE001 - a port that cannot close must not block the rest
                log.warning("MIDI port %s did not close cleanly: %s", port.name, exc)
        self.ports, self._senders = [], []
        log.info("MIDI output closed; sent %s", self.counts or "nothing")

    # -- figures ----------------------------------------------------------------------

    @property
    def counts(self) -> dict[str, int]:
        """Messages sent so far by kind (``note_on``, ``pitchwheel``, ...)."""
        return {KIND_BY_NIBBLE[i]: n for i, n in enumerate(self._by_nibble) if n}

    # -- internals --------------------------------------------------------------------

    def _setup(self, count: int) -> None:
        for mv in self.voices:
            self._emit_each(mv.stop(), self._last_t)
        self.voices = [MidiVoice(self.settings, index=i, count=count) for i in range(count)]
        for mv in self.voices:
            self._emit(mv.start(), self._last_t)

    def _make_good(self, t: float | None) -> None:
        """A port that failed may have missed a note-off: once it takes messages again it
        gets All Notes Off (CC123) on every channel the voices use, before anything else."""
        for i in sorted(self._dirty):
            send, timed = self._senders[i]
            try:
                for mv in self.voices:
                    for ch in mv.channels:
                        m = cc(ch, CC["all_notes_off"], 0)
                        send(m, t) if timed else send(m)
            except Exception as exc:  # noqa: BLE001 - still failing: try again next time
                log.debug("MIDI port %s still failing: %s", self.ports[i].name, exc)
                continue
            self._dirty.discard(i)

    def _emit(self, msgs: list[bytes], t: float | None) -> None:
        """Hot path: every message to every port; a failing port costs one log line."""
        if self._dirty:
            self._make_good(t)
        counts = self._by_nibble
        for m in msgs:
            counts[m[0] >> 4] += 1
        for i, (send, timed) in enumerate(self._senders):
            try:
                if timed:
                    for m in msgs:
                        send(m, t)
                else:
                    for m in msgs:
                        send(m)
            except Exception as exc:  # noqa: BLE001 - any port failure is logged, play goes on
                self._port_failed(i, exc)

    def _emit_each(self, msgs: list[bytes], t: float | None) -> None:
        """Like :meth:`_emit`, but a failure skips only one message (note-offs must try)."""
        if self._dirty:
            self._make_good(t)
        counts = self._by_nibble
        for m in msgs:
            counts[m[0] >> 4] += 1
        for i, (send, timed) in enumerate(self._senders):
            for m in msgs:
                try:
                    send(m, t) if timed else send(m)
                except Exception as exc:  # noqa: BLE001
                    self._port_failed(i, exc)

    def _check_jack_ports(self) -> None:
        """Five times a second: a JACK port whose server stopped is counted as failing (its sends
        vanish silently); when a server is back, the port is opened again on it and every
        voice starts over (setup messages, then notes with the level ramping in)."""
        from bridge.outputs.midiports import abandon, jack_server_identity, open_port

        now = jack_server_identity()
        for i in self._jack_ports:
            port = self.ports[i]
            if now == port.server:  # type: ignore[attr-defined]
                continue
            if now is None:
                self._port_failed(i, DeviceError("the JACK server stopped"))
                continue
            try:
                fresh = open_port(self.settings, port.target)  # type: ignore[attr-defined]
            except Exception as exc:  # noqa: BLE001 - the server is still starting: next time
                self._port_failed(i, exc)
                continue
            # The old client belongs to a server that is gone: closing it (or letting it be
            # collected) crashes inside the JACK library, so it is kept, unused, for good.
            abandon(port)
            self.ports[i] = fresh
            self._senders[i] = (fresh.send, bool(getattr(fresh, "timed", False)))
            self.reopened += 1
            log.warning("MIDI port %s reopened on the restarted JACK server", fresh.name)
            self._setup(len(self.voices))  # note offs everywhere, then setup on every port

    def _port_failed(self, i: int, exc: Exception) -> None:
        self._dirty.add(i)
        name = self.ports[i].name
        n = self.port_errors.get(name, 0) + 1
        self.port_errors[name] = n
        if n == 1 or n & (n - 1) == 0:  # 1st, 2nd, 4th, 8th, ... failure: rate-limited log
            log.warning("MIDI port %s failed to send (%d so far): %s", name, n, exc)


__all__ = [
    "BEND_CENTRE",
    "BEND_MAX",
    "CC",
    "DIN_MESSAGES_PER_S",
    "MESSAGES",
    "RPN",
    "MidiSettings",
    "MidiSink",
    "MidiVoice",
    "RawPort",
    "bend_message",
    "bend_value",
    "cc",
    "channel_message",
    "rpn",
    "stream_rate",
]
