"""Tests for bridge/frames.py: the board protocol's decoders and encoders.

Outside sources: the COBS vectors come from Cheshire & Baker, "Consistent Overhead Byte
Stuffing", IEEE/ACM Transactions on Networking 7(2), 1999 (as listed in DOMAIN.md section 9);
the CRC-16/CCITT-FALSE parameters and check value from the CRC RevEng catalogue. The rest
checks the protocol as docs/protocol.md specifies it, including that document's own
example frame and C reference code.
"""

from __future__ import annotations

import itertools
import random
import re
import shutil
import subprocess
from collections.abc import Iterable, Sequence
from pathlib import Path

import pydantic
import pytest
from cobs import cobs
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bridge.errors import ConfigError
from bridge.frames import (
    DROP_REASONS,
    MAX_CHANNELS,
    MAX_VALUE,
    BinaryDecoder,
    Frame,
    FrameSettings,
    TextDecoder,
    crc16,
    encode_binary,
    encode_text,
    make_decoder,
)

PROTOCOL_DOC = Path(__file__).resolve().parents[1] / "docs" / "protocol.md"
NAMES = ["pitch", "volume"]

# COBS reference vectors [paper: Cheshire & Baker 1999, via DOMAIN.md section 9]:
# payload -> packet including the 0x00 delimiter.
COBS_VECTORS = [
    ("00", "01 01 00"),
    ("11 22 00 33", "03 11 22 02 33 00"),
    ("11 00 00 00", "02 11 01 01 01 00"),
]


# --- helpers -------------------------------------------------------------------------


def reference_crc16(data: bytes) -> int:
    """Bit-by-bit CRC written from the catalogue parameters, independent of binascii.

    CRC-16/CCITT-FALSE [std: CRC RevEng catalogue]: width 16, poly 0x1021, init 0xFFFF,
    refin false, refout false, xorout 0x0000.
    """
    crc = 0xFFFF
    for byte in data:
        for bit in range(7, -1, -1):
            top = (crc >> 15) & 1
            crc = (crc << 1) & 0xFFFF
            if top ^ ((byte >> bit) & 1):
                crc ^= 0x1021
    return crc


def manual_payload(seq: int, values: Sequence[int]) -> bytes:
    """The binary payload laid out byte by byte from the table in docs/protocol.md."""
    out = bytearray([seq & 0xFF, (seq >> 8) & 0xFF])
    for v in values:
        out += bytes([v & 0xFF, (v >> 8) & 0xFF, (v >> 16) & 0xFF, (v >> 24) & 0xFF])
    crc = reference_crc16(bytes(out))
    out += bytes([crc & 0xFF, crc >> 8])
    return bytes(out)


def feed_chunks(decoder: TextDecoder | BinaryDecoder, chunks: Iterable[bytes]) -> list[Frame]:
    frames: list[Frame] = []
    for chunk in chunks:
        frames.extend(decoder.feed(chunk))
    return frames


def split_at(data: bytes, cuts: Iterable[int]) -> list[bytes]:
    points = sorted({min(max(c, 0), len(data)) for c in cuts} | {0, len(data)})
    return [data[a:b] for a, b in itertools.pairwise(points)]


def state(decoder: TextDecoder | BinaryDecoder, frames: list[Frame]) -> tuple[object, ...]:
    return (
        [(f.seq, f.values) for f in frames],
        dict(decoder.drops),
        decoder.frames_ok,
        decoder.resyncs,
        getattr(decoder, "comments", None),
        decoder.synced,
    )


def is_subsequence(wanted: Sequence[Frame], got: Sequence[Frame]) -> bool:
    it = iter(got)
    return all(any(w == g for g in it) for w in wanted)


def nonzero(drops: dict[str, int]) -> dict[str, int]:
    return {k: v for k, v in drops.items() if v}


values_st = st.lists(st.integers(0, MAX_VALUE), min_size=2, max_size=2)
sep_st = st.sampled_from([" ", "\t", ",", ";", ", ", " ; ", "\t,"])


# --- CRC and COBS against the published references -------------------------------------


def test_crc_check_value() -> None:
    # CRC-16/CCITT-FALSE check value 0x29B1 [std: CRC RevEng catalogue]
    assert crc16(b"123456789") == 0x29B1
    assert reference_crc16(b"123456789") == 0x29B1


