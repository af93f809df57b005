"""The ``check`` command: validate the files and this machine, with what to fix.

One finding per check; exit 3 for a file problem, 4 for the machine (see cli.py).
"""

from __future__ import annotations

import argparse
import contextlib
import getpass
import grp
import json
import logging
import os
import pwd
import socket
import stat
import subprocess
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from .commands import (
    control_path,
    store_for,
)
from .errors import ConfigError, ControlError, DeviceError


log = logging.getLogger(__name__)

# ------------------------------------------------------------------------------ check


Area = Literal["file", "device"]


@dataclass
class Finding:
    """One line of ``fieldbridge check``: what was checked, whether it is fine, what to do."""

    check: str
    ok: bool
    detail: str
    fix: str = ""
    area: Area = "device"

    def as_dict(self) -> dict[str, Any]:
        return {"check": self.check, "ok": self.ok, "detail": self.detail, "fix": self.fix,
                "area": self.area}


def check_exit_code(findings: Sequence[Finding]) -> int:
    """0 when all is well, 3 when a file is wrong, else 4 when the machine is."""
    from .cli import EXIT_DEVICE, EXIT_FILE, EXIT_OK

    bad = [f for f in findings if not f.ok]
    if any(f.area == "file" for f in bad):
        return EXIT_FILE
    return EXIT_DEVICE if bad else EXIT_OK


def check_store(store: Any, origin: str) -> Finding:
    root = Path(store.root)
    if not root.is_dir():
        return Finding("store", False, f"{root} (from {origin}) does not exist",
                       f"mkdir -p {root} and copy profiles/rig.toml from the fieldbridge "
                       "sources into it, or point FIELDBRIDGE_HOME at your store", "file")
    if not os.access(root, os.W_OK | os.X_OK):
        return Finding("store", False, f"{root} (from {origin}) is not writable by this user: "
                       "soundcheck, zero and use cannot save",
                       f"give this user write access to {root}, or use another store (--home)",
                       "file")
    return Finding("store", True, f"{root} (from {origin})", area="file")


def check_files(store: Any) -> tuple[Any, list[Finding]]:
    """The rig, every venue profile and the active one. Returns (rig or None, findings)."""
    from .profiles import venue_problems

    out: list[Finding] = []
    rig = None
    try:
        rig = store.load_rig()
        out.append(Finding("rig file", True, f"{store.rig_path}: {rig.name or 'unnamed rig'}, "
                           f"{len(rig.channels)} channel(s), {len(rig.voices)} voice(s)",
                           area="file"))
    except ConfigError as e:
        out.append(Finding("rig file", False, str(e),
                           "correct the keys named above; profiles/rig.toml in the sources "
                           "explains every key", "file"))
    venues = store.list_venues()
    for v in venues:
        detail = v.problem or v.quality
        if str(v.path) not in detail:
            detail = f"{v.path}: {detail}"
        out.append(Finding(f"venue {v.name}", v.problem is None, detail,
                           "" if v.problem is None else
                           f"correct the keys named, or run 'fieldbridge soundcheck {v.name}' again",
                           "file"))
    active = store.active
    if active is None:
        names = ", ".join(v.name for v in venues) or "none yet"
        out.append(Finding("active venue", False, f"no venue profile is active (venues: {names})",
                           "fieldbridge use NAME, or fieldbridge soundcheck NAME", "file"))
    elif rig is not None:
        try:
            problems = venue_problems(rig, store.load_venue(active))
        except ConfigError as e:
            problems = [str(e)]
        out.append(Finding("active venue", not problems,
                           f"{active}: " + ("fits the rig" if not problems else "; ".join(problems)),
                           "" if not problems else
                           f"fieldbridge soundcheck {active}, or fieldbridge use ANOTHER", "file"))
    return rig, out


def _serial_candidates() -> list[str]:
    import glob

    found = sorted(glob.glob("/dev/serial/by-id/*"))
    return found + sorted(glob.glob("/dev/ttyACM*") + glob.glob("/dev/ttyUSB*"))


