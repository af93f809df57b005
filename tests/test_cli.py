"""The command line through its real entry point, each command a separate process.

Every test runs ``python -m bridge.cli ...`` with ``FIELDBRIDGE_HOME`` pointing at a copy
of the repository's example ``profiles/`` folder and ``FIELDBRIDGE_RUNTIME`` at a private
folder, so no user's store or daemon is ever touched. Flows that need a board use the
simulated one (``--simulate``: the simulator's bytes on a real pseudo-terminal).

The soundcheck (about 15 s of simulated holds) runs once per module and later tests reuse
its profile. Waiting is on conditions with timeouts; no test asserts how fast anything ran.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import socket
import struct
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass
from itertools import pairwise
from pathlib import Path
from typing import Any

import pytest
import tomlkit

PROFILES = Path(__file__).resolve().parents[1] / "profiles"
EXAMPLE_VENUES = {"tin-lantern", "saltmarsh-chapel", "ferry-shed"}
TOOL_COMMANDS = {"check", "watch", "tape", "replay", "plot"}
# PNG specification (ISO/IEC 15948, W3C PNG 2nd ed., section 5.2): the 8-byte signature.
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@dataclass
class Home:
    """A private profile store and runtime folder, and a way to run the CLI against them."""

    root: Path
    runtime: Path
    env: dict[str, str]

    def fb(self, *args: str, timeout: float = 60.0) -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-m", "bridge.cli", *args], env=self.env,
                              capture_output=True, text=True, timeout=timeout, check=False)

    def popen(self, *args: str) -> subprocess.Popen[str]:
        return subprocess.Popen([sys.executable, "-m", "bridge.cli", *args], env=self.env,
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)

    def json(self, *args: str, code: int = 0, timeout: float = 60.0) -> Any:
        done = self.fb(*args, "--json", timeout=timeout)
        assert done.returncode == code, f"{args}: exit {done.returncode}\n{done.stderr[-3000:]}"
        return json.loads(done.stdout)


def make_home(folder: Path) -> Home:
    root = folder / "store"
    shutil.copytree(PROFILES, root)
    # Unix socket paths are limited to ~107 bytes: the runtime folder gets a short one.
    runtime = Path(tempfile.mkdtemp(prefix="fbt-", dir="/tmp"))
    env = dict(os.environ, FIELDBRIDGE_HOME=str(root), FIELDBRIDGE_RUNTIME=str(runtime))
    for key in ("NOTIFY_SOCKET", "WATCHDOG_USEC", "JOURNAL_STREAM"):
        env.pop(key, None)
    return Home(root, runtime, env)


@pytest.fixture(scope="module")
def home(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Home]:
    """One store for the module (soundcheck, zero, tape and replay build on each other)."""
    h = make_home(tmp_path_factory.mktemp("cli"))
    yield h
    shutil.rmtree(h.runtime, ignore_errors=True)


@pytest.fixture
def fresh(tmp_path: Path) -> Iterator[Home]:
    """A store of its own, for tests that break or switch things."""
    h = make_home(tmp_path)
    yield h
    shutil.rmtree(h.runtime, ignore_errors=True)


@pytest.fixture(scope="module")
def soundchecked(home: Home) -> dict[str, Any]:
    """One simulated soundcheck with a 25 cm mark, saved as 'lamp-room' (~15 s)."""
    return home.json("soundcheck", "lamp-room", "--simulate", "--mark-cm", "25", timeout=120)


def png_size(path: Path) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG spec: it follows the signature)."""
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE, f"{path} does not start with the PNG signature"
    length, kind = struct.unpack(">I4s", data[8:16])
    assert kind == b"IHDR" and length == 13
    return struct.unpack(">II", data[16:24])


# ---------------------------------------------------------------------- help and usage


def test_every_command_has_examples_and_exit_codes_in_its_help(home: Home) -> None:
    top = home.fb("--help")
    assert top.returncode == 0
    listed = set(re.findall(r"^    ([a-z][a-z-]*)\s", top.stdout, re.MULTILINE))
    assert TOOL_COMMANDS <= listed, f"missing from the command list: {TOOL_COMMANDS - listed}"
    procs = {name: home.popen(name, "--help") for name in sorted(listed)}
    for name, proc in procs.items():
        out, err = proc.communicate(timeout=60)
        assert proc.returncode == 0, f"{name} --help: {err}"
        assert "examples:" in out, f"{name} --help has no examples"
        assert f"fieldbridge {name}" in out.split("examples:")[1], name
        assert "exit codes:" in out and "3 bad file" in out and "4 device" in out, name


