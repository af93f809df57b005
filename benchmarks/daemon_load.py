#!/usr/bin/env python3
"""What the live daemon costs the machine: CPU, resident memory, start-up time.

The daemon runs in a child process exactly as a headless rig would: a fresh interpreter
that loads a venue profile from a file, opens a pseudo-terminal with pyserial and plays
to OSC (a UDP listener on localhost) and MIDI. The board is a
:class:`bridge.sources.PtyBoard` in this process, playing the simulator's warm-up
performance (hand moving, leaving and coming back) at 1000 frames a second: two antenna
channels and the reference oscillator, text frames with a sequence number.

Two rigs are measured, one after the other:

``live``       OSC + a MIDI sink whose port counts the bytes and sends them nowhere
               (:class:`bridge.outputs.midiports.NullPort`): the whole MIDI voice logic
               runs, no MIDI system is needed.
``recording``  OSC + a Standard MIDI File (:class:`bridge.outputs.midifile.MidiFileSink`),
               the demo's outputs.

Figures (``name: value unit``; goals from the issue "The live daemon" and the headless
use issue)::

    startup_to_first_message_s     from starting the process to the first OSC datagram
                                   heard (goal under 1 s)
    daemon_cpu_percent_one_core    user + system CPU time of the daemon over the measured
                                   window, per wall second (goal under 3 %)
    daemon_rss_mb / _peak_mb       resident memory at the end / its high-water mark
                                   (VmRSS, VmHWM; goal under 60 MB)
    daemon_rss_growth_mb           RSS at the end minus RSS after warm-up (the promise: no
                                   growth beyond 1 MB after warm-up)
    daemon_rss_trend_mb_per_h      least-squares slope of RSS over the window, per hour: a
                                   window of seconds cannot show a slow leak, the slope can
    daemon_frames_per_s            OSC bundles heard per second in the window (1000 if
                                   no frame was lost)

and the same with the prefix ``recording_`` for the second rig. CPU comes from
/proc/<pid>/stat (utime + stime, in clock ticks of 1/SC_CLK_TCK s), memory from
/proc/<pid>/status. The window starts ``--warmup`` seconds after the first message, so
imports and the first allocations are not in it.

    python benchmarks/daemon_load.py              # 5 s warm-up + 20 s per rig (~1 min)
    python benchmarks/daemon_load.py --quick      # 2 s + 5 s per rig
    python benchmarks/daemon_load.py --cprofile   # also the live daemon's top costs
"""

from __future__ import annotations

import argparse
import contextlib
import os
import socket
import sys
import tempfile
import threading
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from common import figure, header, note  # noqa: E402  (the benchmarks folder is not a package)
from daemon_latency import (  # noqa: E402
    WINDOW_S,
    Child,
    board,
    child_cmd,
    print_profile,
    summary_of,
    write_venue,
)

from bridge.sources import PtyBoard  # noqa: E402

CLK_TCK = os.sysconf("SC_CLK_TCK")
SAMPLE_S = 0.25


class Listener:
    """A UDP receiver thread: counts datagrams and notes when the first one came."""

    def __init__(self) -> None:
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.settimeout(0.2)
        self.port = self.sock.getsockname()[1]
        self.count = 0
        self.first_at: float | None = None
        self.heard = threading.Event()
        self._halt = threading.Event()
        self._thread = threading.Thread(target=self._run, name="listener", daemon=True)

    def _run(self) -> None:
        while not self._halt.is_set():
            try:
                self.sock.recv(65536)
            except TimeoutError:
                continue
            if self.first_at is None:
                self.first_at = time.monotonic()
                self.heard.set()
            self.count += 1

    def __enter__(self) -> Listener:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._halt.set()
        self._thread.join()
        self.sock.close()


@dataclass
class Sample:
    t: float
    cpu_s: float
    rss_kb: int
    hwm_kb: int
    heard: int


def sample(pid: int, heard: int) -> Sample:
    """CPU seconds (utime + stime), VmRSS and VmHWM of ``pid`` now."""
    with open(f"/proc/{pid}/stat") as f:
        stat = f.read()
    # Fields after the command name (which may hold spaces) start at ")" + 2;
    # utime and stime are fields 14 and 15 of proc(5).
    rest = stat[stat.rindex(")") + 2 :].split()
    cpu = (int(rest[11]) + int(rest[12])) / CLK_TCK
    rss = hwm = 0
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                rss = int(line.split()[1])
            elif line.startswith("VmHWM:"):
                hwm = int(line.split()[1])
    return Sample(time.monotonic(), cpu, rss, hwm, heard)


@dataclass
class RigRun:
    rig: str
    startup_s: float
    cpu_percent: float
    rss_mb: float
    peak_mb: float
    growth_mb: float
    slope_mb_per_h: float
    frames_per_s: float
    summary: dict[str, object] = field(default_factory=dict)
    board_dropped: int = 0