def _group_name(gid: int) -> str:
    try:
        return grp.getgrgid(gid).gr_name
    except KeyError:
        return str(gid)


def _access_fix(path: str, st: os.stat_result, what: str) -> str:
    """What to do when this user may not read and write ``path``."""
    uid = os.geteuid()
    mode = stat.S_IMODE(st.st_mode)
    if st.st_uid == uid:
        return f"{what} belongs to you but its mode {mode:04o} denies access: chmod u+rw {path}"
    group = _group_name(st.st_gid)
    if st.st_gid in os.getgroups() or st.st_gid == os.getegid():
        return (f"you are in group {group}, but the mode {mode:04o} of {path} does not let the "
                "group read and write it: a udev rule with MODE=\"0660\" fixes that")
    try:
        user = pwd.getpwuid(uid).pw_name
    except KeyError:
        user = getpass.getuser()
    try:
        members = grp.getgrgid(st.st_gid).gr_mem
    except KeyError:
        members = []
    if user in members:
        return (f"you were added to group {group}, but this login session started before: "
                f"log out and in again (or run 'newgrp {group}')")
    return f"sudo usermod -aG {group} $USER, then log out and in again"


def check_serial(url: str) -> Finding:
    """The board's serial device: there, a serial device, readable and writable by us."""
    name = "serial device"
    if "://" in url:
        return _check_serial_url(url)
    if not os.path.exists(url):
        gone = " (a link to a device that is gone)" if os.path.islink(url) else ""
        seen = _serial_candidates()
        fix = (f"plug the board in at {url} (some USB cables carry power only); "
               "set [source] url in rig.toml to your board's device, preferably its "
               "/dev/serial/by-id/ link, which survives replugging")
        fix += f"; serial devices present now: {', '.join(seen)}" if seen else \
            "; no serial devices are present at all"
        return Finding(name, False, f"{url} does not exist{gone}", fix)
    real = os.path.realpath(url)
    st = os.stat(url)
    shown = url if real == url else f"{url} -> {real}"
    if not stat.S_ISCHR(st.st_mode):
        return Finding(name, False, f"{shown} is not a device (a serial port is a character "
                       "device)", "set [source] url in rig.toml to the board's device")
    if os.access(url, os.R_OK | os.W_OK):
        return Finding(name, True, f"{shown}: readable and writable")
    return Finding(name, False, f"{shown}: this user may not read and write it "
                   f"(owner {st.st_uid}, group {_group_name(st.st_gid)}, "
                   f"mode {stat.S_IMODE(st.st_mode):04o})", _access_fix(url, st, url))


def _check_serial_url(url: str) -> Finding:
    from urllib.parse import urlsplit

    name = "serial device"
    scheme = url.split("://", 1)[0].lower()
    rest = url.split("://", 1)[1]
    if scheme in ("socket", "rfc2217"):
        parts = urlsplit(url)
        host, port = parts.hostname, parts.port
        if not host or not port:
            return Finding(name, False, f"{url}: no host:port", "write it as socket://HOST:PORT",
                           "file")
        try:
            addrs = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
        except OSError as e:
            return Finding(name, False, f"{url}: cannot resolve {host!r} ({e})",
                           "check the host name in [source] url, or use an IP address")
        return Finding(name, True, f"{url}: {host} resolves to {addrs[0][4][0]} "
                       "(not connected: a board server may take one client only)")
    if scheme == "loop":
        return Finding(name, True, f"{url}: a loopback for tests, no board")
    if scheme == "spy":
        inner = check_serial(rest.split("?", 1)[0])
        inner.detail = f"{url}: " + inner.detail
        return inner
    if scheme == "hwgrep":
        from serial.tools import list_ports

        pattern = rest.split("&", 1)[0]
        hits = [p.device for p in list_ports.grep(pattern)]
        if not hits:
            return Finding(name, False, f"{url}: no serial device matches {pattern!r}",
                           "plug the board in; 'python -m serial.tools.list_ports -v' lists "
                           "devices and their USB ids")
        return check_serial(hits[0])
    return Finding(name, True, f"{url}: scheme {scheme!r} is not checked further")


