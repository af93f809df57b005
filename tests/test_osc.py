"""Tests for bridge/outputs/osc.py: OSC 1.0 bytes, real datagrams, limits, failures."""

from __future__ import annotations

import logging
import math
import socket
import struct
import time
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import pytest
from pydantic import ValidationError
from pythonosc.osc_bundle import OscBundle
from pythonosc.osc_bundle_builder import IMMEDIATELY as PYOSC_IMMEDIATELY
from pythonosc.osc_bundle_builder import OscBundleBuilder
from pythonosc.osc_message import OscMessage
from pythonosc.osc_message_builder import OscMessageBuilder
from pythonosc.parsing import osc_types

from bridge.errors import DeviceError
from bridge.outputs.osc import (
    NTP_UNIX_OFFSET,
    OscSettings,
    OscSink,
    address_plan,
    encode_bundle,
    encode_message,
    ntp_timetag,
    osc_name,
    osc_string,
    parse_destination,
)

# --- stand-ins for bridge.pipeline.Reading (plain data carriers) -------------------------


@dataclass
class Voice:
    name: str
    note: float
    hz: float
    level: float
    present: bool = True


@dataclass
class Channel:
    name: str
    role: str
    raw: float
    baseline: float
    c: float
    position: float
    present: bool = True


@dataclass
class Reading:
    seq: int | None
    t: float
    channels: list[Channel] = field(default_factory=list)
    voices: list[Voice] = field(default_factory=list)


def two_voice_reading(seq: int = 0) -> Reading:
    return Reading(
        seq=seq,
        t=seq / 1000.0,
        channels=[
            Channel("pitch", "pitch", 5521, 5600.0, 0.0143, 0.375),
            Channel("volume", "volume", 5490, 5611.0, 0.0220, 0.5),
        ],
        voices=[Voice("lead", 60.5, 269.29, 0.5), Voice("drone", 48.0, 130.81, 0.125)],
    )


def f32(x: float) -> float:
    """x as it survives a float32 round trip (OSC 1.0 floats are IEEE 754 float32)."""
    return float(struct.unpack(">f", struct.pack(">f", x))[0])


@pytest.fixture
def receiver() -> Iterator[socket.socket]:
    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind(("127.0.0.1", 0))
    rx.settimeout(2.0)  # every recv waits for a datagram, at most this long
    yield rx
    rx.close()


def dest(rx: socket.socket) -> str:
    return f"127.0.0.1:{rx.getsockname()[1]}"


def messages(dgram: bytes) -> list[OscMessage]:
    """Parse with python-osc (the reference library), flattening bundles."""
    if OscBundle.dgram_is_bundle(dgram):
        return [m for m in OscBundle(dgram)]
    return [OscMessage(dgram)]


# --- OSC 1.0 encoding, byte-exact ----------------------------------------------------------


def test_spec_example_oscillator_frequency() -> None:
    # The Open Sound Control 1.0 Specification (M. Wright, CNMAT, 2002), first example.
    expected = bytes.fromhex(
        "2f6f7363 696c6c61 746f722f 342f6672 65717565 6e637900 2c660000 43dc0000".replace(" ", "")
    )
    got = encode_message("/oscillator/4/frequency", 440.0)
    assert len(got) == 32
    assert got == expected


def test_spec_example_foo() -> None:
    # OSC 1.0 Specification, second example: /foo 1000 -1 "hello" 1.234 5.678.
    expected = bytes.fromhex(
        "2f666f6f 00000000 2c696973 66660000 000003e8 ffffffff 68656c6c 6f000000"
        " 3f9df3b6 40b5b22d".replace(" ", "")
    )
    assert encode_message("/foo", 1000, -1, "hello", 1.234, 5.678) == expected
    assert encode_message("/foo", 1000, -1, "hello", 1.234, 5.678, types="iisff") == expected