@given(st.binary(max_size=300))
def test_crc_matches_bitwise_reference(data: bytes) -> None:
    assert crc16(data) == reference_crc16(data)


@pytest.mark.parametrize(("payload", "wire"), COBS_VECTORS)
def test_cobs_vectors(payload: str, wire: str) -> None:
    # [paper: Cheshire & Baker 1999, vectors as listed in DOMAIN.md section 9]
    raw, packet = bytes.fromhex(payload), bytes.fromhex(wire)
    assert cobs.encode(raw) + b"\x00" == packet
    assert cobs.decode(packet[:-1]) == raw


# --- binary layout and the document's example -------------------------------------------


@given(st.integers(0, 0xFFFF), st.lists(st.integers(0, MAX_VALUE), min_size=1, max_size=8))
def test_binary_layout_matches_spec_table(seq: int, values: list[int]) -> None:
    packet = encode_binary(seq, values)
    assert packet.endswith(b"\x00") and packet.count(0) == 1
    assert cobs.decode(packet[:-1]) == manual_payload(seq, values)
    # 4n + 6 bytes on the wire for n <= 62 (one COBS block), as docs/protocol.md states
    assert len(packet) == 4 * len(values) + 6


def test_binary_seq_wraps_at_16_bits() -> None:
    assert encode_binary(65536 + 5, [1]) == encode_binary(5, [1])


def _doc_example() -> tuple[int, list[int], bytes]:
    text = PROTOCOL_DOC.read_text(encoding="utf-8")
    m = re.search(
        r"<!-- example-frame: seq=(\d+) values=([\d,]+) -->\s*```\s*\n([0-9a-f ]+)\n```", text
    )
    assert m, "docs/protocol.md lost its example-frame block"
    return int(m.group(1)), [int(v) for v in m.group(2).split(",")], bytes.fromhex(m.group(3))


def test_doc_example_frame_is_what_the_code_sends() -> None:
    seq, values, wire = _doc_example()
    assert encode_binary(seq, values) == wire
    assert cobs.decode(wire[:-1]) == manual_payload(seq, values)
    dec = BinaryDecoder(len(values), synced=True)
    assert dec.feed(wire) == [Frame(seq, values)]
    # The CRC the document prints beside the example
    body = manual_payload(seq, values)[:-2]
    assert f"0x{reference_crc16(body):04X}" in PROTOCOL_DOC.read_text(encoding="utf-8")


C_MAIN = r"""
#include <stdio.h>
#include <string.h>

static int hexval(int c) { return c <= '9' ? c - '0' : (c | 0x20) - 'a' + 10; }

int main(void)
{
    static char line[4096];
    static uint8_t in[2048], out[2100];
    printf("%04X\n", fb_crc16((const uint8_t *)"123456789", 9));
    uint32_t values[2] = { 5512u, 48000u };
    size_t n = fb_build_frame(1, values, 2, out);
    for (size_t i = 0; i < n; i++) printf("%02x", out[i]);
    printf("\n");
    while (fgets(line, sizeof line, stdin)) {
        size_t len = strcspn(line, "\r\n") / 2;
        for (size_t i = 0; i < len; i++)
            in[i] = (uint8_t)(hexval(line[2 * i]) * 16 + hexval(line[2 * i + 1]));
        printf("%04X ", fb_crc16(in, len));
        n = fb_cobs_encode(in, len, out);
        for (size_t i = 0; i < n; i++) printf("%02x", out[i]);
        printf("\n");
    }
    return 0;
}
"""


