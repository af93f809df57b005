"""OSC output: one bundle of float32 messages per reading, over UDP, to any number of hosts.

Address scheme (the prefix is a setting, ``/fieldbridge`` by default)::

    /fieldbridge/voice/<voice>/hz          f   pitch in hertz
    /fieldbridge/voice/<voice>/note        f   fractional MIDI note (69.0 = A4)
    /fieldbridge/voice/<voice>/level       f   linear gain 0..1 (0 = silent)
    /fieldbridge/voice/<voice>/present     i   1 while a hand is detected (optional)
    /fieldbridge/sensor/<channel>/position f   calibrated hand position 0..1
    /fieldbridge/sensor/<channel>/raw      i   the board's count (or period ticks)
    /fieldbridge/sensor/<channel>/c        f   relative added capacitance (optional)
    /fieldbridge/sensor/<channel>/baseline f   hand-absent level (optional)
    /fieldbridge/sensor/<channel>/present  i   (optional)

Levels are clamped to 0..1 (NaN becomes 0) before they leave, and ``silence()`` sends
level 0 for every voice once. A bundle that would exceed ``max_datagram`` (1,400 bytes
by default, to stay under common network MTUs) is split into several bundles.

Encoding follows the Open Sound Control 1.0 specification (M. Wright, CNMAT, 2002):
big-endian int32/float32, NUL-terminated strings padded to a multiple of 4 bytes, a type
tag string starting with ",", and bundles of ``#bundle\\0``, an NTP time tag (the value 1
means "immediately") and size-prefixed elements. The encoder here is small enough to read
in full, and the tests hold it byte-exact to the specification's own examples and to
python-osc's builder.

Hot path. Every message of a bundle has one argument, so for a given set of voices and
channels the datagram's layout never changes: only the values do. The layout is compiled
once into a ``struct.Struct`` whose arguments alternate between fixed byte strings
(element size, address, type tags) and the values, and each reading costs one
``pack_into`` into a preallocated buffer plus one ``sendto`` per destination.

Sockets are unconnected UDP sockets in non-blocking mode. On Linux an unconnected socket
is not told about ICMP "port unreachable", so sending to a port where nothing listens
raises nothing; a *connected* UDP socket would raise ECONNREFUSED on a later send. Other
send errors (no route, a full buffer, a broadcast address without permission) are
counted per destination and logged at a falling rate; they never stop the sink.
"""

from __future__ import annotations

import errno
import ipaddress
import logging
import math
import re
import socket
import struct
import time
from collections.abc import Callable, Sequence
from operator import attrgetter
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

from bridge.errors import ConfigError, DeviceError
from bridge.outputs import Sink

log = logging.getLogger(__name__)

# --- OSC 1.0 encoding ---------------------------------------------------------------------

#: Seconds from the NTP epoch (1900-01-01) to the Unix epoch (1970-01-01), RFC 5905.
NTP_UNIX_OFFSET = 2_208_988_800

#: Time tag value that means "immediately" (OSC 1.0 specification).
IMMEDIATELY = 1

BUNDLE_TAG = b"#bundle\x00"

#: OSC type tag -> struct code of its big-endian payload (OSC 1.0 atomic types).
#: "s" is variable-length and handled by :func:`osc_string`.
ARG_TYPES: dict[str, str] = {"i": "i", "f": "f", "d": "d", "h": "q"}

_FLT_MAX = 3.4028234663852886e38


def osc_string(s: str | bytes) -> bytes:
    """An OSC-string: the bytes, a NUL, and NULs up to a multiple of 4 bytes."""
    b = s.encode("ascii") if isinstance(s, str) else bytes(s)
    return b + b"\x00" * (4 - len(b) % 4)


def osc_blob(b: bytes) -> bytes:
    """An OSC-blob: int32 size, the bytes, NULs up to a multiple of 4 bytes."""
    return struct.pack(">i", len(b)) + b + b"\x00" * (-len(b) % 4)