@pytest.mark.parametrize(
    "s, padded",
    [("", b"\0\0\0\0"), ("osc", b"osc\0"), ("data", b"data\0\0\0\0"), ("/ab", b"/ab\0")],
)
def test_osc_string_padding(s: str, padded: bytes) -> None:
    # OSC 1.0 Specification: an OSC-string is the characters, a NUL, and 0-3 more NULs
    # to a multiple of 4 bytes.
    assert osc_string(s) == padded


def test_encoder_matches_python_osc_builder() -> None:
    # python-osc (general-purpose OSC library) as a second reference for bundles.
    b = OscBundleBuilder(PYOSC_IMMEDIATELY)
    ours = []
    for addr, val, tag in [("/a/b", 1.5, "f"), ("/c", 7, "i"), ("/long/address/x", -2.25, "f")]:
        m = OscMessageBuilder(addr)
        m.add_arg(val, tag)
        b.add_content(m.build())
        ours.append(encode_message(addr, val, types=tag))
    assert encode_bundle(ours) == b.build().dgram


def test_ntp_time_tags() -> None:
    # RFC 5905 / OSC 1.0: seconds since 1900-01-01 in the top 32 bits, fraction below;
    # the Unix epoch is 2,208,988,800 s after the NTP epoch.
    assert NTP_UNIX_OFFSET == 2_208_988_800
    assert ntp_timetag(0.0) == 2_208_988_800 << 32
    assert ntp_timetag(1.5) == ((2_208_988_801 << 32) | 0x80000000)
    # python-osc's converter agrees on an exactly representable time.
    from pythonosc.parsing import ntp

    t = 1_700_000_000.25
    assert ntp_timetag(t) == struct.unpack(">Q", ntp.system_time_to_ntp(t))[0]


def test_names_and_destinations() -> None:
    assert osc_name("left hand") == "left_hand"
    assert osc_name("a/b*c{d}") == "a_b_c_d_"
    assert osc_name("") == "_"
    assert parse_destination("127.0.0.1:9000") == ("127.0.0.1", 9000)
    assert parse_destination("[::1]:57000") == ("::1", 57000)
    assert parse_destination("stage-pc.local:8000") == ("stage-pc.local", 8000)
    for bad in ["127.0.0.1", "host:0", "host:70000", ":9000", "a b:9", "::1:9000"]:
        with pytest.raises(ValueError):
            parse_destination(bad)


def test_settings_validation() -> None:
    with pytest.raises(ValidationError):
        OscSettings(destinations=["nowhere"])
    with pytest.raises(ValidationError):
        OscSettings(destinations=[])
    with pytest.raises(ValidationError):
        OscSettings(prefix="fieldbridge")
    with pytest.raises(ValidationError):
        OscSettings(prefix="/a b")
    with pytest.raises(ValidationError):
        OscSettings(prefix="/a*")
    with pytest.raises(ValidationError):
        OscSettings(voice_fields=["hz", "hz"])
    with pytest.raises(ValidationError):
        OscSettings(voice_fields=["pitch"])  # type: ignore[list-item, call-arg]
    with pytest.raises(ValidationError):
        OscSettings(destination=["127.0.0.1:9"])  # type: ignore[call-arg]
    assert OscSettings(prefix="/stage/left/").prefix == "/stage/left"


def test_address_plan_order() -> None:
    plan = address_plan(OscSettings(), ["lead"], ["pitch"])
    assert plan == [
        ("/fieldbridge/voice/lead/hz", "f", "hz"),
        ("/fieldbridge/voice/lead/note", "f", "note"),
        ("/fieldbridge/voice/lead/level", "f", "level"),
        ("/fieldbridge/sensor/pitch/position", "f", "position"),
        ("/fieldbridge/sensor/pitch/raw", "i", "raw"),
    ]


# --- the sink, on real datagrams -----------------------------------------------------------


