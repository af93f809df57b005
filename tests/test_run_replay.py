"""`fieldbridge run --replay`: the daemon plays a recording through the real loop, then stops.

A recording made by `fieldbridge tape --simulate` is the source; OSC goes to a real UDP
socket of the test, so every frame's bundle can be counted.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
from pathlib import Path

import tomlkit

REPO = Path(__file__).resolve().parents[1]


def test_run_plays_a_recording_to_its_end(tmp_path: Path) -> None:
    home = tmp_path / "home"
    shutil.copytree(REPO / "profiles", home)
    rx = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    rx.bind(("127.0.0.1", 0))
    rx.settimeout(5.0)
    rig = tomlkit.parse((home / "rig.toml").read_text())
    del rig["outputs"]["midi"]  # no MIDI system here; OSC to our socket instead
    rig["outputs"]["osc"]["destinations"] = [f"127.0.0.1:{rx.getsockname()[1]}"]
    (home / "rig.toml").write_text(tomlkit.dumps(rig))
    env = {**os.environ, "FIELDBRIDGE_HOME": str(home),
           "FIELDBRIDGE_RUNTIME": str(tmp_path / "run")}

    def cli(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-m", "bridge.cli", *args], env=env,
                              capture_output=True, text=True, timeout=120, check=False)

    assert cli("use", "tin-lantern").returncode == 0
    taped = cli("tape", "take1", "--simulate", "--seconds", "3")
    assert taped.returncode == 0, taped.stderr
    frames = int(taped.stdout.split(" frames")[0].rsplit(" ", 1)[1])
    played = cli("run", "--replay", "take1", "--fast")
    assert played.returncode == 0, played.stderr
    summary = played.stderr[played.stderr.index("Summary:"):]
    # every recorded frame went through the loop (the first, cut mid-line, is a fragment)
    assert f"Summary: {frames} frames" in summary or f"Summary: {frames - 1} frames" in summary
    got = 0
    try:
        while True:
            data = rx.recv(2048)
            assert data.startswith(b"#bundle\0")  # OSC 1.0 bundle header
            got += 1
    except socket.timeout:
        pass
    assert got >= frames - 1
