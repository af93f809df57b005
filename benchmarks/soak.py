#!/usr/bin/env python3
"""Soak: the live daemon held under a 16-channel board at 1 kHz, then a long decoder fuzz.

The load run is the one ``tests/test_reliability.py::test_load_held_16_channels_1khz``
runs for 60 s, here for ten minutes. A simulated board (seven pitch antennas, seven volume
antennas, a reference oscillator and one unused input: 16 channels) sends binary frames at
1000 frames a second through a real pseudo-terminal (:class:`bridge.sources.PtyBoard`). The
real :class:`bridge.daemon.Daemon` runs in a thread of this process: pyserial reads the pty,
the binary decoder, the engine with seven voices, and a :class:`bridge.outputs.midi.MidiSink`
whose rate cap (``max_rate_hz``, 100 by default here) is ten times below the frame rate,
so every continuous stream is a flood that must be coalesced, not queued.

Two small outputs observe the run without changing it, both with storage allocated before
the run so that they add nothing to the memory figures:

* :class:`LatencyProbe` (a :class:`bridge.outputs.Sink`, last in the daemon's list): for
  each reading, the time from the board's write of that frame (looked up by its sequence
  number) to the moment every output has had it;
* :class:`CountingPort` (a MIDI ``RawPort``): messages per second per channel and kind,
  on the readings' own clock, and the notes a receiver would hold.

Figures (``name: value unit``)::

    soak_frames_sent / soak_frames_processed   what the board wrote / what the daemon played
    soak_board_dropped                         frames the pty could not take (reader behind)
    soak_decoder_drops                         all drop reasons summed (0 expected)
    soak_latency_p50_ms / _p99_ms / _max_ms    write -> all outputs, after warm-up
    soak_latency_p99_first_ms / _last_ms       the first and last 10 s windows (drift check)
    soak_latency_typical_p99_first_ms / _last_ms   median of the per-second p99 in those
                                               windows
    soak_latency_typical_p50_first_ms / _last_ms   the same for the median (a backlog
                                               would raise it: the drift check compares it)
    soak_daemon_latency_p99_ms                 read returned -> all outputs: the daemon's
                                               own part of the latency, after warm-up
    soak_daemon_latency_typical_p99_first_ms / _last_ms   its typical p99 in the first and
                                               last windows (the drift check compares it)
    soak_rss_growth_mb                         VmRSS at the end minus after warm-up
    soak_midi_bend_per_s_max                   busiest pitch-bend stream, messages a second
    soak_midi_level_per_s_max                  busiest level stream, messages a second
    soak_stuck_notes                           notes left on after the daemon stopped

then the decoder fuzz: :func:`fuzz_decoders.main` (benchmarks/fuzz_decoders.py) with at
least ten million random and damaged chunks per decoder.

    python benchmarks/soak.py                    # 10 min load + 10 M chunks per decoder
    python benchmarks/soak.py --seconds 60 --chunks 200000     # a shorter pass
"""

from __future__ import annotations

import argparse
import contextlib
import math
import os
import statistics
import sys
import tempfile
import threading
import time
from array import array
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from bridge.daemon import Daemon, Setup
from bridge.frames import FrameSettings, encode_binary
from bridge.outputs import Sink
from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.pipeline import ChannelSettings, VoiceSettings
from bridge.sources import PtyBoard, SourceSettings

#: The benchmarks folder (common.py, fuzz_decoders.py); put on sys.path only by main(), so
#: that a test importing this module for run_load() leaves the import path alone.
HERE = Path(__file__).resolve().parent

RATE_HZ = 1000.0
WINDOW_S = 1.0 / RATE_HZ
VOICES = 7
N_CHANNELS = 16
SEQ_MODULUS = 65536  # binary frames carry a uint16 sequence number (docs/protocol.md)
TABLE_FRAMES = 40_000  # 40 s of the simulator's warm-up performance, played in a loop
NIBBLES = 16
BEND = 0xE  # MIDI 1.0: status high nibble of pitch bend
CC = 0xB  # control change
NOTE_ON, NOTE_OFF = 0x9, 0x8


# ============================================================================== the rig


@dataclass
class LoadRig:
    """A 16-channel setup and the frames its board plays (values in channel order)."""

    channels: list[ChannelSettings]
    voices: list[VoiceSettings]
    calibration: Any
    rows: list[list[int]]