def _infer_tag(v: Any) -> str:
    if isinstance(v, bool):
        return "i"
    if isinstance(v, int):
        return "i"
    if isinstance(v, str):
        return "s"
    if isinstance(v, (bytes, bytearray)):
        return "b"
    return "f"  # floats and numpy scalars: float32, as python-osc does


def encode_message(address: str, *args: Any, types: str | None = None) -> bytes:
    """One OSC message. Without `types`, ints go as 'i', str 's', bytes 'b', the rest 'f'."""
    tags = types if types is not None else "".join(_infer_tag(a) for a in args)
    if len(tags) != len(args):
        raise ValueError(f"{len(args)} arguments but type tags {tags!r}")
    parts = [osc_string(address), osc_string("," + tags)]
    for tag, v in zip(tags, args):
        if tag == "s":
            parts.append(osc_string(v))
        elif tag == "b":
            parts.append(osc_blob(v))
        elif tag in ARG_TYPES:
            code = ARG_TYPES[tag]
            parts.append(struct.pack(">" + code, float(v) if code in "fd" else int(v)))
        else:
            raise ValueError(f"type tag {tag!r} is not supported here")
    return b"".join(parts)


def encode_bundle(elements: Sequence[bytes], timetag: int = IMMEDIATELY) -> bytes:
    """A bundle of already encoded messages (or bundles) with a 64-bit NTP time tag."""
    parts = [BUNDLE_TAG, struct.pack(">Q", timetag)]
    for e in elements:
        parts.append(struct.pack(">i", len(e)))
        parts.append(e)
    return b"".join(parts)


def ntp_timetag(unix_seconds: float) -> int:
    """64-bit NTP time tag (32 bits of seconds since 1900, 32 of fraction) for a Unix time."""
    whole = math.floor(unix_seconds)
    frac = int((unix_seconds - whole) * 4294967296.0)
    return ((whole + NTP_UNIX_OFFSET) << 32) | min(frac, 0xFFFFFFFF)


# --- settings --------------------------------------------------------------------------------

VoiceField = Literal["hz", "note", "level", "present"]
SensorField = Literal["position", "raw", "c", "baseline", "present"]

#: Field -> OSC type tag. float32 fields go through float() and int32 fields through
#: int(), which also turns numpy scalars and bools into plain numbers. One table serves
#: the address plan, the layout and the per-reading fill.
FIELD_TYPES: dict[str, str] = {
    "hz": "f",
    "note": "f",
    "level": "f",       # also clamped to 0..1, NaN -> 0 (silence)
    "present": "i",     # 1 or 0
    "position": "f",
    "raw": "i",
    "c": "f",
    "baseline": "f",
}

_CONVERT: dict[str, Callable[[Any], Any]] = {"f": float, "i": int}


def _getter(fields: Sequence[str]) -> Callable[[Any], tuple[Any, ...]]:
    """attrgetter that always returns a tuple, even for one field."""
    if len(fields) == 1:
        f = fields[0]
        return lambda o: (getattr(o, f),)
    return attrgetter(*fields)


_ADDRESS_RE = re.compile(r"^(/[!-~]+)+$")
_NOT_IN_ADDRESS = re.compile(r"[^!-~]|[#*,/?\[\]{}]")  # OSC 1.0 reserves these characters


def osc_name(name: str) -> str:
    """A voice or channel name made safe as one OSC address part (reserved chars -> '_')."""
    return _NOT_IN_ADDRESS.sub("_", str(name)) or "_"


def parse_destination(text: str) -> tuple[str, int]:
    """'host:port' or '[ipv6]:port' -> (host, port). Raises ValueError with the fix."""
    t = text.strip()
    m = re.fullmatch(r"\[([0-9A-Fa-f:.%\w]+)\]:(\d+)", t) or re.fullmatch(r"([^:\s]+):(\d+)", t)
    if not m:
        raise ValueError(f"destination {text!r} must look like host:port or [ipv6]:port")
    port = int(m.group(2))
    if not 1 <= port <= 65535:
        raise ValueError(f"destination {text!r}: port must be 1..65535")
    return m.group(1), port


