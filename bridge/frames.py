"""Bytes in, frames of counts out: the board protocol's text and binary decoders.

The board sends one *frame* per counting window: one unsigned integer per channel
(pulses counted in the window, or timer ticks per oscillator period) and, optionally,
a sequence number. docs/protocol.md is the full specification for firmware authors.

Cheat sheet::

    from bridge.frames import TextDecoder, BinaryDecoder, encode_text, encode_binary

    dec = TextDecoder(["pitch", "volume"], synced=True)
    dec.feed(b"5512 5730\\n55")         # -> [Frame(seq=None, values=[5512, 5730])]
    dec.feed(b"10 5731\\r\\n")           # -> [Frame(seq=None, values=[5510, 5731])]
    dec.drops                          # {'bad_crc': 0, 'bad_number': 0, ...}

    raw = encode_binary(7, [5512, 5730])           # COBS packet + b"\\x00"
    BinaryDecoder(2, synced=True).feed(raw)         # -> [Frame(seq=7, values=[5512, 5730])]

Both decoders are pure and feedable: they take bytes in any chunking, never raise on
bad input, resynchronise at the next delimiter (LF for text, 0x00 for binary) and count
every dropped frame by reason (:data:`DROP_REASONS`). Memory is bounded: a line or
packet that grows past its limit is dropped once as ``overlong`` and the rest of it is
discarded up to the next delimiter.

Start of stream: a decoder that is not ``synced`` (the default, and the state after
:meth:`reset`) discards everything up to the first delimiter, because a read that starts
mid-stream (a reopened port, a board reset by DTR) begins with the tail of a frame that
could otherwise parse as a wrong but plausible frame. Pass ``synced=True`` when the
stream is known to start on a frame boundary (a recording, the simulator).
"""

from __future__ import annotations

import binascii
import logging
import struct
from collections.abc import Iterable, Sequence
from typing import Literal, Protocol

from cobs import cobs
from pydantic import BaseModel, ConfigDict, Field

from bridge.errors import ConfigError

__all__ = [
    "DROP_REASONS",
    "MAX_VALUE",
    "BinaryDecoder",
    "Frame",
    "FrameDecoder",
    "FrameSettings",
    "TextDecoder",
    "ValueKind",
    "crc16",
    "encode_binary",
    "encode_text",
    "make_decoder",
]

log = logging.getLogger(__name__)

#: Why a frame was dropped. Every decoder's ``drops`` dict has exactly these keys.
#:
#: - ``bad_crc``: binary packet whose CRC does not match (or too short to hold one).
#: - ``bad_number``: a text field is not a decimal integer in 0..2**32-1 (this includes
#:   negative numbers: a count or a period cannot be negative).
#: - ``field_count``: wrong number of values (a text line, or a binary packet whose CRC
#:   is good but whose length fits another channel count: a configuration mismatch).
#: - ``overlong``: a line or packet longer than the limit; discarded up to the next
#:   delimiter and counted once.
#: - ``seq_gap``: frames missing from the sequence numbers, whatever lost them (the link,
#:   or this decoder dropping them for one of the other reasons).
#: - ``bad_cobs``: a binary packet that is not valid COBS.
#: - ``bad_name``: a ``name=value`` line with an unknown or repeated name, or a field
#:   without a name among named fields.
#: - ``fragment``: the bytes before the first delimiter after start or :meth:`reset`.
DROP_REASONS: tuple[str, ...] = (
    "bad_crc",
    "bad_number",
    "field_count",
    "overlong",
    "seq_gap",
    "bad_cobs",
    "bad_name",
    "fragment",
)

#: Largest value a channel may carry: the range of the binary format's uint32.
MAX_VALUE = 2**32 - 1

#: What a channel's numbers mean: pulses counted per window, or timer ticks per period.
#: The decoders deliver plain ints either way; calibration reads this to know which way
#: a hand moves the reading (DOMAIN.md section 2).
ValueKind = Literal["count", "period"]