def test_doc_c_reference_code(tmp_path: Path) -> None:
    """Compile the C snippet from docs/protocol.md and compare it with the Python side."""
    cc = shutil.which("cc") or shutil.which("gcc")
    if cc is None:
        pytest.skip("no C compiler on this machine: the document's C code was not checked")
    text = PROTOCOL_DOC.read_text(encoding="utf-8")
    m = re.search(r"<!-- c-reference -->\s*```c\n(.*?)```", text, re.DOTALL)
    assert m, "docs/protocol.md lost its c-reference block"
    src = tmp_path / "ref.c"
    src.write_text(m.group(1) + C_MAIN, encoding="utf-8")
    exe = tmp_path / "ref"
    subprocess.run(
        [cc, "-std=c99", "-Wall", "-Wextra", "-pedantic", "-Werror", "-o", str(exe), str(src)],
        check=True,
        capture_output=True,
        timeout=60,
    )
    rng = random.Random(20240611)
    inputs = [bytes.fromhex(p) for p, _ in COBS_VECTORS] + [b"", b"\x01" * 253]
    # COBS block edges: 254 and 255 non-zero bytes, runs around 254 with zeros between
    inputs += [b"\x07" * 254, b"\x07" * 255, b"\x07" * 508 + b"\x00", b"\x00" * 5]
    inputs += [
        bytes(rng.choice((0, rng.randrange(1, 256))) for _ in range(rng.randrange(0, 600)))
        for _ in range(200)
    ]
    run = subprocess.run(
        [str(exe)],
        input="".join(b.hex() + "\n" for b in inputs),
        capture_output=True,
        text=True,
        check=True,
        timeout=60,
    )
    lines = run.stdout.splitlines()
    # CRC-16/CCITT-FALSE check value 0x29B1 [std: CRC RevEng catalogue]
    assert lines[0] == "29B1"
    assert bytes.fromhex(lines[1]) == encode_binary(1, [5512, 48000]) == _doc_example()[2]
    assert len(lines) == 2 + len(inputs)
    for data, line in zip(inputs, lines[2:]):
        crc_hex, packet_hex = line.split(" ")
        assert int(crc_hex, 16) == reference_crc16(data)
        assert bytes.fromhex(packet_hex) == cobs.encode(data) + b"\x00"
    # The COBS vectors [paper: Cheshire & Baker 1999] through the C encoder as well
    for (_, wire), line in zip(COBS_VECTORS, lines[2:]):
        assert bytes.fromhex(line.split(" ")[1]) == bytes.fromhex(wire)


# --- round trips ------------------------------------------------------------------------


@given(
    values_st,
    st.one_of(st.none(), st.integers(0, MAX_VALUE)),
    st.booleans(),
    sep_st,
    st.sampled_from(["\n", "\r\n"]),
)
def test_text_round_trip(
    values: list[int], seq: int | None, named: bool, sep: str, newline: str
) -> None:
    line = encode_text(values, seq=seq, names=NAMES if named else None, sep=sep, newline=newline)
    dec = TextDecoder(NAMES, leading_seq=seq is not None, synced=True)
    assert dec.feed(line) == [Frame(seq, values)]
    assert dec.frames_ok == 1 and not nonzero(dec.drops)


@given(
    st.integers(0, 0xFFFF), st.lists(st.integers(0, MAX_VALUE), min_size=1, max_size=MAX_CHANNELS)
)
def test_binary_round_trip(seq: int, values: list[int]) -> None:
    dec = BinaryDecoder(len(values), synced=True)
    assert dec.feed(encode_binary(seq, values)) == [Frame(seq, values)]
    assert not nonzero(dec.drops)


def test_named_pairs_in_any_order_come_out_in_channel_order() -> None:
    dec = TextDecoder(["a", "b", "c"], synced=True)
    assert dec.feed(b"c=3 a=1 b=2\nb=5,c=6;a=4\n") == [
        Frame(None, [1, 2, 3]),
        Frame(None, [4, 5, 6]),
    ]


# --- text details -----------------------------------------------------------------------


@pytest.mark.parametrize(
    "line",
    [
        b"5512 48000\n",
        b"5512 48000\r\n",
        b"5512\t48000\n",
        b"5512,48000\n",
        b"5512;48000\n",
        b"5512 , 48000\n",
        b"  5512  48000  \n",
        b",5512,48000,\r\n",
        b"volume=48000 pitch=5512\r\n",
        b"pitch=5512;volume=48000\n",
    ],
)
def test_text_separators_and_line_endings(line: bytes) -> None:
    dec = TextDecoder(NAMES, synced=True)
    assert dec.feed(line) == [Frame(None, [5512, 48000])]
    assert not nonzero(dec.drops)