def test_usage_errors_exit_2(home: Home) -> None:
    for args in (["venues", "--no-such-option"], ["replay"], ["watch", "--rate", "-5"],
                 ["plot", "tin-lantern"], ["replay", "x", "--osc", "nowhere"]):
        done = home.fb(*args)
        assert done.returncode == 2, f"{args}: exit {done.returncode}: {done.stderr}"
        assert "usage:" in done.stderr


# ---------------------------------------------------------------------- the store


def test_venues_json_lists_the_three_example_venues(home: Home) -> None:
    rows = home.json("venues")
    names = {r["name"] for r in rows}
    assert EXAMPLE_VENUES <= names
    for r in rows:
        if r["name"] in EXAMPLE_VENUES:
            assert r["problem"] is None, r
            assert r["created"].startswith("2025-")


def test_show_json_includes_the_resolution_reports(home: Home) -> None:
    obj = home.json("show", "tin-lantern")
    assert obj["name"] == "tin-lantern"
    assert set(obj["reports"]) == {"pitch", "volume"}
    for name, rep in obj["reports"].items():
        assert rep["kind"] == "period"
        assert rep["window_s"] == pytest.approx(0.02)  # the example rig's [board] window
        assert rep["total_change_pct"] > 0, name
    # One count (tick) matters most at the far end of the travel, where c changes least
    # per unit of distance (DOMAIN.md section 2: resolution is worst with the hand far).
    pitch = obj["reports"]["pitch"]
    assert pitch["cents_per_count_far"] > pitch["cents_per_count_near"]


def test_use_of_a_missing_venue_exits_3_and_keeps_the_active_one(fresh: Home) -> None:
    assert fresh.json("use", "tin-lantern")["active"] == "tin-lantern"
    done = fresh.fb("use", "nowhere-hall")
    assert done.returncode == 3
    assert "nowhere-hall" in done.stderr
    assert (fresh.root / "active").read_text().strip() == "tin-lantern"
    active = [r["name"] for r in fresh.json("venues") if r["active"]]
    assert active == ["tin-lantern"]


def test_a_corrupted_venue_file_is_named_with_its_field(fresh: Home) -> None:
    path = fresh.root / "venues" / "ferry-shed.toml"
    doc = tomlkit.parse(path.read_text())
    doc["channels"]["pitch"]["noise"] = -3.0  # noise is a standard deviation: never negative
    path.write_text(tomlkit.dumps(doc))
    obj = fresh.json("show", "ferry-shed", code=3)
    assert obj["ok"] is False and obj["exit"] == 3
    assert "ferry-shed.toml" in obj["error"]
    assert "channels.pitch.noise" in obj["error"]
    done = fresh.fb("show", "ferry-shed")
    assert done.returncode == 3 and "noise" in done.stderr


# ---------------------------------------------------------------------- captures


def test_simulated_soundcheck_saves_and_activates_a_profile(home: Home,
                                                             soundchecked: dict[str, Any]) -> None:
    assert soundchecked["ok"] is True and soundchecked["active"] is True
    assert Path(soundchecked["path"]) == home.root / "venues" / "lamp-room.toml"
    assert Path(soundchecked["path"]).exists()
    assert set(soundchecked["reports"]) == {"pitch", "volume"}
    assert (home.root / "active").read_text().strip() == "lamp-room"
    shown = home.json("show", "lamp-room")
    # far, the 25 cm mark and near: three captured points per antenna
    assert all(len(c["points"]) == 3 for c in shown["profile"]["channels"].values())