_JACK_PROBE = (
    "import json, rtmidi\n"
    "m = rtmidi.MidiOut(rtmidi.API_UNIX_JACK, 'fieldbridge-check')\n"
    "print(json.dumps(m.get_ports()))\n"
)


def jack_ports(timeout: float = 5.0) -> tuple[list[str] | None, str]:
    """The JACK MIDI input ports we could send to, or (None, why) when no server answers.

    The probe runs in a child process: the JACK client library prints to stderr when no
    server runs, and must never start one on its own (JACK_NO_START_SERVER).
    """
    env = dict(os.environ, JACK_NO_START_SERVER="1")
    try:
        done = subprocess.run([sys.executable, "-c", _JACK_PROBE], env=env, capture_output=True,
                              text=True, timeout=timeout, check=False)
    except subprocess.TimeoutExpired:
        return None, f"no answer from a JACK server within {timeout:g} s"
    if done.returncode == 0:
        with contextlib.suppress(ValueError, IndexError):
            ports = json.loads(done.stdout.strip().splitlines()[-1])
            return [str(p) for p in ports], ""
    lines = [ln.strip() for ln in done.stderr.splitlines() if ln.strip()]
    why = next((ln for ln in lines if "not running" in ln.lower()), lines[-1] if lines else "")
    return None, why or f"the probe ended with code {done.returncode}"


def check_midi(settings: Any) -> list[Finding]:
    """The MIDI system the rig's [outputs.midi] names, and the ports it connects to."""
    from .outputs.midiports import ALSA_SEQUENCER, match_port, port_names

    if settings is None:
        return [Finding("MIDI", True, "no [outputs.midi] in the rig: MIDI output is off")]
    ports: list[str] | None = None
    if settings.api == "alsa":
        seq = ALSA_SEQUENCER
        if not os.path.exists(seq):
            return [Finding("MIDI (ALSA)", False, f"the ALSA sequencer {seq} does not exist",
                            "sudo modprobe snd-seq (add snd-seq to /etc/modules to keep it), or "
                            "set api = \"jack\" in [outputs.midi] if a JACK server runs")]
        if not os.access(seq, os.R_OK | os.W_OK):
            st = os.stat(seq)
            return [Finding("MIDI (ALSA)", False, f"{seq}: this user may not use it",
                            _access_fix(seq, st, seq))]
        try:
            ports = port_names("alsa")
        except DeviceError as e:
            return [Finding("MIDI (ALSA)", False, str(e), "see the message")]
        found = [Finding("MIDI (ALSA)", True, f"{seq} usable; {len(ports)} port(s) to send to")]
    else:
        ports, why = jack_ports()
        server = os.environ.get("JACK_DEFAULT_SERVER", "default")
        if ports is None:
            return [Finding("MIDI (JACK)", False,
                            f"no JACK server reachable (server name {server!r}): {why}",
                            "start one (for example 'jackd -d alsa', or your session's audio "
                            "server) as this user, or set api = \"alsa\" in [outputs.midi]")]
        found = [Finding("MIDI (JACK)", True,
                         f"server {server!r} answers; {len(ports)} port(s) to send to")]
    for target in settings.connect:
        try:
            hit = match_port(target, ports)
            found.append(Finding(f"MIDI port {target}", True, f"found: {hit}"))
        except DeviceError as e:
            found.append(Finding(f"MIDI port {target}", False, str(e),
                                 "start the synth first, or correct connect in [outputs.midi]"))
    return found