def test_one_bundle_per_reading_parsed_by_python_osc(receiver: socket.socket) -> None:
    r = two_voice_reading()
    with OscSink(OscSettings(destinations=[dest(receiver)])) as sink:
        sink.send(r)
        dgram = receiver.recv(65536)
    bundle = OscBundle(dgram)
    assert bundle.timestamp == osc_types.IMMEDIATELY  # time tag 1 (OSC 1.0: "immediately")
    got = [(m.address, m.params) for m in bundle]
    assert got == [
        ("/fieldbridge/voice/lead/hz", [f32(269.29)]),
        ("/fieldbridge/voice/lead/note", [f32(60.5)]),
        ("/fieldbridge/voice/lead/level", [0.5]),
        ("/fieldbridge/voice/drone/hz", [f32(130.81)]),
        ("/fieldbridge/voice/drone/note", [48.0]),
        ("/fieldbridge/voice/drone/level", [0.125]),
        ("/fieldbridge/sensor/pitch/position", [0.375]),
        ("/fieldbridge/sensor/pitch/raw", [5521]),
        ("/fieldbridge/sensor/volume/position", [0.5]),
        ("/fieldbridge/sensor/volume/raw", [5490]),
    ]
    # Byte for byte what python-osc's builder makes of the same content.
    b = OscBundleBuilder(PYOSC_IMMEDIATELY)
    for addr, params in got:
        m = OscMessageBuilder(addr)
        m.add_arg(params[0], "i" if addr.endswith("/raw") else "f")
        b.add_content(m.build())
    assert dgram == b.build().dgram


def test_values_change_between_readings(receiver: socket.socket) -> None:
    with OscSink(OscSettings(destinations=[dest(receiver)], voice_fields=["note"],
                             sensor_fields=[])) as sink:
        for i in range(20):
            r = two_voice_reading(i)
            r.voices[0].note = 60.0 + i * 0.25
            sink.send(r)
        notes = [messages(receiver.recv(65536))[0].params[0] for _ in range(20)]
    assert notes == [60.0 + i * 0.25 for i in range(20)]


def test_numpy_scalars_and_all_fields(receiver: socket.socket) -> None:
    r = Reading(
        seq=np.int64(3), t=np.float64(0.5),  # type: ignore[arg-type]
        channels=[Channel("p", "pitch", np.int64(480_123), np.float64(480_500.0),  # type: ignore[arg-type]
                          np.float32(0.001), np.float64(0.25), np.bool_(True))],  # type: ignore[arg-type]
        voices=[Voice("v", np.float64(69.0), np.float32(440.0), np.float64(0.75),  # type: ignore[arg-type]
                      np.bool_(False))],  # type: ignore[arg-type]
    )
    s = OscSettings(destinations=[dest(receiver)], voice_fields=["hz", "note", "level", "present"],
                    sensor_fields=["position", "raw", "c", "baseline", "present"])
    with OscSink(s) as sink:
        sink.send(r)
        by_addr = {m.address: m.params[0] for m in messages(receiver.recv(65536))}
    assert by_addr == {
        "/fieldbridge/voice/v/hz": 440.0,
        "/fieldbridge/voice/v/note": 69.0,
        "/fieldbridge/voice/v/level": 0.75,
        "/fieldbridge/voice/v/present": 0,
        "/fieldbridge/sensor/p/position": 0.25,
        "/fieldbridge/sensor/p/raw": 480_123,
        "/fieldbridge/sensor/p/c": f32(0.001),
        "/fieldbridge/sensor/p/baseline": 480_500.0,
        "/fieldbridge/sensor/p/present": 1,
    }


