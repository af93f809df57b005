"""docs/firmware: the C frame formatter and the example firmware, compiled and run here.

frame_format.h is compiled into a small shared library and called through ctypes; its
bytes are compared with the published check values (CRC RevEng catalogue, Cheshire &
Baker's COBS examples), with general-purpose reference implementations (the standard
library's CRC-CCITT, the ``cobs`` package) and with the project's own decoders. The
example firmware is then built unchanged for this computer with a simulated hardware
layer (three free-running counters driven by oscillators of known frequency) and its
output stream is decoded with bridge.frames.
"""

from __future__ import annotations

import binascii
import ctypes
import os
import struct
import subprocess
from pathlib import Path

import pytest
from cobs import cobs
from hypothesis import given, settings
from hypothesis import strategies as st

from e2e.peers import require as need  # path, or skip (fail with FIELDBRIDGE_REQUIRE_PEERS=1)


pytestmark = pytest.mark.peer

FIRMWARE = Path(__file__).resolve().parent.parent / "docs" / "firmware"
HEADER = FIRMWARE / "frame_format.h"
COUNTER_CPP = FIRMWARE / "fieldbridge_counter" / "fieldbridge_counter.cpp"
UINT32 = st.integers(0, 2**32 - 1)
SEQ_NONE = 2**32 - 1
CANARY = 0xA5
SLACK = 16  # canary bytes after `cap`, checked untouched

WRAPPER_C = r"""
#include "frame_format.h"
size_t t_format_text(char *out, size_t cap, uint32_t seq, const uint32_t *c, size_t n)
{ return fb_format_text(out, cap, seq, c, n); }
size_t t_format_binary(uint8_t *out, size_t cap, uint16_t seq, const uint32_t *c, size_t n)
{ return fb_format_binary(out, cap, seq, c, n); }
uint16_t t_crc16(const uint8_t *d, size_t n) { return fb_crc16(d, n); }
size_t t_cobs_encode(uint8_t *out, size_t cap, const uint8_t *in, size_t n)
{ return fb_cobs_encode(in, n, out, cap); }
size_t t_text_max(size_t n) { return FB_TEXT_MAX(n); }
size_t t_binary_max(size_t n) { return FB_BINARY_MAX(n); }
"""

# A hardware layer for running the example firmware on this computer. Oscillator i runs
# at freq[i] Hz from time zero; the first latch is at t0_us and one follows every
# window_us. A free-running counter holds floor(freq * t) pulses, cut to `bits` bits,
# exactly as a hardware counter clocked by the oscillator would.
HOST_HAL_C = r"""
#include <stdbool.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>

static uint64_t freq[3], t0_us, window_us_arg;
static long windows, k;
static unsigned bits;

static void die(const char *m) { fprintf(stderr, "%s\n", m); exit(2); }

void hal_init(uint32_t window_us)
{
    const char *a = getenv("FB_SIM");
    if (a == NULL) die("set FB_SIM");
    if (sscanf(a, "%lu %lu %lu %lu %ld %u", (unsigned long *)&freq[0],
               (unsigned long *)&freq[1], (unsigned long *)&freq[2],
               (unsigned long *)&t0_us, &windows, &bits) != 6) die("bad FB_SIM");
    window_us_arg = window_us;
    printf("%s", "");  /* stdout is the serial port */
}

uint8_t hal_counter_bits(void) { return (uint8_t)bits; }

bool hal_window_ready(uint32_t latch[3])
{
    if (k > windows) return false;
    uint64_t t = t0_us + (uint64_t)k * window_us_arg;
    uint64_t mask = bits >= 32 ? 0xFFFFFFFFull : ((1ull << bits) - 1ull);
    for (int i = 0; i < 3; i++) latch[i] = (uint32_t)((freq[i] * t / 1000000ull) & mask);
    k++;
    return true;
}

void hal_serial_write(const uint8_t *d, size_t n)
{
    if (fwrite(d, 1, n, stdout) != n) die("write failed");
}

void hal_idle(void)
{
    /* The script is over: stop here (a real board would sleep until an interrupt). */
    fflush(stdout);
    exit(0);
}
"""


# ------------------------------------------------------------------ building