@pytest.mark.parametrize(
    ("line", "reason"),
    [
        (b"5512 -3\n", "bad_number"),  # a count cannot be negative
        (b"5512 4294967296\n", "bad_number"),  # one over uint32
        (b"4294967296 1\n", "bad_number"),
        (b"5512 +3\n", "bad_number"),
        (b"5512 1_000\n", "bad_number"),
        (b"5512 0x20\n", "bad_number"),
        (b"5512 12.5\n", "bad_number"),
        (b"5512 \xff\xfe\n", "bad_number"),
        (b"pitch=5512 volume=-1\n", "bad_number"),
        (b"5512\n", "field_count"),
        (b"1 2 3\n", "field_count"),
        (b"pitch=1\n", "field_count"),
        (b"pitch=1 volume=2 extra=3\n", "field_count"),
        (b"pitch=1 vol=2\n", "bad_name"),
        (b"pitch=1 pitch=2\n", "bad_name"),
        (b"pitch=1 2\n", "bad_name"),
        (b"=1 volume=2\n", "bad_name"),
    ],
)
def test_text_bad_lines_are_dropped_by_reason(line: bytes, reason: str) -> None:
    dec = TextDecoder(NAMES, synced=True)
    assert dec.feed(line + b"1 2\n") == [Frame(None, [1, 2])]
    assert nonzero(dec.drops) == {reason: 1}


def test_text_largest_value_passes() -> None:
    dec = TextDecoder(NAMES, synced=True)
    assert dec.feed(b"0 4294967295\n") == [Frame(None, [0, MAX_VALUE])]


def test_text_empty_lines_and_comments() -> None:
    dec = TextDecoder(NAMES, synced=True)
    frames = dec.feed(b"\n\r\n  \n,;\n# board ready, v3\n  #x=1\n1 2\n")
    assert frames == [Frame(None, [1, 2])]
    assert dec.comments == 2
    assert not nonzero(dec.drops)


@pytest.mark.parametrize("chunk", [1, 7, 10_000])
def test_overlong_line_dropped_and_counted_once(chunk: int) -> None:
    dec = TextDecoder(NAMES, max_line=16, synced=True)
    data = b"1 2\n" + b"9" * 1000 + b"\n3 4\n"
    frames = feed_chunks(dec, split_at(data, range(0, len(data), chunk)))
    assert frames == [Frame(None, [1, 2]), Frame(None, [3, 4])]
    assert nonzero(dec.drops) == {"overlong": 1}


def test_overlong_partial_line_is_not_stored() -> None:
    dec = TextDecoder(NAMES, max_line=16, synced=True)
    for _ in range(1000):
        dec.feed(b"1234567890" * 10)
    assert len(dec._pending) <= 17  # bounded while the line never ends
    assert dec.drops["overlong"] == 1
    assert dec.feed(b"\n5 6\n") == [Frame(None, [5, 6])]


def test_max_line_boundary_ignores_the_line_ending() -> None:
    dec = TextDecoder(NAMES, max_line=16, synced=True)
    exact = b"1234567 12345678"  # 16 bytes
    assert len(exact) == 16
    frames = dec.feed(exact + b"\n" + exact + b"\r\n" + b"1234567 123456789\n")
    assert frames == [Frame(None, [1234567, 12345678])] * 2
    assert nonzero(dec.drops) == {"overlong": 1}


def test_text_sequence_gaps_and_resyncs_counted_exactly() -> None:
    dec = TextDecoder(NAMES, leading_seq=True, synced=True)
    seqs = [1, 2, 5, 6, 10, 3, 4, 4, 100_000]
    frames = dec.feed(b"".join(encode_text([7, 8], seq=s) for s in seqs))
    assert [f.seq for f in frames] == seqs
    # missing: 3, 4 (2) and 7, 8, 9 (3); then 10 -> 3 is a resync, 4 -> 4 a repeat,
    # 4 -> 100000 a jump past the 32768 window: three resyncs, no loss counted
    assert dec.drops["seq_gap"] == 5
    assert dec.resyncs == 3


def test_text_gap_across_dropped_line() -> None:
    dec = TextDecoder(NAMES, leading_seq=True, synced=True)
    frames = dec.feed(b"1 10 20\n2 10 x\n3 10 20\n")
    assert [f.seq for f in frames] == [1, 3]
    assert nonzero(dec.drops) == {"bad_number": 1, "seq_gap": 1}


# --- binary details ---------------------------------------------------------------------


def _frames(n: int, channels: int = 2, start: int = 0) -> list[tuple[int, list[int]]]:
    rng = random.Random(n * 1000 + channels + start)
    return [(start + i, [rng.randrange(0, 2**32) for _ in range(channels)]) for i in range(n)]