def test_unsafe_values_are_clamped_never_raised(receiver: socket.socket) -> None:
    r = two_voice_reading()
    r.voices[0].level = math.nan      # a broken level must come out silent
    r.voices[1].level = 7.0           # and never above full scale
    r.voices[0].hz = 1e39             # beyond float32
    r.channels[0].raw = math.nan      # a count that is not a number
    r.channels[1].raw = 2**40         # beyond int32
    with OscSink(OscSettings(destinations=[dest(receiver)])) as sink:
        sink.send(r)
        by_addr = {m.address: m.params[0] for m in messages(receiver.recv(65536))}
    assert by_addr["/fieldbridge/voice/lead/level"] == 0.0
    assert by_addr["/fieldbridge/voice/drone/level"] == 1.0
    assert by_addr["/fieldbridge/voice/lead/hz"] == pytest.approx(3.4028234663852886e38)
    assert by_addr["/fieldbridge/sensor/pitch/raw"] == 0
    assert by_addr["/fieldbridge/sensor/volume/raw"] == 2**31 - 1


def test_large_layouts_split_under_the_limit(receiver: socket.socket) -> None:
    r = Reading(seq=0, t=0.0,
                voices=[Voice(f"voice{i:02d}", 60.0 + i, 100.0 + i, 0.5) for i in range(40)],
                channels=[Channel(f"sensor{i:02d}", "pitch", 1000 + i, 1.0, 0.0, i / 40)
                          for i in range(40)])
    s = OscSettings(destinations=[dest(receiver)])
    with OscSink(s) as sink:
        sink.send(r)
        n = sink.datagrams
        dgrams = [receiver.recv(65536) for _ in range(n)]
    assert n > 1
    # DOMAIN.md section 8: keep datagrams under about 1,400 bytes.
    assert all(len(d) <= 1400 for d in dgrams)
    got = [m.address for d in dgrams for m in messages(d)]
    assert got == [a for a, _t, _f in address_plan(s, [v.name for v in r.voices],
                                                   [c.name for c in r.channels])]
    assert all(OscBundle.dgram_is_bundle(d) for d in dgrams)


def test_plain_messages_without_bundles(receiver: socket.socket) -> None:
    s = OscSettings(destinations=[dest(receiver)], bundle=False)
    with OscSink(s) as sink:
        sink.send(two_voice_reading())
        dgrams = [receiver.recv(65536) for _ in range(10)]
    assert not any(OscBundle.dgram_is_bundle(d) for d in dgrams)
    assert OscMessage(dgrams[0]).address == "/fieldbridge/voice/lead/hz"
    assert dgrams[0] == encode_message("/fieldbridge/voice/lead/hz", f32(269.29))


def test_scheduled_time_tags(receiver: socket.socket) -> None:
    s = OscSettings(destinations=[dest(receiver)], time_tag="scheduled", schedule_ahead_ms=250.0)
    with OscSink(s) as sink:
        before = time.time()
        sink.send(two_voice_reading())
        after = time.time()
        bundle = OscBundle(receiver.recv(65536))
    # python-osc turns the NTP tag back into Unix time (OSC 1.0 / RFC 5905 epochs).
    assert before + 0.25 - 1e-3 <= bundle.timestamp <= after + 0.25 + 1e-3


def test_silence_sends_level_zero_once(receiver: socket.socket) -> None:
    s = OscSettings(destinations=[dest(receiver)], voice_fields=["hz", "level", "present"])
    sink = OscSink(s)
    sink.silence("before open")  # allowed any time: nothing to silence yet
    sink.open()
    sink.silence("nothing sent yet")
    sink.send(two_voice_reading())
    receiver.recv(65536)
    sink.silence("sensor lost")
    silent = {m.address: m.params[0] for m in messages(receiver.recv(65536))}
    assert silent == {
        "/fieldbridge/voice/lead/level": 0.0, "/fieldbridge/voice/lead/present": 0,
        "/fieldbridge/voice/drone/level": 0.0, "/fieldbridge/voice/drone/present": 0,
    }
    sink.silence("again")  # already silent: nothing more goes out
    sink.send(two_voice_reading(1))
    nxt = messages(receiver.recv(65536))
    assert nxt[0].address == "/fieldbridge/voice/lead/hz"
    sink.close()  # close silences (the last send was not silent) ...
    on_close = {m.address: m.params[0] for m in messages(receiver.recv(65536))}
    assert on_close["/fieldbridge/voice/drone/level"] == 0.0
    sink.close()  # ... and is safe twice
    sink.silence("after close")
    assert sink.closed
    with pytest.raises(DeviceError):
        sink.send(two_voice_reading())