def _default_voice_fields() -> list[VoiceField]:
    return ["hz", "note", "level"]


def _default_sensor_fields() -> list[SensorField]:
    return ["position", "raw"]


class OscSettings(BaseModel):
    """Where OSC goes and what it carries. See the module docstring for the addresses."""

    model_config = ConfigDict(extra="forbid")

    destinations: list[str] = Field(
        default_factory=lambda: ["127.0.0.1:9300"], min_length=1, max_length=16,
        description="host:port (or [ipv6]:port) to send to; every reading goes to each",
    )
    prefix: str = Field(default="/fieldbridge", description="first part of every address")
    voice_fields: list[VoiceField] = Field(default_factory=_default_voice_fields)
    sensor_fields: list[SensorField] = Field(default_factory=_default_sensor_fields)
    bundle: bool = Field(default=True, description="one bundle per reading; false: one datagram a message")
    time_tag: Literal["immediate", "scheduled"] = "immediate"
    schedule_ahead_ms: float = Field(default=10.0, ge=0.0, le=2000.0,
        description="with scheduled time tags: play this long after sending (wall clock)",
    )
    max_datagram: int = Field(default=1400, ge=128, le=65000, description="split bundles above this")

    @field_validator("destinations")
    @classmethod
    def _valid_destinations(cls, v: list[str]) -> list[str]:
        for d in v:
            parse_destination(d)
        return [d.strip() for d in v]

    @field_validator("prefix")
    @classmethod
    def _valid_prefix(cls, v: str) -> str:
        v = v.rstrip("/")
        if v and (not _ADDRESS_RE.match(v) or re.search(r"[#*,?\[\]{}]", v)):
            raise ValueError(
                f"prefix {v!r} must start with '/', and use printable ASCII without spaces "
                "or any of # * , ? [ ] { }"
            )
        if len(v) > 200:
            raise ValueError("prefix is longer than 200 characters")
        return v

    @field_validator("voice_fields", "sensor_fields")
    @classmethod
    def _no_repeats(cls, v: list[str]) -> list[str]:
        if len(set(v)) != len(v):
            raise ValueError("a field is listed twice")
        return v


def address_plan(
    settings: OscSettings, voices: Sequence[str], sensors: Sequence[str]
) -> list[tuple[str, str, str]]:
    """(address, type tag, field) for every message of a reading, in sending order."""
    plan: list[tuple[str, str, str]] = []
    for name in voices:
        base = f"{settings.prefix}/voice/{osc_name(name)}/"
        plan += [(base + f, FIELD_TYPES[f], f) for f in settings.voice_fields]
    for name in sensors:
        base = f"{settings.prefix}/sensor/{osc_name(name)}/"
        plan += [(base + f, FIELD_TYPES[f], f) for f in settings.sensor_fields]
    return plan


# --- compiled layout --------------------------------------------------------------------------


class _Packet:
    """One datagram of a compiled layout: a Struct, its argument list, its buffer."""

    __slots__ = ("args", "buf", "first", "hi", "lo", "struct")

    def __init__(self, statics: list[bytes], codes: list[str], lo: int, bundled: bool) -> None:
        fmt = [">"]
        args: list[Any] = []
        if bundled:
            fmt.append("8sQ")
            args += [BUNDLE_TAG, IMMEDIATELY]
        self.first = len(args) + 1  # index of the first value in args; values every 2nd
        for s, code in zip(statics, codes):
            fmt.append(f"{len(s)}s{code}")
            args += [s, 0]
        self.struct = struct.Struct("".join(fmt))
        self.args = args
        self.buf = bytearray(self.struct.size)
        self.lo, self.hi = lo, lo + len(codes)