# Sequence numbers are compared in serial-number arithmetic (the idea of RFC 1982):
# a jump forward of 1..SEQ_WINDOW is progress with (jump - 1) frames missing; a repeat,
# a step back or a jump further than that is a resync (the board restarted, or the
# numbers wrapped in a way we cannot tell apart), counted in ``resyncs`` and not as loss.
SEQ_WINDOW = 32768
BINARY_SEQ_MODULUS = 65536

_LF = 0x0A
_CR = 0x0D
# Separators other than whitespace become spaces before splitting; bytes.split() with no
# argument then splits on runs of ASCII whitespace (space, \t, \r, \v, \f).
_SEP_TABLE = bytes.maketrans(b",;", b"  ")
# A line made only of these bytes takes the fast path: nothing but unsigned numbers.
_PLAIN_BYTES = b"0123456789 \t\r\x0b\x0c"
_SEPARATOR_CHARS = frozenset(" \t,;")
_NAME_FORBIDDEN = frozenset(" \t\r\n\x0b\x0c,;=#")

MIN_MAX_LINE = 16
MAX_MAX_LINE = 4096
# 62 channels make a 252-byte binary payload (4 + 4 * 62), inside one COBS block of at most
# 254 data bytes: a frame is then at most 4 * n + 6 bytes on the wire.
MAX_CHANNELS = 62

# The binary payload: uint16 seq, N x uint32 values, uint16 CRC, all little-endian.
_SEQ_BYTES = 2
_VALUE_BYTES = 4
_CRC_BYTES = 2
_CRC = struct.Struct("<H")


class Frame:
    """One frame from the board: ``values`` in configured channel order, ``seq`` or None."""

    __slots__ = ("seq", "values")

    def __init__(self, seq: int | None, values: list[int]) -> None:
        self.seq = seq
        self.values = values

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Frame):
            return NotImplemented
        return self.seq == other.seq and self.values == other.values

    __hash__ = None  # type: ignore[assignment]  # mutable, compared by value

    def __repr__(self) -> str:
        return f"Frame(seq={self.seq!r}, values={self.values!r})"


def crc16(data: bytes, crc: int = 0xFFFF) -> int:
    """CRC-16/CCITT-FALSE of ``data``: poly 0x1021, init 0xFFFF, no reflection, xorout 0.

    The standard library's CRC-CCITT (``binascii.crc_hqx``) is this CRC when started
    at 0xFFFF; the CRC RevEng catalogue gives its check value,
    ``crc16(b"123456789") == 0x29B1``.
    """
    return binascii.crc_hqx(data, crc)


class FrameSettings(BaseModel):
    """How the board frames its numbers (part of the rig file, see profiles.py)."""

    model_config = ConfigDict(extra="forbid")

    format: Literal["text", "binary"] = Field(
        default="text",
        description="text: one line of numbers per frame; binary: COBS packets with CRC",
    )
    leading_seq: bool = Field(
        default=False,
        description="text only: each line starts with a sequence number (binary always has one)",
    )
    max_line: int = Field(
        default=256,
        ge=MIN_MAX_LINE,
        le=MAX_MAX_LINE,
        description="text only: longest line in bytes, without its line ending; longer are dropped",
    )
    newline: Literal["lf", "crlf"] = Field(
        default="lf", description="line ending the simulator writes; decoding accepts both"
    )
    kind: ValueKind = Field(
        default="count",
        description="what every channel's numbers are: pulses per window or ticks per period",
    )
    channel_kinds: dict[str, ValueKind] = Field(
        default_factory=dict, description="per-channel exceptions to `kind`, by channel name"
    )

    def kind_of(self, channel: str) -> ValueKind:
        """The value kind of one channel: its own entry in ``channel_kinds``, else ``kind``."""
        return self.channel_kinds.get(channel, self.kind)

    @property
    def newline_bytes(self) -> bytes:
        return b"\r\n" if self.newline == "crlf" else b"\n"