def test_zero_with_a_simulated_board_changes_the_baselines(home: Home,
                                                           soundchecked: dict[str, Any]) -> None:
    before = home.json("show", "lamp-room")["profile"]["channels"]
    obj = home.json("zero", "--simulate", "--seed", "5")
    assert obj["name"] == "lamp-room"
    after = home.json("show", "lamp-room")["profile"]["channels"]
    for ch in ("pitch", "volume"):
        change = obj["changes"][ch]
        assert change["old"] == pytest.approx(before[ch]["baseline"], rel=1e-12)
        assert change["new"] != change["old"]
        assert after[ch]["baseline"] == pytest.approx(change["new"], rel=1e-9)
        # A re-zero of the same simulated board moves the hand-absent level by a small
        # fraction of it (noise and drift), never by the playing range (~4 %).
        assert abs(change["change_pct"]) < 0.5


# ---------------------------------------------------------------------- check


def test_check_reports_the_missing_board_with_a_fix(home: Home,
                                                    soundchecked: dict[str, Any]) -> None:
    done = home.fb("check", "--json")
    assert done.returncode == 4, done.stderr  # a device problem, no file problem
    findings = json.loads(done.stdout)
    for f in findings:
        assert set(f) >= {"check", "ok", "detail", "fix"}
        assert f["ok"] or f["fix"], f
    by = {f["check"]: f for f in findings}
    assert by["rig file"]["ok"] and by["active venue"]["ok"]
    assert by["store"]["detail"].startswith(str(home.root))
    url = "/dev/serial/by-id/usb-homemade_period_board_0001-if00"  # the example rig's board
    serial = by["serial device"]
    assert serial["ok"] is False and url in serial["detail"]
    assert url in serial["fix"] and "plug" in serial["fix"]
    assert "none running" in by["daemon"]["detail"]
    text = home.fb("check")
    assert text.returncode == 4
    assert "PROBLEM" in text.stdout and "fix:" in text.stdout and url in text.stdout


# ---------------------------------------------------------------------- watch, tape, replay, plot


def test_watch_simulated_prints_at_least_ten_updates_a_second(home: Home,
                                                             soundchecked: dict[str, Any]) -> None:
    done = home.fb("watch", "--simulate", "--seconds", "2", "--json")
    assert done.returncode == 0, done.stderr
    lines = [json.loads(ln) for ln in done.stdout.splitlines()]
    # The monitor's contract: at least 10 updates a second (default 20 a second asked; at
    # the rig's 50 frames/s that is every 2nd frame, 25 a second), over 2 s.
    assert len(lines) >= 15
    assert all(u["source"] == "simulated board" and u["profile"] == "lamp-room" for u in lines)
    frames = [u["frame"] for u in lines]
    assert all(b - a == 2 for a, b in pairwise(frames)), "every 2nd frame, none lost"
    assert lines[-1]["t"] <= 2.5
    u = lines[-1]
    assert [c["name"] for c in u["channels"]] == ["pitch", "volume", "ref"]
    for v in u["voices"]:
        # ISO 16: A4 = 440 Hz, equal temperament f = 440 * 2**((n - 69) / 12)
        assert v["hz"] == pytest.approx(440.0 * 2 ** ((v["note"] - 69) / 12), abs=2e-3)
        assert 0.0 <= v["level"] <= 1.0


def test_tape_then_replay_through_a_venue(home: Home, soundchecked: dict[str, Any],
                                          tmp_path: Path) -> None:
    taped = home.json("tape", "quay-take", "--simulate", "--seconds", "2", "--seed", "3")
    path = home.root / "recordings" / "quay-take.rec"
    assert Path(taped["path"]) == path and path.exists()
    assert taped["frames"] > 20 and taped["bytes"] > 0
    midi = tmp_path / "quay.mid"
    obj = home.json("replay", "quay-take", "--venue", "tin-lantern", "--every", "1",
                    "--midi", str(midi))
    s = obj["summary"]
    assert s["venue"] == "tin-lantern"
    # The replay decodes the same bytes the tape decoded while recording.
    assert s["frames"] == taped["frames"] == len(obj["records"])
    ts = [r["t"] for r in obj["records"]]
    assert ts == sorted(ts) and ts[-1] - ts[0] <= taped["seconds"] + 0.1
    by_type = s["midi"]["by_type"]
    assert s["midi"]["messages"] == sum(by_type.values()) > 0
    # MIDI 1.0: the bend range is set at start with RPN 0 (CC101, CC100, CC6, CC38 and the
    # RPN null CC101, CC100): at least six controller messages before anything else.
    assert by_type["control_change"] >= 6
    assert s["osc"]["datagrams"] >= s["frames"]  # one bundle a frame, plus silences
    # The MIDI file, read back by mido (an independent parser), holds the same messages.
    import mido

    kinds: dict[str, int] = {}
    for m in mido.MidiFile(str(midi)).tracks[0]:
        if not m.is_meta:
            kinds[m.type] = kinds.get(m.type, 0) + 1
    assert kinds == by_type