def check_osc(settings: Any) -> list[Finding]:
    """Every OSC destination resolves to an address."""
    from .outputs.osc import parse_destination

    if settings is None:
        return [Finding("OSC", True, "no [outputs.osc] in the rig: OSC output is off")]
    out = []
    for dest in settings.destinations:
        host, port = parse_destination(dest)
        try:
            info = socket.getaddrinfo(host, port, type=socket.SOCK_DGRAM)
        except OSError as e:
            out.append(Finding(f"OSC {dest}", False, f"cannot resolve {host!r}: {e}",
                               "check the host name in [outputs.osc] destinations, or use an "
                               "IP address"))
            continue
        out.append(Finding(f"OSC {dest}", True, f"{host} resolves to {info[0][4][0]}"))
    return out


def check_midifile(settings: Any) -> list[Finding]:
    if settings is None:
        return []
    folder = Path(settings.path).parent if str(Path(settings.path).parent) else Path(".")
    ok = folder.is_dir() and os.access(folder, os.W_OK | os.X_OK)
    return [Finding("MIDI file", ok, f"{settings.path}: folder {folder} "
                    + ("is writable" if ok else "is missing or not writable"),
                    "" if ok else f"mkdir -p {folder}, or change [outputs.midifile] path",
                    "file")]


def check_control(path: Path) -> Finding:
    """Whether a daemon answers on the control socket (neither answer is a problem)."""
    from .control import ControlClient

    try:
        st = ControlClient(path, timeout=2.0).request({"op": "status"})
    except ControlError as e:
        if "not allowed" in str(e):
            return Finding("daemon", False, str(e), "run fieldbridge as the daemon's user, or "
                           "give each user their own runtime folder (--runtime)")
        if path.exists():
            return Finding("daemon", True, f"none running; a stale socket file is left at {path} "
                           "(harmless: the next daemon replaces it)")
        return Finding("daemon", True, f"none running (it would listen on {path})")
    except OSError as e:
        return Finding("daemon", False, f"{path}: {e}", "see the message")
    return Finding("daemon", True, f"running on {path}: profile {st.get('profile')!r}, "
                   f"{st.get('frames_per_s', 0)} frames/s, board {st.get('link')}")


def run_checks(args: argparse.Namespace) -> list[Finding]:
    from .profiles import ENV_HOME

    store = store_for(args)
    origin = ("--home" if getattr(args, "home", None)
              else f"${ENV_HOME}" if os.environ.get(ENV_HOME, "").strip()
              else "the per-user data folder")
    findings = [check_store(store, origin)]
    rig, files = check_files(store)
    findings += files
    if rig is None:
        findings.append(Finding("board, MIDI, OSC", False, "not checked: the rig file could not "
                                "be read", "correct the rig file first", "file"))
        findings.append(check_control(control_path(args, client=True)))
        return findings
    findings.append(check_serial(rig.source.url))
    findings += check_midi(rig.outputs.midi)
    findings += check_osc(rig.outputs.osc)
    findings += check_midifile(rig.outputs.midifile)
    findings.append(check_control(control_path(args, rig, client=True)))
    return findings


def cmd_check(args: argparse.Namespace) -> int:
    import textwrap

    findings = run_checks(args)
    if getattr(args, "json", False):
        print(json.dumps([f.as_dict() for f in findings], indent=2))
    else:
        width = max(len(f.check) for f in findings)
        for f in findings:
            head = f"  {'ok' if f.ok else 'PROBLEM':8} {f.check:{width}}  "
            print(textwrap.fill(f.detail, 100, initial_indent=head, break_on_hyphens=False,
                                break_long_words=False, subsequent_indent=" " * len(head)))
            if f.fix:
                pad = " " * (11 + width + 2)
                print(textwrap.fill("fix: " + f.fix, 100, initial_indent=pad,
                                    break_on_hyphens=False, break_long_words=False,
                                    subsequent_indent=pad + "     "))
        bad = sum(not f.ok for f in findings)
        print(f"\n{len(findings)} checks, {bad} problem(s)" if bad else
              f"\n{len(findings)} checks, all fine")
    return check_exit_code(findings)