class FrameDecoder(Protocol):
    """What every decoder offers; :func:`make_decoder` returns one of these."""

    drops: dict[str, int]
    frames_ok: int
    resyncs: int
    synced: bool

    def feed(self, data: bytes) -> list[Frame]: ...

    def reset(self, *, synced: bool = False) -> None: ...


class _Decoder:
    """State shared by both decoders: counters, sync flag and sequence tracking."""

    _delim = b"\n"

    def __init__(self, *, synced: bool) -> None:
        self.drops: dict[str, int] = dict.fromkeys(DROP_REASONS, 0)
        self.frames_ok = 0
        self.resyncs = 0
        self.synced = synced
        self._pending = b""
        self._skipping = not synced  # discarding up to the next delimiter
        self._skipped_bytes = False  # something was discarded while not yet synced
        self._last_seq: int | None = None

    def reset(self, *, synced: bool = False) -> None:
        """Forget partial input and sequence history (after a reconnect); keep counters.

        With ``synced=False`` (the default) everything up to the next delimiter is
        discarded, since a new connection usually starts inside a frame.
        """
        self.synced = synced
        self._pending = b""
        self._skipping = not synced
        self._skipped_bytes = False
        self._last_seq = None

    def _skip_to_delimiter(self, data: bytes) -> bytes | None:
        """While skipping: drop bytes up to and including the next delimiter.

        Returns the bytes after it, or None when ``data`` holds no delimiter.
        """
        at = data.find(self._delim)
        if at < 0:
            if not self.synced and data:
                self._skipped_bytes = True
            return None
        if not self.synced:
            self.synced = True
            if at > 0 or self._skipped_bytes:
                self.drops["fragment"] += 1
            self._skipped_bytes = False
        self._skipping = False
        return data[at + 1 :]

    def _track_seq(self, seq: int, modulus: int | None) -> None:
        last = self._last_seq
        self._last_seq = seq
        if last is None:
            return
        step = seq - last
        if modulus is not None:
            step %= modulus
        if step == 1:
            return
        if 1 < step <= SEQ_WINDOW:
            self.drops["seq_gap"] += step - 1
        else:
            self.resyncs += 1


def _check_channel_names(channels: Sequence[str]) -> list[str]:
    names = list(channels)
    if not names:
        raise ConfigError("no channels configured: name at least one channel")
    if len(names) > MAX_CHANNELS:
        raise ConfigError(f"{len(names)} channels configured: at most {MAX_CHANNELS} are supported")
    for name in names:
        if not isinstance(name, str) or not name or _NAME_FORBIDDEN.intersection(name):
            raise ConfigError(
                f"channel name {name!r} cannot appear in a text frame: use a non-empty name "
                "without spaces, tabs, ',', ';', '=' or '#'"
            )
        if not name.isascii():
            raise ConfigError(f"channel name {name!r}: use ASCII letters, digits, '_' or '-'")
    if len(set(names)) != len(names):
        raise ConfigError(f"channel names repeat in {names}: each channel needs its own name")
    return names