def test_binary_sequence_wrap_is_not_a_gap() -> None:
    dec = BinaryDecoder(1, synced=True)
    seqs = [65534, 65535, 0, 1, 3, 3, 2, 2 + 40_000]
    frames = dec.feed(b"".join(encode_binary(s, [5]) for s in seqs))
    assert [f.seq for f in frames] == seqs
    # 1 -> 3 misses one frame; 3 -> 3, 3 -> 2 and a jump of 40000 (past 32768) are resyncs
    assert dec.drops["seq_gap"] == 1
    assert dec.resyncs == 3
    dec.feed(encode_binary(2 + 40_000 + 3, [5]))  # two missing after the resync point
    assert dec.drops["seq_gap"] == 3


def test_binary_gap_counted_modulo_65536() -> None:
    dec = BinaryDecoder(1, synced=True)
    dec.feed(encode_binary(65530, [1]) + encode_binary(4, [1]))  # 65531..65535, 0..3 missing
    assert dec.drops["seq_gap"] == 9


def test_binary_bad_crc_counted_exactly() -> None:
    """Damage inside the payload before COBS: the packet frames fine, the CRC fails."""
    good = _frames(10)
    damaged = {2, 5, 8}
    stream = b""
    for seq, values in good:
        payload = manual_payload(seq, values)
        if seq in damaged:
            # flip bits of one count byte; CRC-16 detects every error burst of 16 bits or
            # less [book: any CRC of degree 16 with a non-zero constant term, common practice]
            payload = payload[:4] + bytes([payload[4] ^ 0x5A]) + payload[5:]
        stream += cobs.encode(payload) + b"\x00"
    dec = BinaryDecoder(2, synced=True)
    frames = dec.feed(stream)
    assert frames == [Frame(s, v) for s, v in good if s not in damaged]
    assert nonzero(dec.drops) == {"bad_crc": 3, "seq_gap": 3}
    assert dec.frames_ok == 7


def test_binary_bad_cobs_counted_exactly() -> None:
    """A first code byte pointing past the packet end cannot be valid COBS."""
    good = _frames(10, start=100)
    broken = {101, 104, 109}
    stream = b""
    for seq, values in good:
        packet = encode_binary(seq, values)
        if seq in broken:
            packet = b"\xff" + packet[1:]  # 14-byte packet: a 255 code needs 254 more bytes
        stream += packet
    dec = BinaryDecoder(2, synced=True)
    frames = dec.feed(stream)
    assert frames == [Frame(s, v) for s, v in good if s not in broken]
    # 109 is the last frame: no later frame shows it missing
    assert nonzero(dec.drops) == {"bad_cobs": 3, "seq_gap": 2}


def test_binary_other_channel_count_is_field_count() -> None:
    dec = BinaryDecoder(2, synced=True)
    many = encode_binary(1, [1] * MAX_CHANNELS)
    frames = dec.feed(
        encode_binary(1, [1, 2, 3]) + many + encode_binary(2, [4]) + encode_binary(3, [5, 6])
    )
    assert frames == [Frame(3, [5, 6])]
    # no good frame before seq 3, so no gap can be counted yet
    assert nonzero(dec.drops) == {"field_count": 3}


def test_binary_short_and_idle_packets() -> None:
    dec = BinaryDecoder(2, synced=True)
    good = encode_binary(0, [1, 2])
    # 00 00 00: idle filler; 01 01 00 decodes to one zero byte: too short for seq + CRC
    frames = dec.feed(b"\x00\x00" + good + b"\x00" + b"\x01\x01\x00" + good)
    assert frames == [Frame(0, [1, 2])] * 2
    assert nonzero(dec.drops) == {"bad_crc": 1}
    assert dec.resyncs == 1  # the repeated seq


@pytest.mark.parametrize("chunk", [1, 5, 10_000])
def test_binary_overlong_packet_counted_once(chunk: int) -> None:
    dec = BinaryDecoder(2, synced=True)
    data = encode_binary(0, [1, 2]) + b"\x55" * 500 + b"\x00" + encode_binary(1, [3, 4])
    frames = feed_chunks(dec, split_at(data, range(0, len(data), chunk)))
    assert frames == [Frame(0, [1, 2]), Frame(1, [3, 4])]
    assert nonzero(dec.drops) == {"overlong": 1}
    assert len(dec._pending) == 0