def channel_layout() -> list[ChannelSettings]:
    """p0..p6 pitch, v0..v6 volume, the reference and one unused input: 16 channels."""
    out = [ChannelSettings(name=f"p{k}", role="pitch", kind="period") for k in range(VOICES)]
    out += [ChannelSettings(name=f"v{k}", role="volume", kind="period") for k in range(VOICES)]
    out.append(ChannelSettings(name="ref", role="reference", kind="period"))
    out.append(ChannelSettings(name="spare", role="unused", kind="period"))
    assert len(out) == N_CHANNELS
    return out


def make_rig(seed: int = 7) -> LoadRig:
    """Simulate a soundcheck at 1 kHz on the demo board (pitch, volume, reference) and give
    every antenna of the 16-channel layout that calibration; each voice plays the demo
    performance shifted in time, so the seven voices move differently."""
    from bridge.demo import demo_board_settings, demo_calibration, demo_channels
    from bridge.sim import SimBoard, scenario
    from bridge.soundcheck import RigCalibration

    s = demo_board_settings(seed, WINDOW_S)
    demo = demo_calibration(s, demo_channels(s))
    channels = channel_layout()
    cals = {}
    for k in range(VOICES):
        cals[f"p{k}"] = demo.channels["pitch"]
        cals[f"v{k}"] = demo.channels["volume"]
    calibration = RigCalibration(cals, reference_base=demo.reference_base, rate_hz=RATE_HZ)
    voices = [
        VoiceSettings(name=f"voice{k}", pitch_channel=f"p{k}", volume_channel=f"v{k}")
        for k in range(VOICES)
    ]
    perf = scenario("warmup", seed)
    perf.loop = True
    values, _truth = SimBoard(s.model_copy(update={"seed": seed + 1}), perf).run(TABLE_FRAMES)
    names = s.names  # pitch, volume, ref
    pitch, volume, ref = (values[:, names.index(n)].tolist() for n in ("pitch", "volume", "ref"))
    n = len(pitch)
    rows = []
    for i in range(n):
        row = [pitch[(i + 3001 * k) % n] for k in range(VOICES)]
        row += [volume[(i + 3001 * k) % n] for k in range(VOICES)]
        row += [ref[i], 1000]
        rows.append(row)
    return LoadRig(channels, voices, calibration, rows)


def make_setup(rig: LoadRig, url: str) -> Setup:
    return Setup(
        channels=rig.channels,
        voices=rig.voices,
        frames=FrameSettings(format="binary"),
        source=SourceSettings(url=url, quiet_after_s=0.5),
        rate_hz=RATE_HZ,
        calibration=rig.calibration,
        profile="soak",
    )


# ============================================================================== the board


class Feed:
    """The board's frame generator: the rig's rows in a loop, binary frames with seq.

    The first call starts with a lone 0x00, which the protocol allows at start-up
    (docs/protocol.md section 2) and which lets a reader that has just opened the port
    take the very first frame (section 4). ``sent_at[seq]`` is the perf_counter time the
    frame with that 16-bit sequence number was handed to the pty.
    """

    def __init__(self, rows: Sequence[Sequence[int]]) -> None:
        self.rows = rows
        self.count = 0
        self.sent_at = array("d", [0.0]) * SEQ_MODULUS

    def __call__(self) -> bytes:
        i = self.count
        self.count = i + 1
        data = encode_binary(i, self.rows[i % len(self.rows)])
        if i == 0:
            data = b"\x00" + data
        self.sent_at[i % SEQ_MODULUS] = time.perf_counter()
        return data


# ============================================================================== observers


class LatencyProbe(Sink):
    """An output that notes, per reading, how long ago its frame was written.

    Put it last in the daemon's sink list: the time then covers the pty, the read, the
    decoder, the engine and every other output. Arrays are allocated up front.
    """

    kind = "latency-probe"

    def __init__(self, feed: Feed, capacity: int) -> None:
        self.feed = feed
        self.latency = array("d", [0.0]) * capacity
        self.inside = array("d", [0.0]) * capacity
        self.at = array("d", [0.0]) * capacity
        self.count = 0
        self.capacity = capacity
        self.t0 = 0.0

    def open(self) -> None:
        pass

    def send(self, reading: Any) -> None:
        now = time.perf_counter()
        # reading.t is the daemon's time.monotonic() when the read that brought the frame
        # returned: monotonic now minus it is the time spent inside the daemon.
        inside = time.monotonic() - reading.t
        i = self.count
        if i < self.capacity and reading.seq is not None:
            self.latency[i] = now - self.feed.sent_at[reading.seq]
            self.inside[i] = inside
            self.at[i] = now - self.t0
        self.count = i + 1

    def silence(self, reason: str) -> None:
        pass

    def window(self, start_s: float, end_s: float, *, inside: bool = False) -> list[float]:
        """Latencies (s) of the readings that arrived between start_s and end_s: from the
        board's write (or, with ``inside``, from the daemon's read) to all outputs done."""
        n = min(self.count, self.capacity)
        values = self.inside if inside else self.latency
        return [values[i] for i in range(n) if start_s <= self.at[i] < end_s]

    def typical(self, start_s: float, end_s: float, q: float, *, inside: bool = False
                ) -> float:
        """The median over the whole seconds of [start_s, end_s) of each second's q-quantile.

        One second in which other programs took the cores moves this figure by one rank
        out of ten, not to that second's value: it follows the code, not a passing burst.
        """
        per_second = [percentile(self.window(a, a + 1.0, inside=inside), q)
                      for a in range(int(start_s), int(end_s))]
        per_second = [x for x in per_second if not math.isnan(x)]
        return statistics.median(per_second) if per_second else math.nan