@pytest.fixture(scope="module")
def lib(tmp_path_factory: pytest.TempPathFactory) -> ctypes.CDLL:
    cc = need("gcc")
    d = tmp_path_factory.mktemp("frame_format")
    (d / "wrap.c").write_text(WRAPPER_C)
    so = d / "libfb.so"
    subprocess.run(
        [cc, "-std=c99", "-O2", "-Wall", "-Wextra", "-Wconversion", "-pedantic", "-Werror",
         "-shared", "-fPIC", "-I", str(FIRMWARE), str(d / "wrap.c"), "-o", str(so)],
        check=True, capture_output=True, text=True, timeout=120,
    )
    lib = ctypes.CDLL(str(so))
    size_t, u8p, u32p = ctypes.c_size_t, ctypes.POINTER(ctypes.c_uint8), ctypes.POINTER(ctypes.c_uint32)
    lib.t_format_text.argtypes = [ctypes.c_void_p, size_t, ctypes.c_uint32, u32p, size_t]
    lib.t_format_text.restype = size_t
    lib.t_format_binary.argtypes = [ctypes.c_void_p, size_t, ctypes.c_uint16, u32p, size_t]
    lib.t_format_binary.restype = size_t
    lib.t_crc16.argtypes = [u8p, size_t]
    lib.t_crc16.restype = ctypes.c_uint16
    lib.t_cobs_encode.argtypes = [ctypes.c_void_p, size_t, u8p, size_t]
    lib.t_cobs_encode.restype = size_t
    lib.t_text_max.argtypes = lib.t_binary_max.argtypes = [size_t]
    lib.t_text_max.restype = lib.t_binary_max.restype = size_t
    return lib


def _u32(values: list[int]) -> ctypes.Array[ctypes.c_uint32]:
    return (ctypes.c_uint32 * max(1, len(values)))(*values)


def _u8(data: bytes) -> ctypes.Array[ctypes.c_uint8]:
    return (ctypes.c_uint8 * max(1, len(data)))(*data)


def _call(fn: object, cap: int, *args: object) -> tuple[int, bytes]:
    """Call a formatter with a buffer of cap bytes plus canaries; return (n, buffer)."""
    buf = (ctypes.c_uint8 * (cap + SLACK))(*([CANARY] * (cap + SLACK)))
    n = fn(buf, cap, *args)  # type: ignore[operator]
    raw = bytes(buf)
    assert raw[cap:] == bytes([CANARY]) * SLACK, "wrote past the end of its buffer"
    return n, raw


def text(lib: ctypes.CDLL, cap: int, seq: int, values: list[int]) -> tuple[int, bytes]:
    return _call(lib.t_format_text, cap, seq, _u32(values), len(values))


def binary(lib: ctypes.CDLL, cap: int, seq: int, values: list[int]) -> tuple[int, bytes]:
    return _call(lib.t_format_binary, cap, seq, _u32(values), len(values))


def cobs_c(lib: ctypes.CDLL, data: bytes, cap: int | None = None) -> bytes:
    cap = 2 * len(data) + 8 if cap is None else cap
    n, raw = _call(lib.t_cobs_encode, cap, _u8(data), len(data))
    return raw[:n]


def expected_text(seq: int, values: list[int]) -> bytes:
    # docs/protocol.md text frame: optional leading sequence number, values, one space
    # between fields, LF at the end.
    fields = ([] if seq == SEQ_NONE else [seq]) + values
    return (" ".join(str(v) for v in fields) + "\n").encode("ascii")


# ------------------------------------------------------------------ text


@settings(max_examples=300, deadline=None)
@given(seq=st.one_of(st.just(SEQ_NONE), st.integers(0, 2**32 - 2)),
       values=st.lists(UINT32, min_size=1, max_size=16))
def test_text_frame_matches_the_format(lib: ctypes.CDLL, seq: int, values: list[int]) -> None:
    want = expected_text(seq, values)
    n, raw = text(lib, lib.t_text_max(len(values)), seq, values)
    assert raw[: n + 1] == want + b"\0"
    # The project's own encoder writes the same line.
    from bridge.frames import encode_text

    assert want == encode_text(values, seq=None if seq == SEQ_NONE else seq)


@settings(max_examples=100, deadline=None)
@given(seq=st.integers(0, 2**32 - 2), values=st.lists(UINT32, min_size=1, max_size=6))
def test_text_frame_is_all_or_nothing(lib: ctypes.CDLL, seq: int, values: list[int]) -> None:
    want = expected_text(seq, values)
    for cap in range(len(want) + 3):
        n, raw = text(lib, cap, seq, values)
        if cap >= len(want) + 1:  # room for the line and its NUL
            assert (n, raw[: n + 1]) == (len(want), want + b"\0")
        else:
            assert n == 0
            if cap > 0:
                assert raw[0] == 0  # an empty string, never a cut line