class _Layout:
    """A reading's datagrams, compiled for one list of voice and channel names."""

    def __init__(
        self, settings: OscSettings, voices: Sequence[str], sensors: Sequence[str]
    ) -> None:
        self.voice_names = list(voices)
        self.sensor_names = list(sensors)
        plan = address_plan(settings, voices, sensors)
        self.size = len(plan)
        self.values: list[Any] = [0] * self.size
        self.packets: list[_Packet] = []
        # statics[k]: everything of message k before its value; in a bundle the element
        # size comes first (address + tags + 4-byte value).
        room = settings.max_datagram - (16 if settings.bundle else 0)
        cur_s: list[bytes] = []
        cur_c: list[str] = []
        used = 0
        start = 0
        for k, (addr, tag, _field) in enumerate(plan):
            head = osc_string(addr) + osc_string("," + tag)
            if settings.bundle:
                head = struct.pack(">i", len(head) + 4) + head
            need = len(head) + 4
            if need > room:
                raise ConfigError(
                    f"OSC address {addr!r} does not fit in a {settings.max_datagram}-byte "
                    "datagram: shorten the prefix or the name"
                )
            if cur_s and (used + need > room or not settings.bundle):
                self.packets.append(_Packet(cur_s, cur_c, start, settings.bundle))
                cur_s, cur_c, used, start = [], [], 0, k
            cur_s.append(head)
            cur_c.append(ARG_TYPES[tag])
            used += need
        if cur_s:
            self.packets.append(_Packet(cur_s, cur_c, start, settings.bundle))
        vf, sf = settings.voice_fields, settings.sensor_fields
        self.voice_get = _getter(vf) if vf and voices else None
        self.sensor_get = _getter(sf) if sf and sensors else None
        self.voice_conv = tuple(_CONVERT[FIELD_TYPES[f]] for f in vf)
        self.sensor_conv = tuple(_CONVERT[FIELD_TYPES[f]] for f in sf)
        # Where the levels sit in `values` (they are clamped after the fill).
        self.level_slots = [k for k, (_a, _t, f) in enumerate(plan) if f == "level"]


def _safe_value(v: Any) -> Any:
    """A value that packs: finite floats within float32, int32 ints; NaN becomes 0."""
    if isinstance(v, int):
        return max(-2147483648, min(2147483647, v))
    try:
        x = float(v)
    except (TypeError, ValueError):
        return 0
    if math.isnan(x):
        return 0.0
    return max(-_FLT_MAX, min(_FLT_MAX, x))


# --- the sink ---------------------------------------------------------------------------------