def test_replay_plot_writes_a_png(home: Home, soundchecked: dict[str, Any],
                                  tmp_path: Path) -> None:
    if not (home.root / "recordings" / "plot-take.rec").exists():
        home.json("tape", "plot-take", "--simulate", "--seconds", "1")
    out = tmp_path / "take.png"
    done = home.fb("replay", "plot-take", "--plot", str(out), timeout=120)
    assert done.returncode == 0, done.stderr
    assert out.stat().st_size > 0
    w, h = png_size(out)
    assert w > 0 and h > 0
    assert "frames" in done.stdout and "MIDI" in done.stdout


def test_plot_draws_a_venue_calibration(home: Home, tmp_path: Path) -> None:
    out = tmp_path / "saltmarsh.png"
    obj = home.json("plot", "saltmarsh-chapel", "--out", str(out), timeout=120)
    assert obj["path"] == str(out)
    assert set(obj["channels"]) == {"pitch", "volume"}
    w, h = png_size(out)
    assert w > 0 and h > 0
    missing = home.fb("plot", "saltmarsh-chapel", "--out", str(tmp_path / "no" / "x.png"))
    assert missing.returncode == 3


def test_replay_of_a_missing_recording_exits_3(home: Home) -> None:
    done = home.fb("replay", "never-recorded")
    assert done.returncode == 3
    assert "never-recorded.rec" in done.stderr


# ---------------------------------------------------------------------- with a daemon


def test_watch_and_tape_through_a_running_daemon(fresh: Home) -> None:
    rig_path = fresh.root / "rig.toml"
    doc = tomlkit.parse(rig_path.read_text())
    # No MIDI system here: the daemon would wait for one for ever, so this rig has no MIDI
    # output. Its OSC goes to a socket of ours, so the daemon's playing can be seen too.
    del doc["outputs"]["midi"]
    osc = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    osc.bind(("127.0.0.1", 0))
    osc.settimeout(0.0)
    doc["outputs"]["osc"]["destinations"] = [f"127.0.0.1:{osc.getsockname()[1]}"]
    rig_path.write_text(tomlkit.dumps(doc))
    sock = fresh.runtime / "control.sock"
    run = fresh.popen("run", "--simulate", "--seconds", "8", "--venue", "tin-lantern")
    try:
        deadline = time.monotonic() + 20.0
        while not sock.exists():
            assert run.poll() is None, f"run ended early: {run.communicate()[1][-2000:]}"
            assert time.monotonic() < deadline, "the daemon's control socket did not appear"
            time.sleep(0.05)
        done = fresh.fb("watch", "--json", "--seconds", "1")
        assert done.returncode == 0, done.stderr
        lines = [json.loads(ln) for ln in done.stdout.splitlines()]
        assert len(lines) >= 5
        assert all(u["source"] == "daemon" and u["profile"] == "tin-lantern" for u in lines)
        taped = fresh.json("tape", "from-daemon", "--seconds", "1")
        assert taped["source"] == "daemon" and taped["frames"] > 10
        assert taped["drops"] == {}  # re-encoded lines with the daemon's frame numbers
        run.send_signal(signal.SIGTERM)  # a graceful stop: outputs silenced, exit 0
        _out, err = run.communicate(timeout=30)
        assert run.returncode == 0, err[-2000:]
    finally:
        if run.poll() is None:
            run.send_signal(signal.SIGTERM)
            run.wait(10)
    received = 0
    while True:
        try:
            osc.recv(65536)
        except BlockingIOError:
            break
        received += 1
    osc.close()
    assert received > 0, "the daemon sent no OSC"
    replayed = fresh.json("replay", "from-daemon")
    assert replayed["summary"]["frames"] == taped["frames"]