class CountingPort:
    """A MIDI RawPort that counts messages per second, channel and kind, and tracks notes.

    ``timed``: the sink passes each message's reading time, so the counts follow the clock
    the rate cap works on. ``held`` is what a receiver would hold (MIDI 1.0: a note-on with
    velocity 0 is a note-off).
    """

    timed = True
    name = "counting"

    def __init__(self, seconds: int, t0: float) -> None:
        self.seconds = seconds
        self.t0 = t0
        self.counts = array("I", [0]) * (seconds * 16 * NIBBLES)
        self.messages = 0
        self.out_of_range = 0
        self.held: set[tuple[int, int]] = set()
        self.closed = False

    def send(self, data: bytes, t: float | None = None) -> None:
        self.messages += 1
        status = data[0]
        nibble, ch = status >> 4, status & 0x0F
        if not status & 0x80 or any(b > 0x7F for b in data[1:]):
            self.out_of_range += 1
        if nibble == NOTE_ON and data[2] > 0:
            self.held.add((ch, data[1]))
        elif nibble in (NOTE_ON, NOTE_OFF):
            self.held.discard((ch, data[1]))
        if t is not None:
            sec = int(t - self.t0)
            if 0 <= sec < self.seconds:
                self.counts[(sec * 16 + ch) * NIBBLES + nibble] += 1

    def per_second(self, sec: int, ch: int, nibble: int) -> int:
        return self.counts[(sec * 16 + ch) * NIBBLES + nibble]

    def close(self) -> None:
        self.closed = True


# ============================================================================== the run


