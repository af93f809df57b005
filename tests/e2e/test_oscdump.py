"""The OSC sink heard by an independent OSC implementation: liblo's ``oscdump``.

``oscdump -L PORT`` prints one line per received message: the time tag as hex
``seconds.fraction``, the address, the type tags, then the values (floats with six
decimals). We start it on a free local port, send readings through :class:`OscSink`, and
check every address, type tag and value it prints.
"""

from __future__ import annotations

import queue
import shutil
import socket
import struct
import subprocess
import threading
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field

import pytest

from bridge.outputs.osc import OscSettings, OscSink, address_plan, encode_message, ntp_timetag

try:
    from .peers import require  # type: ignore[import-not-found]
except ImportError:
    from peers import require  # type: ignore[import-not-found,no-redef]

pytestmark = pytest.mark.peer


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
    raw: int
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


def f32(x: float) -> float:
    """x after a float32 round trip (OSC 1.0 floats are IEEE 754 float32)."""
    return float(struct.unpack(">f", struct.pack(">f", x))[0])


@dataclass
class Line:
    tag: tuple[int, int]  # (seconds, fraction) of the NTP time tag as printed
    address: str
    types: str
    values: list[str]


class Dump:
    """A running oscdump and the lines it has printed so far, parsed."""

    def __init__(self, proc: subprocess.Popen[str], port: int) -> None:
        self.proc = proc
        self.port = port
        self.lines: queue.Queue[Line | None] = queue.Queue()
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for raw in self.proc.stdout:
            parts = raw.split()
            if len(parts) >= 3 and "." in parts[0]:
                secs, _, frac = parts[0].partition(".")
                self.lines.put(Line((int(secs, 16), int(frac, 16)), parts[1], parts[2], parts[3:]))
        self.lines.put(None)  # end of output

    def take(self, n: int, prefix: str, timeout: float = 5.0) -> list[Line]:
        """The next `n` lines whose address starts with `prefix` (others are dropped)."""
        got: list[Line] = []
        deadline = time.monotonic() + timeout
        while len(got) < n:
            left = deadline - time.monotonic()
            if left <= 0:
                break
            try:
                line = self.lines.get(timeout=left)
            except queue.Empty:
                break
            if line is None:
                break
            if line.address.startswith(prefix):
                got.append(line)
        return got


def _free_udp_port() -> int:
    s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    s.bind(("127.0.0.1", 0))
    port: int = s.getsockname()[1]
    s.close()
    return port


@pytest.fixture
def dump() -> Iterator[Dump]:
    oscdump = require("oscdump")
    stdbuf = shutil.which("stdbuf")
    probe_addr = f"/probe/{uuid.uuid4().hex[:8]}"
    for _attempt in range(3):
        port = _free_udp_port()
        cmd = [oscdump, "-L", str(port)]
        if stdbuf:
            cmd = [stdbuf, "-oL", *cmd]
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        d = Dump(proc, port)
        # oscdump prints nothing when it is ready: probe until it echoes a probe message.
        tx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        ready = False
        deadline = time.monotonic() + 5.0
        while time.monotonic() < deadline and proc.poll() is None:
            tx.sendto(encode_message(probe_addr, 1), ("127.0.0.1", port))
            if d.take(1, probe_addr, timeout=0.1):
                ready = True
                break
        tx.close()
        if ready:
            break
        proc.kill()
        proc.wait(timeout=5)
    else:
        err = proc.stderr.read() if proc.stderr else ""
        pytest.fail(f"oscdump did not start listening on a local UDP port: {err.strip()}")
    # Probes sent before the first echo may still be in flight: drain them.
    while d.take(1, probe_addr, timeout=0.2):
        pass
    try:
        yield d
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=5)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=5)
        for stream in (proc.stdout, proc.stderr):
            if stream is not None:
                stream.close()


def reading(i: int) -> Reading:
    return Reading(
        seq=i,
        t=i / 1000.0,
        channels=[
            Channel("pitch", "pitch", 5521 - i, 5600.0, 0.0143, 0.375 + i / 100),
            Channel("volume", "volume", 5490 + i, 5611.0, 0.022, 0.5),
        ],
        voices=[
            Voice("lead", 60.5 + i / 10, 269.29 + i, 0.5 - i / 100),
            Voice("drone", 48.0, 130.81, 0.125),
        ],
    )


def expected_lines(s: OscSettings, r: Reading) -> list[tuple[str, str, float]]:
    plan = address_plan(s, [v.name for v in r.voices], [c.name for c in r.channels])
    out = []
    for addr, tag, fld in plan:
        kind, name = addr[len(s.prefix) + 1:].split("/")[:2]
        objs = r.voices if kind == "voice" else r.channels
        obj = next(o for o in objs if o.name == name)
        out.append((addr, tag, getattr(obj, fld)))
    return out


def check(lines: list[Line], expected: list[tuple[str, str, float]]) -> None:
    assert [ln.address for ln in lines] == [a for a, _t, _v in expected]
    for ln, (addr, tag, value) in zip(lines, expected):
        assert ln.types == tag, addr
        assert len(ln.values) == 1, addr
        if tag == "i":
            assert int(ln.values[0]) == int(value), addr
        else:
            # oscdump prints float32 values with "%f": six decimals.
            assert float(ln.values[0]) == pytest.approx(f32(float(value)), abs=1e-6), addr


def test_bundles_arrive_intact(dump: Dump) -> None:
    s = OscSettings(destinations=[f"127.0.0.1:{dump.port}"])
    readings = [reading(i) for i in range(5)]
    with OscSink(s) as sink:
        for r in readings:
            sink.send(r)
        per = len(expected_lines(s, readings[0]))
        lines = dump.take(per * len(readings), s.prefix)
        assert len(lines) == per * len(readings)
        for k, r in enumerate(readings):
            check(lines[k * per:(k + 1) * per], expected_lines(s, r))
    # Closing silences every voice: level 0 for each, as one more bundle.
    closing = dump.take(2, s.prefix)
    assert [(ln.address, ln.types, float(ln.values[0])) for ln in closing] == [
        ("/fieldbridge/voice/lead/level", "f", 0.0),
        ("/fieldbridge/voice/drone/level", "f", 0.0),
    ]


def test_all_fields_and_plain_messages(dump: Dump) -> None:
    s = OscSettings(
        destinations=[f"127.0.0.1:{dump.port}"], prefix="/stage/left", bundle=False,
        voice_fields=["hz", "note", "level", "present"],
        sensor_fields=["position", "raw", "c", "baseline", "present"],
    )
    r = reading(3)
    with OscSink(s) as sink:
        sink.send(r)
        exp = expected_lines(s, r)
        lines = dump.take(len(exp), s.prefix)
    check(lines, exp)


def test_scheduled_time_tag_read_by_liblo(dump: Dump) -> None:
    # liblo decodes the bundle's NTP time tag independently of us and prints it; it must
    # fall between "now + ahead" taken just before and just after the send.
    ahead = 0.2
    s = OscSettings(destinations=[f"127.0.0.1:{dump.port}"], time_tag="scheduled",
                    schedule_ahead_ms=ahead * 1e3, sensor_fields=[])
    with OscSink(s) as sink:
        before = time.time()
        sink.send(reading(0))
        after = time.time()
        lines = dump.take(6, s.prefix)
    assert len(lines) == 6
    lo, hi = ntp_timetag(before + ahead), ntp_timetag(after + ahead)
    for ln in lines:
        tag = (ln.tag[0] << 32) | ln.tag[1]
        assert lo <= tag <= hi
