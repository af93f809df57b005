#!/usr/bin/env python3
"""Added latency of the live daemon: a frame's bytes into a pseudo-terminal, OSC out.

Three processes take part, as on a stage: the board (this process writes frames into a
pseudo-terminal at 1000 frames a second), the bridge (a child process reading the pty's
other end with pyserial) and the listener (another child that receives the UDP datagrams).
The bridge is, in turn:

``daemon``     the real :class:`bridge.daemon.Daemon` with a venue profile loaded from a
               file (a simulated soundcheck at 1 kHz, saved with
               :func:`bridge.profiles.save_venue`), text frames with a leading sequence
               number, and an :class:`bridge.outputs.osc.OscSink` to the listener (OSC
               only: daemon_load.py measures the rig with MIDI too);
``forwarder``  the floor: a minimal pyserial program that reads what arrived (one blocking
               byte, then whatever else is waiting, the same read pattern as
               :class:`bridge.sources.SerialSource`), cuts it into lines and sends each
               line as one datagram. It measures what the operating system, pyserial and
               the interpreter cost before any of our code runs.

Latency of one frame = the listener's CLOCK_MONOTONIC when its ``recv`` returns minus the
board's CLOCK_MONOTONIC taken just before the ``write`` of the whole frame (one system
call, so "last byte written" is the end of that call; taking the time before it counts the
call itself against the bridge, never in its favour). ``time.monotonic_ns`` reads
CLOCK_MONOTONIC on Linux, one clock for every process on the machine.

Matching datagrams to frames: every OSC bundle carries each channel's raw reading
(``/fieldbridge/sensor/<channel>/raw``), and the forwarder's datagram is the line itself,
so the tuple of raw readings identifies the frame. Frames come from the simulator
(:class:`bridge.sim.SimBoard`, the warm-up performance, so the pipeline tracks, calibrates
and maps real hand movements); the rare frame whose readings repeat an earlier one is
left out of the stream, so every key is unique. A frame whose key never comes back is
counted as lost.

The two bridges take turns (forwarder, daemon, forwarder, daemon, ...) on fresh ptys, so
slow drifts in the machine's load fall on both alike. Each turn first plays warm-up
frames until the listener hears the bridge, then one more second, then the measured
frames.

Figures (``name: value unit``; goals from the issue "The live daemon")::

    daemon_latency_p50 / _p99      ms, goal p99 under 1 ms
    forwarder_latency_p50 / _p99   ms, the floor
    ratio_p99                      daemon p99 / forwarder p99, goal at most 1.5
    frames                         measured frames per bridge
    lost                           measured frames the daemon never delivered

    python benchmarks/daemon_latency.py            # 4 x 1500 frames per bridge, ~30 s
    python benchmarks/daemon_latency.py --quick    # 1 x 2000 frames per bridge
    python benchmarks/daemon_latency.py --cprofile # also profile the daemon child

The same file is the child programs (``--role daemon|forwarder|listener``); the load
benchmark (daemon_load.py) starts its daemon through it too. Children import only what
they use, so the daemon's start-up time is that of a real one.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import os
import select
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import time
import tty
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve()
WINDOW_S = 0.001  # 1000 frames a second
SEED = 7
PERFORMANCE = "warmup"
STOP = b"stop"  # the datagram that ends a listener

# ============================================================================ the profile


def write_venue(path: Path, *, window_s: float = WINDOW_S, seed: int = SEED) -> None:
    """Simulate a soundcheck at ``window_s`` and save it as a venue profile (TOML)."""
    from bridge.demo import demo_board_settings, demo_calibration, demo_channels
    from bridge.profiles import VenueProfile, save_venue

    s = demo_board_settings(seed, window_s)
    channels = demo_channels(s)
    if channels != rig_channels():
        raise RuntimeError("rig_channels() no longer matches the demo board's channels")
    cal = demo_calibration(s, channels)
    save_venue(path, VenueProfile.from_calibration(cal, notes="benchmark soundcheck"))


def rig_channels() -> list[Any]:
    """The demo board's channels (as :func:`bridge.demo.demo_channels` gives them), written
    out so that the daemon child does not import the simulator, as a real daemon does not."""
    from bridge.pipeline import ChannelSettings

    return [
        ChannelSettings(name="pitch", role="pitch", kind="period"),
        ChannelSettings(name="volume", role="volume", kind="period"),
        ChannelSettings(name="ref", role="reference", kind="period"),
    ]


def load_setup(venue_path: Path, url: str, *, window_s: float = WINDOW_S) -> Any:
    """The daemon's Setup: the demo board's channel layout and the saved venue profile."""
    from bridge.daemon import Setup
    from bridge.frames import FrameSettings
    from bridge.pipeline import VoiceSettings
    from bridge.profiles import load_venue
    from bridge.sources import SourceSettings

    return Setup(
        channels=rig_channels(),
        voices=[VoiceSettings(name="lead", pitch_channel="pitch", volume_channel="volume")],
        frames=FrameSettings(format="text", leading_seq=True, kind="period"),
        source=SourceSettings(url=url),
        rate_hz=1.0 / window_s,
        calibration=load_venue(venue_path).calibration(),
        profile=venue_path.stem,
    )


def board(seed: int = SEED, window_s: float = WINDOW_S) -> Any:
    """The board that plays: same settings as the soundcheck's, another noise seed."""
    from bridge.demo import demo_board_settings
    from bridge.sim import SimBoard, scenario

    s = demo_board_settings(seed, window_s)
    perf = scenario(PERFORMANCE, seed)
    perf.loop = True
    return SimBoard(s.model_copy(update={"seed": seed + 1}), perf)