# --- start of stream, reset -------------------------------------------------------------


def test_text_not_synced_discards_the_first_fragment() -> None:
    dec = TextDecoder(NAMES)
    assert dec.synced is False
    assert dec.feed(b"12 48000\n5512 48001\n") == [Frame(None, [5512, 48001])]
    assert dec.synced is True
    assert nonzero(dec.drops) == {"fragment": 1}


def test_text_stream_that_starts_on_a_delimiter_loses_nothing() -> None:
    dec = TextDecoder(NAMES)
    assert dec.feed(b"\n5512 48000\n") == [Frame(None, [5512, 48000])]
    assert not nonzero(dec.drops)


def test_text_synced_keeps_the_first_line() -> None:
    dec = TextDecoder(NAMES, synced=True)
    assert dec.feed(b"12 48000\n") == [Frame(None, [12, 48000])]


def test_reset_forgets_partial_line_and_sequence() -> None:
    dec = TextDecoder(NAMES, leading_seq=True, synced=True)
    assert dec.feed(b"1 10 20\n2 10") == [Frame(1, [10, 20])]
    dec.reset()
    assert dec.synced is False
    # the new connection starts mid-line; its first full line has seq 50: no gap counted
    assert dec.feed(b"0 30\n50 11 21\n") == [Frame(50, [11, 21])]
    assert nonzero(dec.drops) == {"fragment": 1}
    assert dec.frames_ok == 2  # counters survive reset
    dec.reset(synced=True)
    assert dec.feed(b"7 1 2\n") == [Frame(7, [1, 2])]
    assert dec.resyncs == 0 and dec.drops["seq_gap"] == 0


def test_binary_not_synced_and_reset() -> None:
    dec = BinaryDecoder(2)
    stream = b"".join(encode_binary(s, v) for s, v in _frames(3))
    # joined mid-packet: bytes 5.. of frame 0 are a fragment, frames 1 and 2 come out
    assert dec.feed(stream[5:]) == [Frame(s, v) for s, v in _frames(3)[1:]]
    assert nonzero(dec.drops) == {"fragment": 1}
    dec.feed(stream[:7])
    dec.reset()
    assert dec.feed(stream) == [Frame(s, v) for s, v in _frames(3)[1:]]
    assert nonzero(dec.drops) == {"fragment": 2}
    dec.reset(synced=True)
    assert dec.feed(stream) == [Frame(s, v) for s, v in _frames(3)]


# --- properties: chunking, garbage, recovery --------------------------------------------


def text_piece() -> st.SearchStrategy[bytes]:
    good = st.builds(
        lambda v, s, named, sep, nl: encode_text(
            v, seq=s, names=NAMES if named else None, sep=sep, newline=nl
        ),
        values_st,
        st.one_of(st.none(), st.integers(0, 40)),
        st.booleans(),
        sep_st,
        st.sampled_from(["\n", "\r\n"]),
    )
    special = st.sampled_from(
        [b"# hello\n", b"\n", b"\r\n", b"9" * 300 + b"\n", b"1 -2 3\n", b"1 2\n", b"x=1 y=2\n"]
    )
    return st.one_of(good, good, special, st.binary(max_size=40))


def binary_piece() -> st.SearchStrategy[bytes]:
    good = st.builds(encode_binary, st.integers(0, 40), values_st)
    damaged = st.builds(
        lambda p, i, x: p[: i % len(p)] + bytes([p[i % len(p)] ^ x]) + p[i % len(p) + 1 :],
        good,
        st.integers(0, 100),
        st.integers(1, 255),
    )
    other = st.builds(
        encode_binary, st.integers(0, 40), st.lists(st.integers(0, 99), max_size=4, min_size=1)
    )
    return st.one_of(good, good, damaged, other, st.binary(max_size=40), st.just(b"\x11" * 300))