class TextDecoder(_Decoder):
    """Decode text frames: one line of unsigned integers per frame.

    A line holds the channel values in configured order, separated by runs of spaces,
    tabs, commas or semicolons, ended by LF or CRLF; or ``name=value`` pairs in any
    order. With ``leading_seq`` the first field is a bare sequence number. Empty lines
    are skipped; lines whose first field starts with ``#`` are the board's comments,
    counted in ``comments``. See docs/protocol.md.
    """

    _delim = b"\n"

    def __init__(
        self,
        channels: Sequence[str],
        *,
        leading_seq: bool = False,
        max_line: int = 256,
        synced: bool = False,
    ) -> None:
        super().__init__(synced=synced)
        names = _check_channel_names(channels)
        if not MIN_MAX_LINE <= max_line <= MAX_MAX_LINE:
            raise ConfigError(f"max_line {max_line}: choose {MIN_MAX_LINE}..{MAX_MAX_LINE} bytes")
        self.channels = names
        self.leading_seq = leading_seq
        self.max_line = max_line
        self.comments = 0
        self._n = len(names)
        self._n_fields = self._n + (1 if leading_seq else 0)
        self._index = {name.encode("ascii"): i for i, name in enumerate(names)}
        self._warned: set[str] = set()

    def feed(self, data: bytes) -> list[Frame]:
        """Decode what ``data`` completes; keep the unfinished line for the next call."""
        out: list[Frame] = []
        if not data:
            return out
        if data.__class__ is not bytes:  # a bytearray or memoryview from a transport
            data = bytes(data)
        data = data.translate(_SEP_TABLE)
        if self._skipping:
            rest = self._skip_to_delimiter(data)
            if rest is None:
                return out
            data = rest
        if self._pending:
            data = self._pending + data
        lines = data.split(b"\n")
        tail = lines.pop()
        # Fast path, inline for speed: a line of plain unsigned numbers with the right
        # field count. int() cannot fail on digits-only fields, and max_line <= 4096 keeps
        # them under its 4300-digit limit. Every other line, including the empty ones,
        # takes _take_line, which applies the same rules to any input.
        take = self._take_line
        n_fields = self._n_fields
        leading_seq = self.leading_seq
        max_line = self.max_line
        for line in lines:
            if len(line) <= max_line and not line.translate(None, _PLAIN_BYTES):
                fields = line.split()
                if len(fields) == n_fields:
                    values = [int(f) for f in fields]
                    if max(values) <= MAX_VALUE:
                        seq = None
                        if leading_seq:
                            seq = values.pop(0)
                            self._track_seq(seq, None)
                        self.frames_ok += 1
                        out.append(Frame(seq, values))
                        continue
            frame = take(line)
            if frame is not None:
                out.append(frame)
        # An unfinished line may still get a CR before its LF, hence the + 1.
        if len(tail) > self.max_line + 1:
            self.drops["overlong"] += 1
            self._pending = b""
            self._skipping = True
        else:
            self._pending = tail
        return out

    def _take_line(self, line: bytes) -> Frame | None:
        """One complete line (LF removed, separators already turned into spaces)."""
        if len(line) > self.max_line and (len(line) > self.max_line + 1 or line[-1] != _CR):
            self.drops["overlong"] += 1
            return None
        fields = line.split()
        if not fields:
            return None
        if fields[0][:1] == b"#":
            self.comments += 1
            return None
        parsed = self._parse_fields(fields)
        if parsed is None:
            return None
        seq, values = parsed
        if seq is not None:
            self._track_seq(seq, None)
        self.frames_ok += 1
        return Frame(seq, values)

    def _parse_fields(self, fields: list[bytes]) -> tuple[int | None, list[int]] | None:
        """Values (and sequence number) of a line that is neither empty nor a comment."""
        seq: int | None = None
        if self.leading_seq:
            seq = _parse_uint(fields[0])
            if seq is None:
                self.drops["bad_number"] += 1
                return None
            fields = fields[1:]
        if any(b"=" in f for f in fields):
            return self._named_fields(seq, fields)
        if len(fields) != self._n:
            self._field_count(len(fields) + (1 if self.leading_seq else 0))
            return None
        values: list[int] = []
        for f in fields:
            v = _parse_uint(f)
            if v is None:
                self.drops["bad_number"] += 1
                return None
            values.append(v)
        return seq, values

    def _named_fields(
        self, seq: int | None, fields: list[bytes]
    ) -> tuple[int | None, list[int]] | None:
        if len(fields) != self._n:
            self._field_count(len(fields) + (1 if self.leading_seq else 0))
            return None
        slots: list[int | None] = [None] * self._n
        for f in fields:
            name, eq, text = f.partition(b"=")
            i = self._index.get(name) if eq else None
            if i is None or slots[i] is not None:
                self.drops["bad_name"] += 1
                self._warn_once(
                    "bad_name",
                    "text frame field %r names no configured channel, or one already given "
                    "(channels %s)",
                    f[:40],
                    self.channels,
                )
                return None
            v = _parse_uint(text)
            if v is None:
                self.drops["bad_number"] += 1
                return None
            slots[i] = v
        return seq, slots  # type: ignore[return-value]  # every slot was filled above

    def _field_count(self, got: int) -> None:
        self.drops["field_count"] += 1
        self._warn_once(
            "field_count",
            "text frame with %d fields where %d were expected (channels %s%s); check the rig's "
            "channel list and leading_seq",
            got,
            self._n_fields,
            self.channels,
            " after a sequence number" if self.leading_seq else "",
        )

    def _warn_once(self, key: str, msg: str, *args: object) -> None:
        # One warning per decoder and reason: the counters carry the rest.
        if key not in self._warned:
            self._warned.add(key)
            log.warning(msg, *args)