def test_send_before_open_is_refused() -> None:
    with pytest.raises(DeviceError, match="open"):
        OscSink(OscSettings()).send(two_voice_reading())


def test_layout_follows_new_names(receiver: socket.socket) -> None:
    with OscSink(OscSettings(destinations=[dest(receiver)], sensor_fields=[])) as sink:
        sink.send(two_voice_reading())
        receiver.recv(65536)
        r = two_voice_reading()
        r.voices = [Voice("solo", 70.0, 466.16, 1.0)]
        sink.send(r)
        got = [m.address for m in messages(receiver.recv(65536))]
        assert sink.addresses() == got
    assert got == ["/fieldbridge/voice/solo/hz", "/fieldbridge/voice/solo/note",
                   "/fieldbridge/voice/solo/level"]


def test_localhost_by_name_reaches_an_ipv4_receiver(receiver: socket.socket) -> None:
    port = receiver.getsockname()[1]
    with OscSink(OscSettings(destinations=[f"localhost:{port}"])) as sink:
        sink.send(two_voice_reading())
        assert messages(receiver.recv(65536))[0].address == "/fieldbridge/voice/lead/hz"


def test_ipv6_destination() -> None:
    rx = socket.socket(socket.AF_INET6, socket.SOCK_DGRAM)
    try:
        rx.bind(("::1", 0))
    except OSError as exc:
        rx.close()
        pytest.skip(f"no IPv6 loopback on this machine: {exc}")
    rx.settimeout(2.0)
    try:
        with OscSink(OscSettings(destinations=[f"[::1]:{rx.getsockname()[1]}"])) as sink:
            sink.send(two_voice_reading())
            assert messages(rx.recv(65536))[0].address == "/fieldbridge/voice/lead/hz"
    finally:
        rx.close()


# --- failures are counted and logged, never raised ------------------------------------------


def _closed_port() -> int:
    s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    s.bind(("127.0.0.1", 0))
    port: int = s.getsockname()[1]
    s.close()  # nothing listens there any more: loopback answers with ICMP port unreachable
    return port


def test_nobody_listening_is_not_an_error(receiver: socket.socket) -> None:
    dead = f"127.0.0.1:{_closed_port()}"
    with OscSink(OscSettings(destinations=[dead, dest(receiver)])) as sink:
        for i in range(50):
            sink.send(two_voice_reading(i))
        # The live destination got every reading, in order, despite the dead one.
        counts = [len(messages(receiver.recv(65536))) for _ in range(50)]
    assert counts == [10] * 50


def test_send_errors_are_counted_and_rate_limited(
    receiver: socket.socket, caplog: pytest.LogCaptureFixture
) -> None:
    # Broadcast without SO_BROADCAST is refused by the kernel (EACCES on Linux): a real
    # OSError from sendto on every send.
    bad = "255.255.255.255:9"
    caplog.set_level(logging.WARNING, logger="bridge.outputs.osc")
    with OscSink(OscSettings(destinations=[bad, dest(receiver)])) as sink:
        for i in range(100):
            sink.send(two_voice_reading(i))
        assert sink.send_errors[bad] >= 100
        assert len([receiver.recv(65536) for _ in range(100)]) == 100
    warnings = [r for r in caplog.records if "failed" in r.getMessage()]
    # logged on failures 1, 2, 4, ..., 64 (and 128 only if close's silence also failed)
    assert 7 <= len(warnings) <= 8


def test_unresolvable_host_is_a_device_error() -> None:
    # ".invalid" can never resolve (RFC 6761).
    sink = OscSink(OscSettings(destinations=["no-such-host.invalid:9000"]))
    with pytest.raises(DeviceError, match="resolve"):
        sink.open()
    sink.close()