@settings(max_examples=150, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(text_piece(), max_size=30),
    st.lists(st.integers(0, 2000), max_size=40),
    st.booleans(),
    st.booleans(),
)
def test_text_any_chunking_gives_the_same_result(
    pieces: list[bytes], cuts: list[int], synced: bool, leading_seq: bool
) -> None:
    data = b"".join(pieces)
    whole = TextDecoder(NAMES, leading_seq=leading_seq, max_line=64, synced=synced)
    parts = TextDecoder(NAMES, leading_seq=leading_seq, max_line=64, synced=synced)
    expected = state(whole, whole.feed(data))
    assert state(parts, feed_chunks(parts, split_at(data, cuts))) == expected
    bytewise = TextDecoder(NAMES, leading_seq=leading_seq, max_line=64, synced=synced)
    assert state(bytewise, feed_chunks(bytewise, split_at(data, range(len(data))))) == expected


@settings(max_examples=150, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(binary_piece(), max_size=30),
    st.lists(st.integers(0, 2000), max_size=40),
    st.booleans(),
)
def test_binary_any_chunking_gives_the_same_result(
    pieces: list[bytes], cuts: list[int], synced: bool
) -> None:
    data = b"".join(pieces)
    whole = BinaryDecoder(2, synced=synced)
    parts = BinaryDecoder(2, synced=synced)
    expected = state(whole, whole.feed(data))
    assert state(parts, feed_chunks(parts, split_at(data, cuts))) == expected
    bytewise = BinaryDecoder(2, synced=synced)
    assert state(bytewise, feed_chunks(bytewise, split_at(data, range(len(data))))) == expected


@given(st.lists(st.binary(max_size=64), max_size=40), st.booleans(), st.booleans())
def test_garbage_never_raises(chunks: list[bytes], leading_seq: bool, synced: bool) -> None:
    text = TextDecoder(NAMES, leading_seq=leading_seq, max_line=32, synced=synced)
    binary = BinaryDecoder(2, synced=synced)
    for dec in (text, binary):
        frames = feed_chunks(dec, chunks)
        assert set(dec.drops) == set(DROP_REASONS)
        assert all(v >= 0 for v in dec.drops.values())
        assert dec.frames_ok == len(frames)
        for f in frames:
            assert len(f.values) == 2 and all(0 <= v <= MAX_VALUE for v in f.values)


@given(
    st.lists(st.tuples(st.binary(max_size=60), values_st), min_size=1, max_size=20),
    st.lists(st.integers(0, 3000), max_size=30),
)
def test_text_frames_after_a_newline_survive_any_garbage(
    items: list[tuple[bytes, list[int]]], cuts: list[int]
) -> None:
    """The guarantee: a valid line preceded by LF comes out, whatever came before the LF."""
    data = b"".join(g + b"\n" + encode_text(v) for g, v in items)
    dec = TextDecoder(NAMES, max_line=32)  # not synced: the first garbage is a fragment
    frames = feed_chunks(dec, split_at(data, cuts))
    assert is_subsequence([Frame(None, v) for _, v in items], frames)


@given(
    st.lists(
        st.tuples(
            st.binary(max_size=60).map(lambda b: b.translate(None, b"0123456789")), values_st
        ),
        min_size=1,
        max_size=20,
    ),
    st.lists(st.integers(0, 3000), max_size=30),
)
def test_text_garbage_without_digits_adds_no_frames(
    items: list[tuple[bytes, list[int]]], cuts: list[int]
) -> None:
    # A line without digits holds no value, so it can never pass for a frame: exact output.
    data = b"".join(g + b"\n" + encode_text(v) for g, v in items)
    dec = TextDecoder(NAMES, max_line=32)
    assert feed_chunks(dec, split_at(data, cuts)) == [Frame(None, v) for _, v in items]


@given(
    st.lists(
        st.tuples(st.binary(max_size=80), st.integers(0, 0xFFFF), values_st),
        min_size=1,
        max_size=20,
    ),
    st.lists(st.integers(0, 3000), max_size=30),
)
def test_binary_frames_after_a_zero_survive_any_garbage(
    items: list[tuple[bytes, int, list[int]]], cuts: list[int]
) -> None:
    data = b"".join(g + b"\x00" + encode_binary(s, v) for g, s, v in items)
    dec = BinaryDecoder(2)
    frames = feed_chunks(dec, split_at(data, cuts))
    assert is_subsequence([Frame(s, v) for _, s, v in items], frames)