def test_text_worst_case_fits_the_size_macro(lib: ctypes.CDLL) -> None:
    for n_ch in (1, 3, 16, 64):
        values = [2**32 - 1] * n_ch
        want = expected_text(2**32 - 2, values)
        cap = lib.t_text_max(n_ch)
        assert cap == len(want) + 1  # the macro is exact for the longest line
        assert text(lib, cap, 2**32 - 2, values)[0] == len(want)
        assert text(lib, cap - 1, 2**32 - 2, values)[0] == 0


def test_text_decodes_with_the_project_decoder(lib: ctypes.CDLL) -> None:
    frames_mod = pytest.importorskip("bridge.frames")
    dec = frames_mod.TextDecoder(["pitch", "volume", "ref"], leading_seq=True, synced=True)
    stream = b""
    rows = [(0, [5512, 5730, 6001]), (1, [0, 1, 2**32 - 1]), (2, [5400, 5729, 6001])]
    for seq, vals in rows:
        n, raw = text(lib, 64, seq, vals)
        stream += raw[:n]
    got = dec.feed(stream)
    assert [(f.seq, f.values) for f in got] == rows
    assert sum(dec.drops.values()) == 0


def test_text_rejects_empty_input(lib: ctypes.CDLL) -> None:
    n, raw = text(lib, 32, 1, [])
    assert n == 0 and raw[0] == 0


# ------------------------------------------------------------------ CRC and COBS


def test_crc16_check_value(lib: ctypes.CDLL) -> None:
    data = b"123456789"
    assert lib.t_crc16(_u8(data), len(data)) == 0x29B1  # CRC RevEng catalogue, CRC-16/CCITT-FALSE
    assert lib.t_crc16(_u8(b""), 0) == 0xFFFF  # the init value, nothing shifted in


@settings(max_examples=200, deadline=None)
@given(data=st.binary(max_size=300))
def test_crc16_matches_the_standard_library(lib: ctypes.CDLL, data: bytes) -> None:
    # binascii.crc_hqx started at 0xFFFF is CRC-16/CCITT-FALSE (Python documentation).
    assert lib.t_crc16(_u8(data), len(data)) == binascii.crc_hqx(data, 0xFFFF)


@pytest.mark.parametrize(
    ("data", "encoded"),
    [
        # Cheshire & Baker, IEEE/ACM Trans. Networking 7(2), 1999 (as listed in DOMAIN.md),
        # each followed by the 0x00 delimiter.
        (bytes.fromhex("00"), bytes.fromhex("010100")),
        (bytes.fromhex("11220033"), bytes.fromhex("031122023300")),
        (bytes.fromhex("11000000"), bytes.fromhex("021101010100")),
    ],
)
def test_cobs_published_vectors(lib: ctypes.CDLL, data: bytes, encoded: bytes) -> None:
    assert cobs_c(lib, data) == encoded


@settings(max_examples=300, deadline=None)
@given(data=st.one_of(
    st.binary(max_size=600),
    # Long runs of non-zero bytes cross the 254-byte block limit.
    st.builds(lambda n, z: b"\x01" * n + b"\x00" * z, st.integers(240, 520), st.integers(0, 2)),
))
def test_cobs_matches_the_reference_package(lib: ctypes.CDLL, data: bytes) -> None:
    want = cobs.encode(data) + b"\x00"  # the cobs package, a general-purpose implementation
    assert cobs_c(lib, data) == want
    # All-or-nothing: one byte short gives nothing, and nothing past the buffer changes.
    assert cobs_c(lib, data, cap=len(want) - 1) == b""


@pytest.mark.parametrize("n", [253, 254, 255, 508, 509])
def test_cobs_block_boundaries(lib: ctypes.CDLL, n: int) -> None:
    data = bytes((i % 255) + 1 for i in range(n))
    assert cobs_c(lib, data) == cobs.encode(data) + b"\x00"
    assert cobs.decode(cobs_c(lib, data)[:-1]) == data


# ------------------------------------------------------------------ binary frame


@settings(max_examples=300, deadline=None)
@given(seq=st.integers(0, 65535), values=st.lists(UINT32, min_size=1, max_size=64))
def test_binary_frame_layout(lib: ctypes.CDLL, seq: int, values: list[int]) -> None:
    n, raw = binary(lib, lib.t_binary_max(len(values)), seq, values)
    packet = raw[:n]
    assert packet.endswith(b"\x00") and b"\x00" not in packet[:-1]
    payload = cobs.decode(packet[:-1])
    body = struct.pack(f"<H{len(values)}I", seq, *values)
    # Payload: seq uint16 LE, counts uint32 LE, then CRC-16/CCITT-FALSE of both, LE.
    assert payload == body + struct.pack("<H", binascii.crc_hqx(body, 0xFFFF))
    assert n <= lib.t_binary_max(len(values))
    assert binary(lib, n - 1, seq, values)[0] == 0


