"""The daemon as the service unit runs it: figures under the unit's settings.

Starts `fieldbridge run --service` the way service/fieldbridge.service does (its
Environment= lines, a NOTIFY_SOCKET datagram socket standing in for the service manager,
WATCHDOG_USEC from WatchdogSec=5s) on the example rig with its simulated board, OSC to a
socket of ours, and measures:

    service_start_to_ready_s          exec -> READY=1
    service_start_to_first_message_s  exec -> first OSC datagram
    service_cpu_percent_one_core      user+system time over the measuring window
    service_rss_mb / _peak_mb         VmRSS / VmHWM
    service_watchdog_pings_per_s      WATCHDOG=1 datagrams a second (WatchdogSec/2 expected)
    service_stop_s                    SIGTERM -> exit (TimeoutStopSec is 10 s; goal 2 s)

Usage: python benchmarks/service_settings.py [--seconds 20] [--frame-ms 20]
"""

from __future__ import annotations

import argparse
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import tomlkit

REPO = Path(__file__).resolve().parents[1]


def proc_stat(pid: int) -> tuple[float, float, float]:
    """(cpu seconds, rss MB, peak rss MB) of a process from /proc."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    ticks = os.sysconf("SC_CLK_TCK")
    cpu = (int(fields[11]) + int(fields[12])) / ticks
    status = dict(
        line.split(":", 1) for line in Path(f"/proc/{pid}/status").read_text().splitlines()
    )
    return cpu, int(status["VmRSS"].split()[0]) / 1024, int(status["VmHWM"].split()[0]) / 1024


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=20.0, help="measuring window")
    ap.add_argument("--frame-ms", type=float, default=20.0,
                    help="board window in ms (the example rig: 20 ms, 50 frames/s)")
    args = ap.parse_args(argv)

    work = Path(tempfile.mkdtemp(prefix="fieldbridge-service-"))
    try:
        home = work / "home"
        shutil.copytree(REPO / "profiles", home)
        osc = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        osc.bind(("127.0.0.1", 0))
        notify = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        notify.bind(str(work / "notify"))
        rig = tomlkit.parse((home / "rig.toml").read_text())
        del rig["outputs"]["midi"]  # no MIDI system on this machine
        rig["outputs"]["osc"]["destinations"] = [f"127.0.0.1:{osc.getsockname()[1]}"]
        rig["board"]["window_s"] = args.frame_ms / 1000.0
        rig["sim"]["window_s"] = args.frame_ms / 1000.0
        (home / "rig.toml").write_text(tomlkit.dumps(rig))
        (home / "active").write_text("tin-lantern\n")
        env = {
            "PATH": os.environ.get("PATH", "/usr/bin:/bin"),
            "PYTHONUNBUFFERED": "1",  # Environment= lines of the unit
            "FIELDBRIDGE_HOME": str(home),
            "NOTIFY_SOCKET": str(work / "notify"),
            "WATCHDOG_USEC": "5000000",  # WatchdogSec=5s
            "RUNTIME_DIRECTORY": str(work / "run"),  # RuntimeDirectory=fieldbridge
        }
        (work / "run").mkdir(mode=0o750)
        exe = [sys.executable, "-m", "bridge.cli", "run", "--service", "--simulate",
               "--home", str(home)]
        t0 = time.monotonic()
        proc = subprocess.Popen(exe, env=env, cwd=home, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
        try:
            notify.settimeout(10.0)
            ready = first = None
            while ready is None:
                if b"READY=1" in notify.recv(4096):
                    ready = time.monotonic() - t0
            osc.settimeout(10.0)
            osc.recv(4096)
            first = time.monotonic() - t0
            time.sleep(3.0)  # warm-up
            cpu0, _, _ = proc_stat(proc.pid)
            w0 = time.monotonic()
            notify.settimeout(0.05)
            osc.setblocking(False)
            pings = 0
            while time.monotonic() - w0 < args.seconds:
                try:
                    if b"WATCHDOG=1" in notify.recv(4096):
                        pings += 1
                except socket.timeout:
                    pass
                try:
                    while True:
                        osc.recv(4096)
                except BlockingIOError:
                    pass
            cpu1, rss, peak = proc_stat(proc.pid)
            span = time.monotonic() - w0
            t_stop = time.monotonic()
            proc.send_signal(signal.SIGTERM)
            code = proc.wait(timeout=10)
            stop_s = time.monotonic() - t_stop
        finally:
            if proc.poll() is None:
                proc.kill()
        print(f"service_frames_per_s: {1000.0 / args.frame_ms:g} frames/s")
        print(f"service_start_to_ready_s: {ready:.3f} s")
        print(f"service_start_to_first_message_s: {first:.3f} s   # goal < 1")
        print(f"service_cpu_percent_one_core: {100.0 * (cpu1 - cpu0) / span:.2f} %")
        print(f"service_rss_mb: {rss:.1f} MB   # goal < 60")
        print(f"service_rss_peak_mb: {peak:.1f} MB")
        print(f"service_watchdog_pings_per_s: {pings / span:.2f} 1/s")
        print(f"service_stop_s: {stop_s:.3f} s   # goal < 2 (exit code {code})")
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