def run_rig(
    rig: str,
    midi: str,
    venue: Path,
    *,
    warmup_s: float,
    seconds: float,
    cprofile: str | None = None,
    role: str = "daemon",
    window_s: float = WINDOW_S,
) -> RigRun:
    """Start the board, then the bridge (``role``); measure the window; stop everything."""
    sim = board(window_s=window_s)
    with contextlib.ExitStack() as stack:
        pty = PtyBoard(sim.next_bytes, window_s)
        pty.start()
        stack.callback(pty.stop)
        listener = stack.enter_context(Listener())
        extra = ["--url", pty.path, "--osc", f"127.0.0.1:{listener.port}"]
        if role == "daemon":
            extra += ["--venue", str(venue), "--midi", midi, "--window-s", str(window_s)]
        if cprofile:
            extra += ["--cprofile", cprofile]
        daemon = stack.enter_context(Child(child_cmd(role, *extra)))
        if not listener.heard.wait(20.0):
            _, err = daemon.stop()
            raise RuntimeError(f"the {role} sent nothing in 20 s: {err[-2000:]}")
        assert listener.first_at is not None
        startup = listener.first_at - daemon.started
        start_at = listener.first_at + warmup_s
        end_at = start_at + seconds
        samples: list[Sample] = []
        while True:
            now = time.monotonic()
            if now >= end_at:
                break
            if daemon.proc.poll() is not None:
                _, err = daemon.stop()
                raise RuntimeError(f"the {role} ended early: {err[-2000:]}")
            time.sleep(min(SAMPLE_S, end_at - now))
            samples.append(sample(daemon.pid, listener.count))
        out, err = daemon.stop()
        if err.strip():
            note(f"{rig} {role} stderr: {err.strip()[-500:]}")
        dropped = pty.frames_dropped
    window = [s for s in samples if s.t >= start_at]
    first, last = window[0], window[-1]
    span = last.t - first.t
    cpu = 100.0 * (last.cpu_s - first.cpu_s) / span
    slope = _slope_mb_per_h(window)
    return RigRun(
        rig=rig,
        startup_s=startup,
        cpu_percent=cpu,
        rss_mb=last.rss_kb / 1024,
        peak_mb=last.hwm_kb / 1024,
        growth_mb=(last.rss_kb - first.rss_kb) / 1024,
        slope_mb_per_h=slope,
        frames_per_s=(last.heard - first.heard) / span,
        summary=summary_of(out),
        board_dropped=dropped,
    )


def _slope_mb_per_h(window: Sequence[Sample]) -> float:
    """Least-squares slope of RSS over the window, extrapolated to an hour (MB/h)."""
    import numpy as np

    t = np.array([s.t for s in window])
    rss = np.array([s.rss_kb / 1024 for s in window])
    if len(t) < 3:
        return float("nan")
    return float(np.polyfit(t - t[0], rss, 1)[0] * 3600.0)


def report(run: RigRun, prefix: str) -> None:
    p = prefix
    figure(f"{p}startup_to_first_message_s", run.startup_s, "s", goal="< 1")
    figure(f"{p}daemon_cpu_percent_one_core", run.cpu_percent, "%", goal="< 3")
    figure(f"{p}daemon_rss_mb", run.rss_mb, "MB", goal="< 60")
    figure(f"{p}daemon_rss_peak_mb", run.peak_mb, "MB", goal="< 60")
    figure(f"{p}daemon_rss_growth_mb", run.growth_mb, "MB", goal="<= 1")
    figure(f"{p}daemon_rss_trend_mb_per_h", run.slope_mb_per_h, "MB/h", goal="< 1")
    figure(f"{p}daemon_frames_per_s", run.frames_per_s, "frames/s", digits=4)
    note(f"{run.rig}: board dropped {run.board_dropped} frames (while the daemon started); "
         f"daemon says {run.summary}")


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="2 s warm-up and 5 s per rig")
    ap.add_argument("--seconds", type=float, default=None, help="measured seconds per rig (20)")
    ap.add_argument("--warmup", type=float, default=None, help="seconds before measuring (5)")
    ap.add_argument("--rig", choices=["live", "recording"], action="append",
                    help="measure only these rigs (default both)")
    ap.add_argument("--rate", type=float, default=1.0 / WINDOW_S,
                    help="frames a second of the board (default 1000, the goal's rate)")
    ap.add_argument("--no-floor", action="store_true",
                    help="skip the bare forwarder (the floor of CPU and start-up)")
    ap.add_argument("--cprofile", action="store_true",
                    help="run the live rig once more under cProfile and print its top costs")
    args = ap.parse_args(argv)
    seconds = args.seconds or (5.0 if args.quick else 20.0)
    warmup = args.warmup if args.warmup is not None else (2.0 if args.quick else 5.0)
    window_s = 1.0 / args.rate
    header("daemon load")
    note(f"{args.rate:g} frames/s, 3 channels (pitch, volume, reference); warm-up {warmup:g} s, "
         f"window {seconds:g} s per rig")
    with tempfile.TemporaryDirectory(prefix="fieldbridge-load-") as tmp:
        work = Path(tmp)
        venue = work / "bench-1khz.toml"
        write_venue(venue, window_s=window_s)
        rigs = {"live": "null", "recording": f"file:{work / 'take.mid'}"}
        for rig in args.rig or list(rigs):
            run = run_rig(rig, rigs[rig], venue, warmup_s=warmup, seconds=seconds,
                          window_s=window_s)
            report(run, "" if rig == "live" else "recording_")
        if not args.no_floor:
            run = run_rig("floor", "", venue, warmup_s=warmup, seconds=seconds, role="forwarder",
                          window_s=window_s)
            figure("forwarder_startup_to_first_message_s", run.startup_s, "s")
            figure("forwarder_cpu_percent_one_core", run.cpu_percent, "%")
            figure("forwarder_rss_mb", run.rss_mb, "MB")
            note(f"floor: the bare forwarder of daemon_latency.py on the same board "
                 f"({run.frames_per_s:.0f} datagrams/s)")
        if args.cprofile:
            prof = str(work / "live.prof")
            run_rig("live", "null", venue, warmup_s=warmup, seconds=seconds, cprofile=prof,
                    window_s=window_s)
            note("live daemon under cProfile (whole run incl. start-up), by own time:")
            print_profile(prof, top=25)
    note(f"load average {os.getloadavg()[0]:.2f} (other work on this machine shares the cores)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