@settings(max_examples=100, deadline=None)
@given(seq=st.integers(0, 65535), values=st.lists(UINT32, min_size=1, max_size=8))
def test_binary_frame_equals_the_project_encoder(lib: ctypes.CDLL, seq: int, values: list[int]) -> None:
    frames_mod = pytest.importorskip("bridge.frames")
    n, raw = binary(lib, 64, seq, values)
    assert raw[:n] == frames_mod.encode_binary(seq, values)
    dec = frames_mod.BinaryDecoder(len(values), synced=True)
    got = dec.feed(raw[:n])
    assert [(f.seq, f.values) for f in got] == [(seq, values)]


# ------------------------------------------------------------------ the example firmware


@pytest.fixture(scope="module")
def firmware(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    cxx = need("g++")
    cc = need("gcc")
    d = tmp_path_factory.mktemp("firmware")
    (d / "host_hal.c").write_text(HOST_HAL_C)
    subprocess.run([cc, "-std=c99", "-O2", "-Wall", "-Werror", "-c", str(d / "host_hal.c"),
                    "-o", str(d / "host_hal.o")], check=True, capture_output=True, timeout=120)
    out: dict[str, Path] = {}
    for fmt, flag in (("text", "0"), ("binary", "1")):
        exe = d / f"counter_{fmt}"
        subprocess.run(
            [cxx, "-std=c++11", "-O2", "-Wall", "-Wextra", "-Werror", f"-DFB_BINARY={flag}",
             str(COUNTER_CPP), str(d / "host_hal.o"), "-o", str(exe)],
            check=True, capture_output=True, text=True, timeout=120,
        )
        out[fmt] = exe
    return out


def run_firmware(exe: Path, freqs: tuple[int, int, int], t0_us: int, windows: int, bits: int) -> bytes:
    env = {**os.environ, "FB_SIM": " ".join(map(str, [*freqs, t0_us, windows, bits]))}
    return subprocess.run([str(exe)], env=env, check=True, capture_output=True, timeout=60).stdout


def expected_counts(freqs: tuple[int, ...], t0_us: int, windows: int, window_us: int = 20000) -> list[list[int]]:
    def pulses(f: int, t_us: int) -> int:
        return f * t_us // 1_000_000

    return [
        [pulses(f, t0_us + k * window_us) - pulses(f, t0_us + (k - 1) * window_us) for f in freqs]
        for k in range(1, windows + 1)
    ]


# Frequencies in the range of RC relaxation oscillators with small antennas (common
# practice: a few hundred kHz), chosen so that 20 ms windows hold about 4,000-11,000
# pulses and 16-bit counters wrap every few windows.
FREQS = (555_123, 541_877, 201_003)


@pytest.mark.parametrize("bits", [16, 32])
def test_firmware_text_stream(firmware: dict[str, Path], bits: int) -> None:
    frames_mod = pytest.importorskip("bridge.frames")
    t0, windows = 1_234_567, 200
    stream = run_firmware(firmware["text"], FREQS, t0, windows, bits)
    dec = frames_mod.TextDecoder(["pitch", "volume", "ref"], leading_seq=True, synced=True)
    got = dec.feed(stream)
    want = expected_counts(FREQS, t0, windows)
    assert [f.seq for f in got] == list(range(windows))
    assert [f.values for f in got] == want
    assert dec.comments == 1 and sum(dec.drops.values()) == 0  # the banner line
    for i, f in enumerate(FREQS):
        column = [v[i] for v in want]
        # Counting over a window T gives N = f*T within one count (DOMAIN.md section 2).
        assert all(abs(n - f * 0.020) < 1 for n in column)
        # A free-running counter carries the fractional phase: the sum over all windows
        # is the pulse count over the whole span, with no loss at the boundaries.
        span_s = windows * 0.020
        assert abs(sum(column) - f * span_s) <= 1


def test_firmware_binary_stream(firmware: dict[str, Path]) -> None:
    frames_mod = pytest.importorskip("bridge.frames")
    t0, windows = 7_000_001, 150
    stream = run_firmware(firmware["binary"], FREQS, t0, windows, 16)
    dec = frames_mod.BinaryDecoder(3, synced=True)
    got = dec.feed(stream)
    assert [f.seq for f in got] == list(range(windows))
    assert [f.values for f in got] == expected_counts(FREQS, t0, windows)
    assert sum(dec.drops.values()) == 0
    assert stream.count(b"\x00") == windows  # one delimiter per frame, no banner in binary