def unique_frames(n: int, seed: int = SEED) -> list[tuple[int, ...]]:
    """``n`` consecutive frames of readings from the board, dropping any repeated tuple."""
    values, _truth = board(seed).run(int(n * 1.05) + 100)
    seen: set[tuple[int, ...]] = set()
    out: list[tuple[int, ...]] = []
    for row in values.tolist():
        key = tuple(row)
        if key not in seen:
            seen.add(key)
            out.append(key)
            if len(out) == n:
                return out
    raise RuntimeError("the simulator repeated too many frames to key them")


# ============================================================================ children


def _on_term(flag: list[bool]) -> None:
    def handler(*_: object) -> None:
        flag[0] = True

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, handler)


def child_daemon(args: argparse.Namespace) -> int:
    """The real daemon on ``args.url`` with OSC to ``args.osc`` (plus MIDI, if asked)."""
    logging.basicConfig(level=logging.WARNING, format="daemon %(levelname)s %(name)s: %(message)s")
    from bridge.daemon import Daemon
    from bridge.outputs import make_sink
    from bridge.outputs.osc import OscSettings

    setup = load_setup(Path(args.venue), args.url, window_s=args.window_s)
    sinks = [make_sink("osc", OscSettings(destinations=[args.osc]))]
    if args.midi == "null":
        from bridge.outputs.midi import MidiSettings
        from bridge.outputs.midiports import NullPort

        sinks.append(make_sink("midi", MidiSettings(), ports=[NullPort()]))
    elif args.midi.startswith("file:"):
        from bridge.outputs.midifile import MidiFileSettings

        sinks.append(make_sink("midifile", MidiFileSettings(path=Path(args.midi[5:]))))
    daemon = Daemon(setup, sinks)
    daemon.install_signal_handlers()
    if args.cprofile:
        import cProfile

        prof = cProfile.Profile()
        prof.enable()
        try:
            counters = daemon.run()
        finally:
            prof.disable()
            prof.dump_stats(args.cprofile)
    else:
        counters = daemon.run()
    dec = daemon.decoder
    summary = {
        "frames": counters.frames,
        "silences": counters.silences,
        "sink_errors": counters.sink_errors,
        "frames_ok": dec.frames_ok,
        "drops": {k: v for k, v in dec.drops.items() if v},
        "osc_datagrams": getattr(sinks[0], "datagrams", 0),
        "midi": {k: v for s in sinks[1:] for k, v in getattr(s, "counts", {}).items()},
        "seconds": time.monotonic() - daemon.started_at,
    }
    print("SUMMARY " + json.dumps(summary), flush=True)
    return 0


def child_forwarder(args: argparse.Namespace) -> int:
    """The floor: read from the pty with pyserial, one datagram per line, nothing else."""
    import serial

    stop = [False]
    _on_term(stop)
    host, port = args.osc.rsplit(":", 1)
    dest = (host, int(port))
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    ser = serial.Serial(args.url, baudrate=115200, timeout=0.05, exclusive=True)
    ser.reset_input_buffer()
    pending = b""
    lines = 0
    while not stop[0]:
        data = ser.read(1)
        if not data:
            continue
        waiting = ser.in_waiting
        if waiting:
            data += ser.read(waiting)
        pending += data
        *done, pending = pending.split(b"\n")
        for line in done:
            sock.sendto(line, dest)
            lines += 1
    ser.close()
    print("SUMMARY " + json.dumps({"frames": lines}), flush=True)
    return 0