def rss_kb() -> int:
    """VmRSS of this process in KiB (proc(5))."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    return 0


def percentile(values: Sequence[float], q: float) -> float:
    """The q-quantile (0..1) by the nearest-rank method; NaN for no values."""
    if not values:
        return math.nan
    s = sorted(values)
    k = max(0, min(len(s) - 1, math.ceil(q * len(s)) - 1))
    return s[k]


@dataclass
class LoadResult:
    seconds: float
    warmup_s: float
    frames_sent: int
    frames_processed: int
    board_dropped: int
    drops: dict[str, int]
    resyncs: int
    p50_s: float
    p99_s: float
    max_s: float
    p99_first_s: float
    p99_last_s: float
    typical_p99_first_s: float
    typical_p99_last_s: float
    typical_p50_first_s: float
    typical_p50_last_s: float
    inside_p99_s: float
    inside_typical_p99_first_s: float
    inside_typical_p99_last_s: float
    rss_after_warmup_kb: int
    rss_end_kb: int
    rss_samples_kb: list[int]
    bend_per_s_max: int
    level_per_s_max: int
    cap_excess: list[str]
    note_ons: int
    stuck_notes: set[tuple[int, int]]
    out_of_range: int
    sink_errors: int
    daemon_error: BaseException | None = None
    counts: dict[str, int] = field(default_factory=dict)

    @property
    def rss_growth_mb(self) -> float:
        return (self.rss_end_kb - self.rss_after_warmup_kb) / 1024.0


def _wait(pred: Any, timeout: float, step: threading.Event) -> bool:
    deadline = time.monotonic() + timeout
    while not pred():
        if time.monotonic() >= deadline:
            return False
        step.wait(0.01)
    return True


@contextlib.contextmanager
def _daemon_thread(daemon: Daemon) -> Iterator[dict[str, Any]]:
    box: dict[str, Any] = {"error": None}

    def run() -> None:
        try:
            daemon.run()
        except BaseException as exc:  # reported in the result, so a crash is seen
            box["error"] = exc

    thread = threading.Thread(target=run, name="soak-daemon", daemon=True)
    thread.start()
    try:
        yield box
    finally:
        if thread.is_alive():
            daemon.request_stop()  # shutdown: outputs silenced and closed
            thread.join(10.0)


def run_load(
    seconds: float = 60.0,
    *,
    warmup_s: float = 10.0,
    window_s: float = 10.0,
    max_rate_hz: float = 100.0,
    rig: LoadRig | None = None,
    folder: str | None = None,
) -> LoadResult:
    """Play the 16-channel board at 1 kHz into the daemon for ``seconds`` and measure."""
    rig = rig or make_rig()
    feed = Feed(rig.rows)
    capacity = int(seconds * RATE_HZ * 1.1) + 1000
    probe = LatencyProbe(feed, capacity)
    t_origin = time.monotonic()
    port = CountingPort(int(seconds) + 30, t_origin)
    midi = MidiSink(MidiSettings(max_rate_hz=max_rate_hz), [port])
    step = threading.Event()
    rss: list[int] = [0] * (int(seconds) + 5)
    with tempfile.TemporaryDirectory(prefix="fb-soak-", dir=folder) as tmp:
        board = PtyBoard(feed, WINDOW_S, link_path=os.path.join(tmp, "board"))
        board.pause()  # plugged in, silent until the daemon has the port open
        board.start()
        try:
            daemon = Daemon(make_setup(rig, board.path), [midi, probe])
            with _daemon_thread(daemon) as box:
                if not _wait(lambda: daemon.source is not None and daemon.source.generation >= 1
                             or box["error"] is not None, 10.0, step):
                    raise RuntimeError("the daemon did not open the board's port in 10 s")
                start = time.monotonic()
                probe.t0 = time.perf_counter()
                board.resume()
                rss_warm = 0
                n_rss = 0
                for k in range(1, int(seconds) + 1):
                    step.wait(max(0.0, start + k - time.monotonic()))
                    if box["error"] is not None:
                        break
                    if n_rss < len(rss):
                        rss[n_rss] = rss_kb()
                        n_rss += 1
                    if k == int(warmup_s):
                        rss_warm = rss_kb()
                board.pause()  # then let the daemon take every frame the pty still holds
                _wait(lambda: daemon.counters.frames >= board.frames_sent
                      or box["error"] is not None, 10.0, step)
                sent = board.frames_sent
                processed = daemon.counters.frames
                rss_end = rss_kb()
                decoder = daemon.decoder
                drops = dict(decoder.drops)
                resyncs = decoder.resyncs
            error = box["error"]
        finally:
            board.stop()
    measured = probe.window(warmup_s, seconds + 1.0)
    first = probe.window(warmup_s, warmup_s + window_s)
    last = probe.window(seconds - window_s, seconds + 1.0)
    bend_max = level_max = 0
    excess: list[str] = []
    # Sends at least 1/max_rate apart: at most max_rate + 1 of them in one second.
    interval_cap = math.floor(max_rate_hz) + 1
    first_sec = int(warmup_s)
    for sec in range(first_sec, int(seconds)):
        for ch in range(VOICES):
            ons = port.per_second(sec, ch, NOTE_ON)
            bends = port.per_second(sec, ch, BEND)
            ccs = port.per_second(sec, ch, CC)
            bend_max = max(bend_max, bends)
            level_max = max(level_max, ccs)
            # A note-on forces its bend, level (and the bend-range set-up: 6 CCs) out
            # regardless of the cap, so each note-on may add those to its second.
            if bends > interval_cap + ons:
                excess.append(f"second {sec} channel {ch + 1}: {bends} bends, {ons} note-ons")
            if ccs > interval_cap + 7 * ons:
                excess.append(f"second {sec} channel {ch + 1}: {ccs} CCs, {ons} note-ons")
    return LoadResult(
        seconds=seconds,
        warmup_s=warmup_s,
        frames_sent=sent,
        frames_processed=processed,
        board_dropped=board.frames_dropped,
        drops=drops,
        resyncs=resyncs,
        p50_s=percentile(measured, 0.50),
        p99_s=percentile(measured, 0.99),
        max_s=max(measured) if measured else math.nan,
        p99_first_s=percentile(first, 0.99),
        p99_last_s=percentile(last, 0.99),
        typical_p99_first_s=probe.typical(warmup_s, warmup_s + window_s, 0.99),
        typical_p99_last_s=probe.typical(seconds - window_s, seconds, 0.99),
        typical_p50_first_s=probe.typical(warmup_s, warmup_s + window_s, 0.50),
        typical_p50_last_s=probe.typical(seconds - window_s, seconds, 0.50),
        inside_p99_s=percentile(probe.window(warmup_s, seconds + 1.0, inside=True), 0.99),
        inside_typical_p99_first_s=probe.typical(warmup_s, warmup_s + window_s, 0.99,
                                                 inside=True),
        inside_typical_p99_last_s=probe.typical(seconds - window_s, seconds, 0.99, inside=True),
        rss_after_warmup_kb=rss_warm,
        rss_end_kb=rss_end,
        rss_samples_kb=rss[:n_rss],
        bend_per_s_max=bend_max,
        level_per_s_max=level_max,
        cap_excess=excess,
        note_ons=midi.counts.get("note_on", 0),
        stuck_notes=set(port.held),
        out_of_range=port.out_of_range,
        sink_errors=daemon.counters.sink_errors,
        daemon_error=error,
        counts=midi.counts,
    )


# ============================================================================== figures


def report(r: LoadResult) -> None:
    from common import figure, note

    figure("soak_seconds", r.seconds, "s")
    figure("soak_frames_sent", r.frames_sent, "frames", digits=9)
    figure("soak_frames_processed", r.frames_processed, "frames", digits=9)
    figure("soak_board_dropped", r.board_dropped, "frames", goal="<= 0")
    figure("soak_decoder_drops", sum(r.drops.values()), "frames", goal="<= 0")
    figure("soak_latency_p50_ms", r.p50_s * 1e3, "ms")
    figure("soak_latency_p99_ms", r.p99_s * 1e3, "ms")
    figure("soak_latency_max_ms", r.max_s * 1e3, "ms")
    figure("soak_latency_p99_first_ms", r.p99_first_s * 1e3, "ms")
    figure("soak_latency_p99_last_ms", r.p99_last_s * 1e3, "ms")
    figure("soak_latency_typical_p99_first_ms", r.typical_p99_first_s * 1e3, "ms")
    figure("soak_latency_typical_p99_last_ms", r.typical_p99_last_s * 1e3, "ms")
    figure("soak_latency_typical_p50_first_ms", r.typical_p50_first_s * 1e3, "ms")
    figure("soak_latency_typical_p50_last_ms", r.typical_p50_last_s * 1e3, "ms")
    figure("soak_daemon_latency_p99_ms", r.inside_p99_s * 1e3, "ms")
    figure("soak_daemon_latency_typical_p99_first_ms", r.inside_typical_p99_first_s * 1e3, "ms")
    figure("soak_daemon_latency_typical_p99_last_ms", r.inside_typical_p99_last_s * 1e3, "ms")
    figure("soak_rss_growth_mb", r.rss_growth_mb, "MB", goal="<= 1")
    figure("soak_midi_bend_per_s_max", r.bend_per_s_max, "messages/s")
    figure("soak_midi_level_per_s_max", r.level_per_s_max, "messages/s")
    figure("soak_stuck_notes", len(r.stuck_notes), "notes", goal="<= 0")
    note(f"drops {r.drops}, resyncs {r.resyncs}, note-ons {r.note_ons}, MIDI sent {r.counts}")
    if r.cap_excess:
        note(f"rate cap exceeded: {r.cap_excess[:5]}")
    if r.daemon_error is not None:
        note(f"daemon raised {r.daemon_error!r}")


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=600.0, help="load run length (600)")
    ap.add_argument("--warmup", type=float, default=10.0, help="seconds before measuring (10)")
    ap.add_argument("--max-rate", type=float, default=100.0, help="MIDI cap per stream (100/s)")
    ap.add_argument("--chunks", type=int, default=10_000_000,
                    help="fuzz chunks per decoder (at least 10 million for the soak)")
    ap.add_argument("--seed", type=int, default=1, help="fuzz seed")
    ap.add_argument("--skip-fuzz", action="store_true")
    ap.add_argument("--skip-load", action="store_true")
    args = ap.parse_args(argv)
    if str(HERE) not in sys.path:
        sys.path.insert(0, str(HERE))
    from common import header, note

    header("soak")
    status = 0
    if not args.skip_load:
        note(f"16 channels (7 voices) at 1000 frames/s for {args.seconds:g} s, binary frames "
             f"through a pty; MIDI capped at {args.max_rate:g} messages/s per stream")
        result = run_load(args.seconds, warmup_s=args.warmup, max_rate_hz=args.max_rate)
        report(result)
        if result.daemon_error is not None:
            status = 1
    if not args.skip_fuzz:
        import fuzz_decoders

        note(f"decoder fuzz: {args.chunks} random and damaged chunks per decoder")
        status |= fuzz_decoders.main(["--chunks", str(args.chunks), "--seed", str(args.seed)])
    note(f"load average {os.getloadavg()[0]:.2f} (other work on this machine shares the cores)")
    return status


if __name__ == "__main__":
    sys.exit(main())