class OscSink(Sink):
    """Readings in, OSC bundles out, to every destination in the settings.

    ``datagrams`` counts datagrams handed to the network; ``send_errors`` counts failed
    sends per destination. Neither a send error nor a value that does not fit ever raises.
    """

    kind = "osc"

    def __init__(self, settings: OscSettings) -> None:
        self.settings = settings
        self.datagrams = 0
        self.send_errors: dict[str, int] = {}
        self._socks: dict[int, socket.socket] = {}
        self._targets: list[tuple[socket.socket, Any, str]] = []
        self._layout: _Layout | None = None
        self._opened = False
        self._silent = True
        self._bad_values = 0
        self._scheduled = settings.time_tag == "scheduled"
        self._ahead = settings.schedule_ahead_ms / 1000.0

    # -- contract ---------------------------------------------------------------------

    def open(self) -> None:
        if self._opened:
            return
        targets = []
        for dest in self.settings.destinations:
            host, port = parse_destination(dest)
            try:
                info = socket.getaddrinfo(host, port, type=socket.SOCK_DGRAM)
            except OSError as exc:
                self._close_sockets()
                raise DeviceError(
                    f"OSC destination {dest!r}: cannot resolve host {host!r} ({exc}); "
                    "check the name or use an IP address"
                ) from exc
            # A name like "localhost" may list ::1 first, while most receivers listen on
            # IPv4 only: take an IPv4 address when the name has one.
            v4 = [i for i in info if i[0] == socket.AF_INET]
            family, _type, _proto, _canon, addr = (v4 or info)[0]
            sock = self._socks.get(family)
            if sock is None:
                sock = socket.socket(family, socket.SOCK_DGRAM)
                sock.setblocking(False)
                self._socks[family] = sock
            targets.append((sock, addr, dest))
        # A socket whose every destination is on this computer is bound to the loopback
        # address, so nothing from the network can reach it (an unbound UDP socket binds
        # to all interfaces on its first send).
        for family, sock in self._socks.items():
            addrs = [a for s_, a, _d in targets if s_ is sock]
            if addrs and all(ipaddress.ip_address(a[0].split("%")[0]).is_loopback for a in addrs):
                sock.bind(("127.0.0.1", 0) if family == socket.AF_INET else ("::1", 0))
        self._targets = targets
        self._opened = True
        self._closed = False
        log.info("OSC output open: %s under %s", ", ".join(self.settings.destinations),
                 self.settings.prefix or "/")

    def send(self, reading: Any) -> None:
        if not self._opened:
            raise DeviceError("OSC output is not open: call open() first (or use it in a with block)")
        lay = self._layout
        voices = reading.voices
        sensors = reading.channels
        if lay is None or not self._same_names(lay, voices, sensors):
            lay = self._relayout(voices, sensors)
        try:
            self._fill(lay, voices, sensors)
        except (TypeError, ValueError, OverflowError, AttributeError):
            self._fill_safely(lay, voices, sensors)  # NaN counts, None, stray objects
        for i in lay.level_slots:  # safety: a level never leaves 0..1, NaN is silence
            x = lay.values[i]
            if not 0.0 <= x <= 1.0:
                lay.values[i] = 1.0 if x > 1.0 else 0.0
        self._emit(lay)
        self._silent = False

    def silence(self, reason: str) -> None:
        """Send level 0 (and present 0, if sent) for every voice, once per silence."""
        if self._silent or not self._targets or self._layout is None:
            return  # nothing sounding, not open (or closed), or nothing ever sent
        self._silent = True
        s = self.settings
        msgs = []
        for name in self._layout.voice_names:
            base = f"{s.prefix}/voice/{osc_name(name)}/"
            msgs.append(encode_message(base + "level", 0.0, types="f"))
            if "present" in s.voice_fields:
                msgs.append(encode_message(base + "present", 0, types="i"))
        for dgram in self._split(msgs):
            self._send_all(dgram)
        log.info("OSC silenced (%s): level 0 for %d voice(s)", reason,
                 len(self._layout.voice_names))

    def _release(self) -> None:
        self._close_sockets()
        self._opened = False
        log.info("OSC output closed; %d datagram(s) sent, send errors: %s",
                 self.datagrams, self.send_errors or "none")

    # -- figures ----------------------------------------------------------------------

    def addresses(self) -> list[str]:
        """The addresses of the current layout, in sending order (empty before a reading)."""
        if self._layout is None:
            return []
        return [a for a, _t, _f in address_plan(
            self.settings, self._layout.voice_names, self._layout.sensor_names)]

    # -- internals --------------------------------------------------------------------

    @staticmethod
    def _fill(lay: _Layout, voices: Sequence[Any], sensors: Sequence[Any]) -> None:
        """Hot path: every field of every voice and sensor into lay.values, in plan order."""
        vals = lay.values
        k = 0
        get = lay.voice_get
        if get is not None:
            conv = lay.voice_conv
            for v in voices:
                for c, x in zip(conv, get(v)):
                    vals[k] = c(x)
                    k += 1
        get = lay.sensor_get
        if get is not None:
            conv = lay.sensor_conv
            for ch in sensors:
                for c, x in zip(conv, get(ch)):
                    vals[k] = c(x)
                    k += 1

    def _fill_safely(self, lay: _Layout, voices: Sequence[Any], sensors: Sequence[Any]) -> None:
        """The slow path of :meth:`_fill`: a value that will not convert becomes 0."""
        self._bad_values += 1
        if self._bad_values & (self._bad_values - 1) == 0:
            log.warning("OSC: %d reading(s) carried a value that is not a number; sent 0",
                        self._bad_values)
        k = 0
        for objs, fields in ((voices, self.settings.voice_fields),
                             (sensors, self.settings.sensor_fields)):
            for o in objs:
                for f in fields:
                    conv = _CONVERT[FIELD_TYPES[f]]
                    try:
                        lay.values[k] = conv(getattr(o, f))
                    except (TypeError, ValueError, OverflowError, AttributeError):
                        lay.values[k] = conv(0)
                    k += 1

    @staticmethod
    def _same_names(lay: _Layout, voices: Sequence[Any], sensors: Sequence[Any]) -> bool:
        vn, sn = lay.voice_names, lay.sensor_names
        if len(voices) != len(vn) or len(sensors) != len(sn):
            return False
        for v, name in zip(voices, vn):
            if v.name != name:
                return False
        for c, name in zip(sensors, sn):
            if c.name != name:
                return False
        return True

    def _relayout(self, voices: Sequence[Any], sensors: Sequence[Any]) -> _Layout:
        lay = _Layout(self.settings, [v.name for v in voices], [c.name for c in sensors])
        self._layout = lay
        log.info("OSC layout: %d voice(s), %d sensor(s), %d message(s) in %d datagram(s)",
                 len(voices), len(sensors), lay.size, len(lay.packets))
        return lay

    def _emit(self, lay: _Layout) -> None:
        """Hot path: pack each datagram of the layout in place and send it everywhere."""
        vals = lay.values
        tag = ntp_timetag(time.time() + self._ahead) if self._scheduled else IMMEDIATELY
        for p in lay.packets:
            args = p.args
            args[p.first::2] = vals[p.lo:p.hi]
            if p.first == 3:
                args[1] = tag
            try:
                p.struct.pack_into(p.buf, 0, *args)
            except (struct.error, OverflowError, TypeError):
                self._bad_values += 1
                if self._bad_values & (self._bad_values - 1) == 0:
                    log.warning("OSC: %d reading(s) carried values that do not fit float32/int32; "
                                "sent clamped", self._bad_values)
                args[p.first::2] = [_safe_value(x) for x in vals[p.lo:p.hi]]
                p.struct.pack_into(p.buf, 0, *args)
            self._send_all(p.buf)

    def _send_all(self, dgram: bytes | bytearray) -> None:
        for sock, addr, name in self._targets:
            try:
                sock.sendto(dgram, addr)
                self.datagrams += 1
            except OSError as exc:
                self._send_failed(name, exc)

    def _send_failed(self, name: str, exc: OSError) -> None:
        n = self.send_errors.get(name, 0) + 1
        self.send_errors[name] = n
        if n == 1 or n & (n - 1) == 0:  # 1st, 2nd, 4th, 8th, ... failure: rate-limited log
            why = errno.errorcode.get(exc.errno or 0, "") if exc.errno else ""
            log.warning("OSC send to %s failed (%d so far): %s %s", name, n, why, exc)

    def _split(self, msgs: Sequence[bytes]) -> list[bytes]:
        """Messages -> datagrams under max_datagram (bundles, or one message each)."""
        s = self.settings
        if not s.bundle:
            return list(msgs)
        tag = ntp_timetag(time.time() + self._ahead) if self._scheduled else IMMEDIATELY
        out: list[bytes] = []
        cur: list[bytes] = []
        used = 16
        for m in msgs:
            if cur and used + 4 + len(m) > s.max_datagram:
                out.append(encode_bundle(cur, tag))
                cur, used = [], 16
            cur.append(m)
            used += 4 + len(m)
        if cur:
            out.append(encode_bundle(cur, tag))
        return out

    def _close_sockets(self) -> None:
        for sock in self._socks.values():
            sock.close()
        self._socks.clear()
        self._targets = []


__all__ = [
    "ARG_TYPES",
    "FIELD_TYPES",
    "IMMEDIATELY",
    "NTP_UNIX_OFFSET",
    "OscSettings",
    "OscSink",
    "address_plan",
    "encode_bundle",
    "encode_message",
    "ntp_timetag",
    "osc_blob",
    "osc_name",
    "osc_string",
    "parse_destination",
]