def child_listener(args: argparse.Namespace) -> int:
    """Receive datagrams until ``stop``; print the port, then "heard" at the first one;
    finally write (arrival ns, key) pairs to ``args.out`` as JSON lines."""
    import gc

    gc.disable()  # nothing here makes cycles; no collector pause in the receive loop
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
    sock.bind(("127.0.0.1", 0))
    print(f"port {sock.getsockname()[1]}", flush=True)
    times: list[int] = []
    grams: list[bytes] = []
    clock = time.monotonic_ns
    recv = sock.recv
    data = recv(65536)
    times.append(clock())
    grams.append(data)
    print("heard", flush=True)
    while data != STOP:
        data = recv(65536)
        times.append(clock())
        grams.append(data)
    with open(args.out, "w") as f:
        for t, g in zip(times, grams):
            key = datagram_key(g)
            if key is not None:
                f.write(f"{t} {' '.join(map(str, key))}\n")
    return 0


# ============================================================================ keys


def _osc_string(data: bytes, i: int) -> tuple[bytes, int]:
    """An OSC-string at ``i`` and the offset after its padding (OSC 1.0 specification)."""
    end = data.index(b"\x00", i)
    return data[i:end], (end + 4) & ~3


def osc_raws(data: bytes) -> tuple[int, ...] | None:
    """The int32 arguments of every ``.../raw`` message of one OSC bundle, in order."""
    if not data.startswith(b"#bundle\x00"):
        return None
    out: list[int] = []
    i = 16  # "#bundle\0" and the 8-byte time tag
    while i + 4 <= len(data):
        (size,) = struct.unpack_from(">i", data, i)
        msg = data[i + 4 : i + 4 + size]
        i += 4 + size
        address, j = _osc_string(msg, 0)
        tags, j = _osc_string(msg, j)
        if address.endswith(b"/raw") and tags == b",i":
            out.append(struct.unpack_from(">i", msg, j)[0])
    return tuple(out) or None


def datagram_key(data: bytes) -> tuple[int, ...] | None:
    """The frame's readings carried by a datagram (OSC bundle, or a forwarded text line)."""
    if data.startswith(b"#"):
        return osc_raws(data)
    try:
        fields = [int(x) for x in data.split()]
    except ValueError:
        return None  # the fragment before the first line ending
    return tuple(fields[1:]) if len(fields) > 1 else None  # drop the leading sequence number


# ============================================================================ parent side


def child_cmd(role: str, *extra: str) -> list[str]:
    return [sys.executable, str(HERE), "--role", role, *extra]


class Child:
    """A child process of this benchmark; killed for sure when the block ends."""

    def __init__(self, cmd: Sequence[str], *, stdout: int | None = subprocess.PIPE) -> None:
        self.started = time.monotonic()
        self.proc = subprocess.Popen(
            list(cmd), stdout=stdout, stderr=subprocess.PIPE, text=True, bufsize=1
        )

    @property
    def pid(self) -> int:
        return self.proc.pid

    def line(self, timeout: float) -> str:
        """Next stdout line, or RuntimeError with the child's stderr after ``timeout``."""
        out = self.proc.stdout
        assert out is not None
        ready, _, _ = select.select([out], [], [], timeout)
        if not ready:
            raise RuntimeError(f"child {self.proc.args[3]} said nothing in {timeout} s")
        text = out.readline()
        if not text:
            self.proc.wait(5)
            err = self.proc.stderr.read() if self.proc.stderr else ""
            raise RuntimeError(f"child {self.proc.args[3]} ended: {err[-2000:]}")
        return text.strip()

    def ready_line(self) -> bool:
        """True when a stdout line is waiting (never blocks)."""
        out = self.proc.stdout
        return out is not None and bool(select.select([out], [], [], 0)[0])

    def stop(self, timeout: float = 5.0) -> tuple[str, str]:
        """SIGTERM, wait, then SIGKILL if needed; returns (stdout, stderr) left over."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            out, err = self.proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            out, err = self.proc.communicate()
        return out or "", err or ""

    def __enter__(self) -> Child:
        return self

    def __exit__(self, *exc: object) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()


def summary_of(stdout: str) -> dict[str, Any]:
    for line in stdout.splitlines():
        if line.startswith("SUMMARY "):
            return dict(json.loads(line[8:]))
    return {}


@contextlib.contextmanager
def pty_pair() -> Iterator[tuple[int, str]]:
    """A raw pseudo-terminal: (master fd to write, slave path to open). Our slave fd stays
    open so the pty outlives the reader's open and close."""
    master, slave = os.openpty()
    tty.setraw(slave)
    os.set_blocking(master, False)  # a full pty buffer must not stall the board
    try:
        yield master, os.ttyname(slave)
    finally:
        os.close(master)
        os.close(slave)