def _parse_uint(field: bytes) -> int | None:
    """A decimal unsigned integer in 0..MAX_VALUE, or None. No signs, no underscores."""
    if not field.isdigit() or len(field) > 32:
        return None
    v = int(field)
    return v if v <= MAX_VALUE else None


def _max_encoded(payload_len: int) -> int:
    # COBS adds one code byte per started run of up to 254 non-zero bytes: at most
    # 1 + payload_len // 254 bytes over the payload (Cheshire & Baker 1999).
    return payload_len + 1 + payload_len // 254


class BinaryDecoder(_Decoder):
    """Decode binary frames: COBS packets ended by 0x00, each with seq, values and CRC.

    Payload (before COBS), all little-endian: uint16 seq, ``n_channels`` x uint32 values,
    uint16 CRC-16/CCITT-FALSE over seq and values. Empty packets (0x00 0x00) are idle
    filler and ignored. See docs/protocol.md.
    """

    _delim = b"\x00"

    def __init__(self, n_channels: int, *, synced: bool = False) -> None:
        super().__init__(synced=synced)
        if not 1 <= n_channels <= MAX_CHANNELS:
            raise ConfigError(f"{n_channels} channels: choose 1..{MAX_CHANNELS}")
        self.n_channels = n_channels
        self._payload_len = _SEQ_BYTES + n_channels * _VALUE_BYTES + _CRC_BYTES
        self._body_len = self._payload_len - _CRC_BYTES
        # Packets up to the largest any channel count makes are decoded, so that a board
        # sending more channels than configured shows as field_count, not as overlong.
        self._max_packet = _max_encoded(_SEQ_BYTES + MAX_CHANNELS * _VALUE_BYTES + _CRC_BYTES)
        self._unpack = struct.Struct(f"<H{n_channels}I").unpack_from
        self._warned = False

    def feed(self, data: bytes) -> list[Frame]:
        """Decode what ``data`` completes; keep the unfinished packet for the next call."""
        out: list[Frame] = []
        if not data:
            return out
        if data.__class__ is not bytes:  # a bytearray or memoryview from a transport
            data = bytes(data)
        if self._skipping:
            rest = self._skip_to_delimiter(data)
            if rest is None:
                return out
            data = rest
        if self._pending:
            data = self._pending + data
        packets = data.split(b"\x00")
        tail = packets.pop()
        take = self._take_packet
        for packet in packets:
            if packet:
                frame = take(packet)
                if frame is not None:
                    out.append(frame)
        if len(tail) > self._max_packet:
            self.drops["overlong"] += 1
            self._pending = b""
            self._skipping = True
        else:
            self._pending = tail
        return out

    def _take_packet(self, packet: bytes) -> Frame | None:
        if len(packet) > self._max_packet:
            self.drops["overlong"] += 1
            return None
        try:
            payload = cobs.decode(packet)
        except cobs.DecodeError:
            self.drops["bad_cobs"] += 1
            return None
        n = len(payload)
        # Check the CRC before the length, so that a good packet of another size is told
        # apart (a channel-count mismatch) from damage.
        if n < _SEQ_BYTES + _CRC_BYTES or (
            binascii.crc_hqx(payload[:-_CRC_BYTES], 0xFFFF) != _CRC.unpack_from(payload, n - 2)[0]
        ):
            self.drops["bad_crc"] += 1
            return None
        if n != self._payload_len:
            self.drops["field_count"] += 1
            if not self._warned:
                self._warned = True
                got = (n - _SEQ_BYTES - _CRC_BYTES) / _VALUE_BYTES
                log.warning(
                    "binary frame with %s values where %d channels are configured; check the "
                    "rig's channel list",
                    f"{got:g}",
                    self.n_channels,
                )
            return None
        fields = self._unpack(payload)
        seq = fields[0]
        self._track_seq(seq, BINARY_SEQ_MODULUS)
        self.frames_ok += 1
        return Frame(seq, list(fields[1:]))