@given(
    st.lists(
        st.tuples(st.binary(max_size=10), st.integers(0, 0xFFFF), values_st),
        min_size=1,
        max_size=20,
    ),
    st.lists(st.integers(0, 3000), max_size=30),
)
def test_binary_short_garbage_adds_no_frames(
    items: list[tuple[bytes, int, list[int]]], cuts: list[int]
) -> None:
    # A two-channel packet is 13 bytes before its delimiter: 10 bytes of garbage cannot be one.
    data = b"".join(g + b"\x00" + encode_binary(s, v) for g, s, v in items)
    dec = BinaryDecoder(2)
    assert feed_chunks(dec, split_at(data, cuts)) == [Frame(s, v) for _, s, v in items]


# --- settings, factory, argument checks -------------------------------------------------


def test_frame_settings_defaults_and_validation() -> None:
    s = FrameSettings()
    assert (s.format, s.leading_seq, s.max_line, s.kind) == ("text", False, 256, "count")
    with pytest.raises(pydantic.ValidationError):
        FrameSettings(max_lines=100)  # type: ignore[call-arg]  # typo: extra="forbid"
    with pytest.raises(pydantic.ValidationError):
        FrameSettings(max_line=8)
    with pytest.raises(pydantic.ValidationError):
        FrameSettings(format="json")  # type: ignore[arg-type, call-arg]
    with pytest.raises(pydantic.ValidationError):
        FrameSettings(kind="frequency")  # type: ignore[arg-type, call-arg]
    mixed = FrameSettings(kind="period", channel_kinds={"ref": "count"})
    assert mixed.kind_of("pitch") == "period" and mixed.kind_of("ref") == "count"
    assert FrameSettings(newline="crlf").newline_bytes == b"\r\n"


def test_make_decoder_picks_by_format() -> None:
    text = make_decoder(FrameSettings(leading_seq=True, max_line=64), NAMES)
    assert isinstance(text, TextDecoder) and text.leading_seq and text.max_line == 64
    assert text.synced is False
    binary = make_decoder(FrameSettings(format="binary"), NAMES, synced=True)
    assert isinstance(binary, BinaryDecoder) and binary.n_channels == 2 and binary.synced


@pytest.mark.parametrize("names", [[], ["a", "a"], ["a b"], ["x=y"], ["#c"], [""], ["a,b"], ["é"]])
def test_bad_channel_names_are_config_errors(names: list[str]) -> None:
    with pytest.raises(ConfigError):
        TextDecoder(names)


def test_decoder_limits_are_config_errors() -> None:
    with pytest.raises(ConfigError):
        TextDecoder(NAMES, max_line=8)
    with pytest.raises(ConfigError):
        BinaryDecoder(0)
    with pytest.raises(ConfigError):
        BinaryDecoder(MAX_CHANNELS + 1)


@pytest.mark.parametrize(
    "call",
    [
        lambda: encode_text([-1, 2]),
        lambda: encode_text([2**32, 2]),
        lambda: encode_text([]),
        lambda: encode_text([1, 2], sep="|"),
        lambda: encode_text([1, 2], sep=""),
        lambda: encode_text([1, 2], newline="\r"),
        lambda: encode_text([1, 2], names=["a"]),
        lambda: encode_text([1, 2], seq=-1),
        lambda: encode_binary(-1, [1]),
        lambda: encode_binary(0, [1.5]),  # type: ignore[list-item]
        lambda: encode_binary(0, [1] * (MAX_CHANNELS + 1)),
    ],
)
def test_encoders_refuse_what_no_decoder_would_accept(call: object) -> None:
    with pytest.raises(ValueError):
        call()  # type: ignore[operator]


def test_frame_equality_and_repr() -> None:
    assert Frame(1, [2]) == Frame(1, [2]) and Frame(1, [2]) != Frame(None, [2])
    assert repr(Frame(None, [5])) == "Frame(seq=None, values=[5])"
    assert not hasattr(Frame(1, [2]), "__dict__")


def test_decoders_take_bytearray_and_memoryview() -> None:
    text = TextDecoder(NAMES, synced=True)
    assert text.feed(bytearray(b"1 2\n")) + text.feed(memoryview(b"3 4\n")) == [  # type: ignore[arg-type]
        Frame(None, [1, 2]),
        Frame(None, [3, 4]),
    ]
    binary = BinaryDecoder(2, synced=True)
    assert binary.feed(memoryview(encode_binary(9, [1, 2]))) == [Frame(9, [1, 2])]  # type: ignore[arg-type]