@dataclass
class Turn:
    bridge: str
    latencies_ns: list[int]
    sent: int
    lost: int
    summary: dict[str, Any]


def encode(key: tuple[int, ...], seq: int) -> bytes:
    from bridge.frames import encode_text

    return encode_text(key, seq=seq % 2**32)


def play_turn(
    bridge: str,
    venue: Path,
    warm: list[tuple[int, ...]],
    measured: list[tuple[int, ...]],
    workdir: Path,
    *,
    cprofile: str | None = None,
) -> Turn:
    """One bridge on a fresh pty: warm up until heard, one more second, then measure."""
    out = workdir / f"heard-{bridge}-{time.monotonic_ns()}.txt"
    with contextlib.ExitStack() as stack:
        master, slave_path = stack.enter_context(pty_pair())
        listener = stack.enter_context(Child(child_cmd("listener", "--out", str(out))))
        port = int(listener.line(10).split()[1])
        extra = ["--url", slave_path, "--osc", f"127.0.0.1:{port}"]
        if bridge == "daemon":
            extra += ["--venue", str(venue)]
            if cprofile:
                extra += ["--cprofile", cprofile]
        subject = stack.enter_context(Child(child_cmd(bridge, *extra)))
        period_ns = int(WINDOW_S * 1e9)
        clock = time.monotonic_ns
        write = os.write
        seq = 0
        deadline = clock()

        def pace() -> None:
            nonlocal deadline
            deadline += period_ns
            wait = deadline - clock()
            if wait > 0:
                time.sleep(wait / 1e9)
            elif wait < -10 * period_ns:
                deadline = clock()  # fell far behind: a fresh schedule, not a burst

        # Warm-up: until the listener hears the bridge (start-up, imports, port open),
        # then one more second so trackers and caches settle.
        heard_at = None
        give_up = clock() + 30_000_000_000
        i = 0
        while heard_at is None or seq < heard_at + 1000:
            frame = encode(warm[i % len(warm)], seq)
            i += 1
            pace()
            with contextlib.suppress(BlockingIOError):  # nobody reads yet: the pty is full
                write(master, frame)
            seq += 1
            if heard_at is None and seq % 50 == 0 and listener.ready_line():
                listener.line(1)
                heard_at = seq
            if subject.proc.poll() is not None or clock() > give_up:
                _, err = subject.stop()
                raise RuntimeError(f"{bridge} never delivered a datagram: {err[-2000:]}")
        sent_ns: list[int] = []
        for key in measured:
            frame = encode(key, seq)
            pace()
            t = clock()
            try:
                if write(master, frame) != len(frame):
                    t = -1  # a partial write: the bridge is not keeping up; counted lost
            except BlockingIOError:
                t = -1
            sent_ns.append(t)
            seq += 1
        time.sleep(0.2)  # stragglers
        sout, serr = subject.stop()
        with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
            s.sendto(STOP, ("127.0.0.1", port))
        listener.proc.wait(10)
    if serr.strip():
        print(f"# {bridge} stderr: {serr.strip()[-500:]}", flush=True)
    index = {k: i for i, k in enumerate(measured)}
    got: dict[int, int] = {}
    with open(out) as f:
        for row in f:
            t, *vals = map(int, row.split())
            j = index.get(tuple(vals))
            if j is not None and j not in got and sent_ns[j] >= 0:
                got[j] = t - sent_ns[j]
    out.unlink()
    return Turn(bridge, list(got.values()), len(measured), len(measured) - len(got),
                summary_of(sout))


def percentile_ms(values_ns: Sequence[int], q: float) -> float:
    import numpy as np

    return float(np.percentile(np.asarray(values_ns, dtype=np.float64), q)) / 1e6


def print_profile(path: str, top: int = 18) -> None:
    """The daemon's costliest functions (own time), as comment lines."""
    import io
    import pstats

    buf = io.StringIO()
    st = pstats.Stats(path, stream=buf)
    st.sort_stats("tottime").print_stats(top)
    for line in buf.getvalue().splitlines():
        if line.strip():
            print(f"#   {line}", flush=True)