def make_decoder(
    settings: FrameSettings, channel_names: Sequence[str], *, synced: bool = False
) -> TextDecoder | BinaryDecoder:
    """The decoder that ``settings.format`` names, for these channels in this order."""
    names = _check_channel_names(channel_names)
    if settings.format == "binary":
        return BinaryDecoder(len(names), synced=synced)
    return TextDecoder(
        names, leading_seq=settings.leading_seq, max_line=settings.max_line, synced=synced
    )


def _check_values(values: Iterable[int]) -> list[int]:
    vals = list(values)
    if not vals:
        raise ValueError("a frame needs at least one value")
    for v in vals:
        if not isinstance(v, int) or isinstance(v, bool) or not 0 <= v <= MAX_VALUE:
            raise ValueError(f"frame value {v!r} is not an integer in 0..{MAX_VALUE}")
    return vals


def encode_text(
    values: Iterable[int],
    *,
    seq: int | None = None,
    names: Sequence[str] | None = None,
    sep: str = " ",
    newline: str = "\n",
) -> bytes:
    """One text frame as a board sends it, line ending included.

    ``names`` (one per value) writes ``name=value`` pairs; ``seq`` writes a leading
    sequence number; ``sep`` is any non-empty mix of space, tab, ',' and ';';
    ``newline`` is ``"\\n"`` or ``"\\r\\n"``. Raises ValueError on values a decoder
    would drop.
    """
    vals = _check_values(values)
    if not sep or not _SEPARATOR_CHARS.issuperset(sep):
        raise ValueError(f"separator {sep!r}: use spaces, tabs, ',' or ';'")
    if newline not in ("\n", "\r\n"):
        raise ValueError(f"newline {newline!r}: use '\\n' or '\\r\\n'")
    if names is None:
        fields = [str(v) for v in vals]
    else:
        checked = _check_channel_names(names)
        if len(checked) != len(vals):
            raise ValueError(f"{len(checked)} names for {len(vals)} values")
        fields = [f"{n}={v}" for n, v in zip(checked, vals)]
    if seq is not None:
        if not isinstance(seq, int) or not 0 <= seq <= MAX_VALUE:
            raise ValueError(f"sequence number {seq!r} is not an integer in 0..{MAX_VALUE}")
        fields.insert(0, str(seq))
    return (sep.join(fields) + newline).encode("ascii")


def encode_binary(seq: int, values: Iterable[int]) -> bytes:
    """One binary frame as a board sends it: COBS(payload) + b"\\x00".

    ``seq`` is taken modulo 65536, as a board's 16-bit counter wraps.
    """
    vals = _check_values(values)
    if len(vals) > MAX_CHANNELS:
        raise ValueError(f"{len(vals)} values: at most {MAX_CHANNELS} fit one frame")
    if not isinstance(seq, int) or seq < 0:
        raise ValueError(f"sequence number {seq!r} is not a non-negative integer")
    body = struct.pack(f"<H{len(vals)}I", seq % BINARY_SEQ_MODULUS, *vals)
    return cobs.encode(body + _CRC.pack(binascii.crc_hqx(body, 0xFFFF))) + b"\x00"