def main_parent(args: argparse.Namespace) -> int:
    sys.path.insert(0, str(HERE.parent))
    from common import figure, header, note  # the benchmarks folder is not a package

    header("daemon latency")
    rounds = 1 if args.quick else args.rounds
    per_round = (2000 if args.quick else args.frames) // rounds
    with tempfile.TemporaryDirectory(prefix="fieldbridge-lat-") as tmp:
        work = Path(tmp)
        venue = work / "bench-1khz.toml"
        write_venue(venue)
        # One pool of unique frames: warm-up frames first, then every round's measured ones.
        warm_n = 3000
        pool = unique_frames(warm_n + rounds * per_round)
        warm = pool[:warm_n]
        lat: dict[str, list[int]] = {"forwarder": [], "daemon": []}
        round_p99: dict[str, list[float]] = {"forwarder": [], "daemon": []}
        lost: dict[str, int] = {"forwarder": 0, "daemon": 0}
        sent: dict[str, int] = {"forwarder": 0, "daemon": 0}
        prof = str(work / "daemon.prof") if args.cprofile else None
        for r in range(rounds):
            measured = pool[warm_n + r * per_round : warm_n + (r + 1) * per_round]
            for bridge in ("forwarder", "daemon"):
                turn = play_turn(bridge, venue, warm, measured, work,
                                 cprofile=prof if r == rounds - 1 else None)
                lat[bridge] += turn.latencies_ns
                round_p99[bridge].append(percentile_ms(turn.latencies_ns, 99))
                lost[bridge] += turn.lost
                sent[bridge] += turn.sent
                s = turn.summary
                note(f"round {r + 1} {bridge}: {turn.sent} frames, p50 "
                     f"{percentile_ms(turn.latencies_ns, 50):.3f} ms, p99 "
                     f"{percentile_ms(turn.latencies_ns, 99):.3f} ms, lost {turn.lost}; "
                     f"bridge says {s}")
        d50, d99 = percentile_ms(lat["daemon"], 50), percentile_ms(lat["daemon"], 99)
        f50, f99 = percentile_ms(lat["forwarder"], 50), percentile_ms(lat["forwarder"], 99)
        figure("daemon_latency_p50", d50, "ms")
        figure("daemon_latency_p99", d99, "ms", goal="< 1")
        figure("forwarder_latency_p50", f50, "ms")
        figure("forwarder_latency_p99", f99, "ms")
        figure("ratio_p99", d99 / f99, "x", goal="<= 1.5")
        figure("frames", sent["daemon"], "frames")
        figure("lost", lost["daemon"], "frames", goal="<= 0")
        if lost["forwarder"]:
            note(f"the forwarder lost {lost['forwarder']} frames")
        note(f"daemon p99.9 {percentile_ms(lat['daemon'], 99.9):.3f} ms, max "
             f"{max(lat['daemon']) / 1e6:.3f} ms; forwarder p99.9 "
             f"{percentile_ms(lat['forwarder'], 99.9):.3f} ms, max "
             f"{max(lat['forwarder']) / 1e6:.3f} ms; load average {os.getloadavg()[0]:.2f}")
        note("p99 of each round (ms): " + "; ".join(
            f"{b} {', '.join(f'{x:.2f}' for x in v)}" for b, v in round_p99.items()))
        note("the tails follow the machine's other work (2 shared cores); the p50 is the "
             "steadier measure of what the daemon adds")
        if prof:
            note("daemon profile (last round, whole run incl. start-up), by own time:")
            print_profile(prof)
    return 0


def parse(argv: Sequence[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="one round of 2000 frames per bridge")
    p.add_argument("--frames", type=int, default=6000, help="measured frames per bridge (default 6000)")
    p.add_argument("--rounds", type=int, default=4, help="turns per bridge (default 4)")
    p.add_argument("--cprofile", nargs="?", const="yes", default=None,
                   help="profile the daemon child (cProfile) and print its top costs")
    # Child roles (this file starts itself).
    p.add_argument("--role", choices=["parent", "daemon", "forwarder", "listener"], default="parent",
                   help=argparse.SUPPRESS)
    p.add_argument("--url", help=argparse.SUPPRESS)
    p.add_argument("--osc", help=argparse.SUPPRESS)
    p.add_argument("--venue", help=argparse.SUPPRESS)
    p.add_argument("--midi", default="none", help=argparse.SUPPRESS)
    p.add_argument("--out", help=argparse.SUPPRESS)
    p.add_argument("--window-s", type=float, default=WINDOW_S, help=argparse.SUPPRESS)
    return p.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    args = parse(argv)
    if args.role == "daemon":
        return child_daemon(args)
    if args.role == "forwarder":
        return child_forwarder(args)
    if args.role == "listener":
        return child_listener(args)
    return main_parent(args)


if __name__ == "__main__":
    sys.exit(main())
