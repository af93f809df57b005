"""Tool commands: check, watch, tape, replay, plot (registered by commands.py, see cli.py).

``check``
    Validates the files (rig, every venue, the active one against the rig) and this
    machine: the board's serial device and its permissions, the MIDI system, OSC
    destinations, the daemon's control socket and the store folder. One line per check,
    each problem with what to do about it; exit 3 for a file problem, 4 for the machine.
``watch``
    Live meters: every channel's raw reading, baseline and hand position, every voice's
    pitch (note, cents, Hz) and level. From the running daemon's watch stream, or the
    board itself with the active profile, or a simulated board (``--simulate``).
``tape``
    Records the board's raw bytes with their times (the format of bridge/recording.py),
    from the board, or from a running daemon that holds the port (frames re-encoded as
    text lines), or from the simulator.
``replay``
    Runs a recording through any venue profile offline, as fast as it goes: what would
    be played (per second), the MIDI messages by kind, the OSC datagrams; optionally a
    Standard MIDI File and a plot of pitch and level.
``plot``
    Draws a venue profile's calibration: hand position against c with the captured
    points, and the pitch (or level) the position gives.

Recordings named without a folder live in the store's ``recordings/`` folder.
"""

from __future__ import annotations

import argparse
import contextlib
import getpass
import grp
import json
import logging
import math
import os
import pwd
import queue
import signal
import socket
import stat
import subprocess
import sys
import tempfile
import threading
import time
from array import array
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from .commands import (
    control_path,
    daemon_client,
    emit,
    local_frames,
    setup_for,
    simulated_board,
    store_for,
)
from .errors import ConfigError, ControlError, DeviceError
from .mapping import NOTE_NAMES

log = logging.getLogger(__name__)

RECORDINGS_DIR = "recordings"
RECORDING_SUFFIX = ".rec"
#: With --seconds, give up when no frame came for this long (a script must not hang).
NO_DATA_S = 10.0
#: Updates a second of ``watch`` by default; at least 10 keep the meters fluid.
WATCH_RATE_HZ = 20.0


# ------------------------------------------------------------------------------ shared


def _positive(text: str) -> float:
    """argparse type: a positive, finite number."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not (v > 0.0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError(f"{text!r}: give a positive number")
    return v


def _count(text: str) -> int:
    """argparse type: a whole number of at least 1."""
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"{text!r}: give 1 or more")
    return v


def _destination(text: str) -> str:
    """argparse type: an OSC destination host:port."""
    from .outputs.osc import parse_destination

    try:
        parse_destination(text)
    except ValueError as e:
        raise argparse.ArgumentTypeError(str(e)) from None
    return text.strip()


def split_note(n: float) -> tuple[str, float]:
    """Nearest note name with octave and the distance from it in cents: 69.12 -> ('A4', 12.0).

    MIDI note 60 is C4 (middle C) and 69 is A4, so note 0 is C-1.
    """
    if not math.isfinite(n):
        return "?", 0.0
    k = math.floor(n + 0.5)
    return f"{NOTE_NAMES[k % 12]}{k // 12 - 1}", (n - k) * 100.0


def recording_path(store: Any, name: str) -> Path:
    """Where the recording ``name`` lives.

    A name with a folder part (``takes/a.rec``, ``./a.rec``, ``/tmp/a.rec``) is used as
    given. A bare name is a file in the store's ``recordings/`` folder: it must pass the
    venue-name rules (letters, digits, ``. _ -``, no leading dot, no ``..``; folded to
    lower case), gets ``.rec`` when it has no suffix, and may not lead out of that folder
    through a symbolic link.
    """
    from .profiles import check_name

    if not name.strip():
        raise ConfigError("a recording needs a name")
    if "/" in name or os.sep in name:
        return Path(name).expanduser()
    safe = check_name(name)
    if "." not in safe:
        safe += RECORDING_SUFFIX
    folder = Path(store.root) / RECORDINGS_DIR
    path = folder / safe
    real = path.resolve()
    if real.parent != folder.resolve():
        raise ConfigError(
            f"recording {name!r}: {path} leads to {real}, outside {folder} (a symbolic link?); "
            "refused. Give a path with a folder to write elsewhere."
        )
    return path


def _recordings_listing(path: Path) -> str:
    names = sorted(p.name for p in path.parent.glob("*" + RECORDING_SUFFIX)) if path.parent.is_dir() else []
    return ", ".join(names) or "none"


@contextlib.contextmanager
def _sigterm_as_interrupt() -> Iterator[None]:
    """While a long tool runs, SIGTERM ends it like Ctrl-C: files closed, summary printed."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    old = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, old)


_END = object()


class _Feed:
    """Runs a blocking producer (an iterator) in a thread; the caller takes items with a
    timeout, so deadlines and Ctrl-C work even while the producer waits on a socket."""

    def __init__(self, items: Iterator[Any], stop: threading.Event, name: str) -> None:
        self._items = items
        self.stop_event = stop
        self.error: BaseException | None = None
        self._q: queue.Queue[Any] = queue.Queue(maxsize=512)
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)

    def start(self) -> _Feed:
        self._thread.start()
        return self

    def _run(self) -> None:
        it = self._items
        try:
            for item in it:
                if not self._put(item):
                    break
        except BaseException as e:  # noqa: BLE001 - re-raised in the caller's thread by get()
            self.error = e
        finally:
            close = getattr(it, "close", None)
            if close is not None:
                with contextlib.suppress(Exception):
                    close()  # a generator's own clean-up (closing the port) runs here
            self._put(_END, force=True)

    def _put(self, item: Any, force: bool = False) -> bool:
        while force or not self.stop_event.is_set():
            try:
                self._q.put(item, timeout=0.2)
                return True
            except queue.Full:
                if force:
                    with contextlib.suppress(queue.Empty):
                        self._q.get_nowait()
        return False

    def get(self, timeout: float) -> Any:
        """The next item, None when none came within ``timeout``, or ``_END``."""
        try:
            item = self._q.get(timeout=max(0.0, timeout))
        except queue.Empty:
            return None
        if item is _END and self.error is not None:
            raise self.error
        return item

    def stop(self, wait_s: float = 2.0) -> None:
        self.stop_event.set()
        self._thread.join(wait_s)


def _require_device(rig: Any) -> None:
    """Fail at once (exit 4) when the board's device path does not exist."""
    url = rig.source.url
    if "://" not in url and not os.path.exists(url):
        raise DeviceError(
            f"no board at {url}: plug it in, check [source] url in rig.toml, or try "
            "--simulate; 'fieldbridge check' lists the serial devices present"
        )


def _pyplot_figure(rows: int, cols: int, size: tuple[float, float], **kw: Any) -> tuple[Any, Any]:
    """A matplotlib Figure on the Agg canvas (no display needed) and its axes grid."""
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        raise DeviceError(
            "plots need matplotlib, which is not installed: pip install 'fieldbridge[plot]'"
        ) from None
    fig = Figure(figsize=size, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, cols, squeeze=False, **kw)
    return fig, axes


def _save_figure(fig: Any, path: Path) -> None:
    """Write a PNG atomically: a temporary file in the same folder, then a rename."""
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ConfigError(f"cannot write {path}: the folder {folder} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            fig.savefig(fh, format="png", dpi=100)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as e:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise ConfigError(f"cannot write {path}: {e}") from e


def _note_ticks(ax: Any, lo: float, hi: float) -> None:
    """Y ticks at every C (and every F# when the range is small), labelled with note names."""
    step = 6 if hi - lo <= 30 else 12
    first = math.ceil(lo / step) * step
    ticks = list(range(int(first), math.floor(hi) + 1, step))
    if ticks:
        ax.set_yticks(ticks, [f"{split_note(t)[0]} ({t})" for t in ticks])


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
        findings.append(check_control(control_path(args)))
        return findings
    findings.append(check_serial(rig.source.url))
    findings += check_midi(rig.outputs.midi)
    findings += check_osc(rig.outputs.osc)
    findings += check_midifile(rig.outputs.midifile)
    findings.append(check_control(control_path(args, rig)))
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


# ------------------------------------------------------------------------------ watch


def snapshot(d: Mapping[str, Any], t: float, source: str) -> dict[str, Any]:
    """One update of the monitor from a reading dict (``Reading.as_dict()`` or a daemon's
    watch line): plain numbers, note names and cents added."""
    voices = []
    for v in d.get("voices", []):
        n = float(v["note"])
        name, cents = split_note(n)
        voices.append({"name": v["name"], "note": round(n, 4), "note_name": name,
                       "cents": round(cents, 1), "hz": round(float(v["hz"]), 3),
                       "level": round(float(v["level"]), 4), "present": bool(v["present"])})
    channels = []
    for c in d.get("channels", []):
        channels.append({"name": c["name"], "role": c["role"], "raw": float(c["raw"]),
                         "baseline": round(float(c["baseline"]), 2), "c": float(c["c"]),
                         "position": round(float(c["position"]), 4),
                         "present": bool(c["present"])})
    return {"t": round(t, 3), "frame": d.get("frame"), "profile": d.get("profile"),
            "source": source, "channels": channels, "voices": voices}


def engine_updates(frames: Iterable[Sequence[int]], engine: Any, every: int, profile: str
                   ) -> Iterator[dict[str, Any]]:
    """Every frame through ``engine``; every ``every``-th reading as a dict."""
    for n, values in enumerate(frames, 1):
        reading = engine.process(values, None, time.monotonic())
        if n % every == 0:
            d = reading.as_dict()
            d["profile"] = profile
            yield d


def _bar(x: float, width: int) -> str:
    """A meter of ``width`` characters for x in 0..1, in eighths of a character."""
    x = 0.0 if not x > 0.0 else min(1.0, x)
    eighths = round(x * width * 8)
    full, part = divmod(eighths, 8)
    text = "\u2588" * full + ("" if not part else " \u258f\u258e\u258d\u258c\u258b\u258a\u2589"[part])
    return text.ljust(width, "\u00b7")


class _JsonView:
    def start(self, where: str) -> None:
        pass

    def waiting(self, text: str) -> None:
        pass

    def show(self, snap: dict[str, Any]) -> None:
        print(json.dumps(snap), flush=True)

    def stop(self) -> None:
        pass


class _LineView:
    """One plain line per update, for a log or a pipe."""

    def start(self, where: str) -> None:
        print(f"watching {where}", flush=True)

    def waiting(self, text: str) -> None:
        pass

    def show(self, snap: dict[str, Any]) -> None:
        parts = [f"{snap['t']:7.2f} s"]
        for v in snap["voices"]:
            pitch = f"{v['note_name']:>4} {v['cents']:+5.1f}c {v['hz']:8.2f} Hz" if v["present"] \
                else "   -                  "
            parts.append(f"{v['name']} {pitch} level {v['level']:.2f}")
        for c in snap["channels"]:
            if c["role"] in ("pitch", "volume"):
                parts.append(f"{c['name']} {c['raw']:.0f}/{c['baseline']:.0f} "
                             f"pos {c['position']:.2f}")
        print("  ".join(parts), flush=True)

    def stop(self) -> None:
        pass


class _LiveView:
    """Meters redrawn in place on a terminal (rich's Live display)."""

    def __init__(self) -> None:
        from rich.console import Console
        from rich.live import Live

        self.console = Console()
        self.live = Live(console=self.console, auto_refresh=False, transient=False)
        self.where = ""

    def start(self, where: str) -> None:
        self.where = where
        self.live.start()
        self.waiting(f"waiting for frames from {where} ...")

    def waiting(self, text: str) -> None:
        from rich.text import Text

        self.live.update(Text(text + "  (Ctrl-C stops)"), refresh=True)

    def show(self, snap: dict[str, Any]) -> None:
        self.live.update(self.render(snap), refresh=True)

    def render(self, snap: dict[str, Any]) -> Any:
        from rich.console import Group
        from rich.table import Table

        chans = Table(title=f"{self.where}  -  profile {snap['profile']}  -  {snap['t']:.1f} s",
                      title_justify="left", expand=False)
        for col, just in (("channel", "left"), ("raw", "right"), ("baseline", "right"),
                          ("change", "right"), ("hand", "left"), ("position", "left")):
            chans.add_column(col, justify=just)  # type: ignore[arg-type]
        for c in snap["channels"]:
            base = c["baseline"] or 1.0
            change = f"{(c['raw'] / base - 1.0) * 100.0:+.3f} %" if c["raw"] else ""
            if c["role"] in ("pitch", "volume"):
                pos = f"{_bar(c['position'], 30)} {c['position']:.2f}"
                hand = "[green]near[/]" if c["present"] else "-"
            else:
                pos, hand = f"({c['role']})", ""
            chans.add_row(c["name"], f"{c['raw']:,.0f}", f"{c['baseline']:,.1f}", change, hand,
                          pos)
        voices = Table(expand=False)
        for col, just in (("voice", "left"), ("note", "left"), ("cents", "right"),
                          ("Hz", "right"), ("level", "left")):
            voices.add_column(col, justify=just)  # type: ignore[arg-type]
        for v in snap["voices"]:
            voices.add_row(v["name"], v["note_name"] if v["present"] else "-",
                           f"{v['cents']:+5.1f}", f"{v['hz']:9.2f}",
                           f"{_bar(v['level'], 30)} {v['level']:.2f}")
        return Group(chans, voices)

    def stop(self) -> None:
        self.live.stop()


def _watch_source(args: argparse.Namespace, store: Any, rig: Any, every: int,
                  stack: contextlib.ExitStack, stop: threading.Event
                  ) -> tuple[Iterator[dict[str, Any]], str]:
    """Reading dicts from the simulator, the running daemon, or the board itself."""
    if args.simulate:
        from .sim import scenario

        setup = setup_for(store, args.venue)
        perf = scenario(args.performance, args.seed)
        perf.loop = True
        link = stack.enter_context(simulated_board(rig, perf))
        frames = local_frames(rig, link, stop)
        return engine_updates(frames, setup.engine(), every, setup.profile), "simulated board"
    client = daemon_client(args, rig)
    if client is not None:
        if args.venue:
            log.warning("--venue ignored: the running daemon plays its own profile "
                        "(fieldbridge use NAME switches it)")
        return client.watch(every=every), "daemon"
    _require_device(rig)
    setup = setup_for(store, args.venue)
    frames = local_frames(rig, None, stop)
    return engine_updates(frames, setup.engine(), every, setup.profile), rig.source.url


def cmd_watch(args: argparse.Namespace) -> int:
    """Live meters until Ctrl-C or --seconds after the first update."""
    store = store_for(args)
    rig = store.load_rig()
    every = max(1, int(rig.board.rate_hz // args.rate))
    if args.json:
        view: _JsonView | _LineView | _LiveView = _JsonView()
    elif sys.stdout.isatty():
        view = _LiveView()
    else:
        view = _LineView()
    stop = threading.Event()
    shown = 0
    with contextlib.ExitStack() as stack, _sigterm_as_interrupt():
        items, where = _watch_source(args, store, rig, every, stack, stop)
        feed = _Feed(items, stop, "watch-feed").start()
        stack.callback(feed.stop)
        view.start(where)
        stack.callback(view.stop)
        started = time.monotonic()
        t0: float | None = None
        deadline: float | None = None
        try:
            while True:
                now = time.monotonic()
                if deadline is not None and now >= deadline:
                    break
                item = feed.get(0.5 if deadline is None else min(0.5, deadline - now))
                if item is _END:
                    log.info("the stream from %s ended", where)
                    break
                now = time.monotonic()
                if item is None:
                    if t0 is None and args.seconds is not None and now - started > NO_DATA_S:
                        raise DeviceError(f"no frames from {where} in {NO_DATA_S:g} s: is the "
                                          "board sending? ('fieldbridge check' helps)")
                    view.waiting(f"waiting for frames from {where} ...")
                    continue
                if t0 is None:
                    t0 = now
                    deadline = None if args.seconds is None else now + args.seconds
                view.show(snapshot(item, now - t0, where))
                shown += 1
        except KeyboardInterrupt:
            pass
        except BrokenPipeError:  # the reader went away (watch ... | head): a normal end
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            os.close(devnull)
    log.info("watch: %d updates", shown)
    return 0


# ------------------------------------------------------------------------------ tape


def serial_chunks(settings: Any, stop: threading.Event) -> Iterator[tuple[float, bytes]]:
    """(time, bytes) as the link delivers them, until ``stop`` is set."""
    from .sources import SerialSource

    src = SerialSource(settings, stop=stop)
    try:
        while not stop.is_set():
            data = src.read(0.1)
            if data:
                yield time.monotonic(), data
    finally:
        src.close()


def daemon_chunks(client: Any) -> Iterator[tuple[float, bytes]]:
    """A running daemon's raw frames, re-encoded as the text lines a board would send.

    The daemon's frame number becomes the leading sequence number, so frames the daemon
    dropped for a slow watcher show up as sequence gaps on replay. A first empty line
    lets the replay's decoder start on the first frame.
    """
    from .frames import encode_text

    yield time.monotonic(), b"\n"
    for line in client.watch(every=1, raw=True):
        yield time.monotonic(), encode_text(line["raw"], seq=int(line["frame"]) % (2**32))


def _tape_source(args: argparse.Namespace, rig: Any, stack: contextlib.ExitStack,
                 stop: threading.Event) -> tuple[Iterator[tuple[float, bytes]], str, Any]:
    """(chunks, where, frame settings of the bytes)."""
    if args.simulate:
        from .sim import scenario

        perf = scenario(args.performance, args.seed)
        perf.loop = True
        link = stack.enter_context(simulated_board(rig, perf))
        settings = rig.source.model_copy(update={"url": link})
        return serial_chunks(settings, stop), "simulated board", rig.frames
    client = daemon_client(args, rig)
    if client is not None:
        text = rig.frames.model_copy(update={"format": "text", "leading_seq": True})
        return daemon_chunks(client), "daemon", text
    _require_device(rig)
    return serial_chunks(rig.source, stop), rig.source.url, rig.frames


def cmd_tape(args: argparse.Namespace) -> int:
    """Record raw bytes with their times until --seconds or Ctrl-C."""
    from .frames import make_decoder
    from .recording import RecordingHeader, RecordingWriter

    store = store_for(args)
    rig = store.load_rig()
    path = recording_path(store, args.file)
    if not path.parent.exists() and path.parent == Path(store.root) / RECORDINGS_DIR:
        path.parent.mkdir(parents=True, exist_ok=True)
    names = [c.name for c in rig.channels]
    stop = threading.Event()
    quiet = args.json or not sys.stdout.isatty()
    with contextlib.ExitStack() as stack, _sigterm_as_interrupt():
        chunks, where, frames = _tape_source(args, rig, stack, stop)
        header = RecordingHeader(
            frame_format=frames.format, frame_settings=frames.model_dump(mode="json"),
            channels=names, kinds=[c.kind for c in rig.channels],
            board=f"{rig.name} ({where})".strip(), notes=args.notes,
        )
        writer = RecordingWriter(path, header, overwrite=args.force)
        writer.open()
        stack.callback(writer.close)
        decoder = make_decoder(frames, names)
        if not args.json:
            print(f"Recording {where} to {path}"
                  + (f" for {args.seconds:g} s" if args.seconds else " (Ctrl-C stops)"), flush=True)
        feed = _Feed(chunks, stop, "tape-feed").start()
        started = time.monotonic()
        first: float | None = None
        last = 0.0
        next_note = 1.0
        try:
            while True:
                now = time.monotonic()
                if first is not None and args.seconds is not None and now - first >= args.seconds:
                    break
                item = feed.get(0.25)
                if item is _END:
                    break
                if item is None:
                    if first is None and args.seconds is not None and \
                            time.monotonic() - started > NO_DATA_S:
                        raise DeviceError(f"no bytes from {where} in {NO_DATA_S:g} s: is the "
                                          "board sending? ('fieldbridge check' helps)")
                    continue
                t, data = item
                if first is None:
                    first = t
                last = t
                writer.write(t, data)
                decoder.feed(data)
                if not quiet and t - first >= next_note:
                    next_note += 1.0
                    sys.stdout.write(f"\r  {t - first:6.1f} s  {decoder.frames_ok} frames  "
                                     f"{writer.bytes_written / 1024:.1f} kB")
                    sys.stdout.flush()
        except KeyboardInterrupt:
            pass
        except BaseException:
            if writer.chunks_written == 0:
                writer.close()
                with contextlib.suppress(OSError):
                    path.unlink()  # nothing recorded: leave no empty take behind
            raise
        finally:
            feed.stop()
            writer.close()
    if not quiet and first is not None:
        sys.stdout.write("\n")
    drops = {k: v for k, v in decoder.drops.items() if v}
    obj = {"ok": True, "path": str(path), "source": where,
           "seconds": round(last - first, 3) if first is not None else 0.0,
           "chunks": writer.chunks_written, "bytes": writer.bytes_written,
           "frames": decoder.frames_ok, "drops": drops}
    emit(args, obj, f"Recorded {obj['seconds']:.1f} s, {decoder.frames_ok} frames, "
         f"{writer.bytes_written} bytes to {path}; decoder drops {drops or 'none'}")
    return 0


# ------------------------------------------------------------------------------ replay


class CollectPort:
    """A MIDI port for dry runs: keeps every raw message it is given, sends nothing."""

    timed = False

    def __init__(self, name: str = "replay") -> None:
        self.name = name
        self.messages: list[bytes] = []

    def send(self, data: bytes) -> None:
        self.messages.append(bytes(data))

    def close(self) -> None:
        pass


@dataclass
class VoiceSeries:
    """Per-frame pitch and level of one voice over a replay (for the plot)."""

    name: str
    note: array[float] = field(default_factory=lambda: array("d"))
    level: array[float] = field(default_factory=lambda: array("d"))
    present: array[int] = field(default_factory=lambda: array("b"))


@dataclass
class ReplayResult:
    path: Path
    venue: str
    frames: int = 0
    duration_s: float = 0.0
    compute_s: float = 0.0
    records: list[dict[str, Any]] = field(default_factory=list)
    seconds: list[dict[str, Any]] = field(default_factory=list)
    t: array[float] = field(default_factory=lambda: array("d"))
    voices: list[VoiceSeries] = field(default_factory=list)
    midi_counts: dict[str, int] = field(default_factory=dict)
    midi_messages: int = 0
    midi_bytes: int = 0
    midi_mode: str = ""
    osc_datagrams: int = 0
    osc_send_errors: dict[str, int] = field(default_factory=dict)
    osc_to: str = ""
    drops: dict[str, int] = field(default_factory=dict)
    resyncs: int = 0
    silences: int = 0

    def summary(self) -> dict[str, Any]:
        return {"frames": self.frames, "seconds": round(self.duration_s, 3),
                "compute_s": round(self.compute_s, 3), "venue": self.venue,
                "midi": {"mode": self.midi_mode, "messages": self.midi_messages,
                         "bytes": self.midi_bytes, "by_type": self.midi_counts},
                "osc": {"datagrams": self.osc_datagrams, "to": self.osc_to,
                        "send_errors": self.osc_send_errors},
                "decoder": {"drops": self.drops, "resyncs": self.resyncs},
                "silences": self.silences}


def _voice_record(reading: Any) -> list[dict[str, Any]]:
    out = []
    for v in reading.voices:
        name, cents = split_note(v.note)
        out.append({"name": v.name, "note": round(v.note, 4), "note_name": name,
                    "cents": round(cents, 1), "hz": round(v.hz, 3), "level": round(v.level, 4),
                    "present": bool(v.present)})
    return out


def replay_recording(
    path: Path,
    rig: Any,
    setup: Any,
    *,
    realtime: bool = False,
    every: int = 5,
    midi_file: Path | None = None,
    osc_to: str | None = None,
    on_second: Callable[[dict[str, Any]], None] | None = None,
) -> ReplayResult:
    """Play ``path`` through ``setup`` (a daemon Setup: rig plus venue) without a board.

    MIDI goes to a :class:`CollectPort` (and ``midi_file`` if given) with the rig's
    [outputs.midi] settings or the defaults; OSC goes to ``osc_to`` or to a private UDP
    socket of ours that is read and emptied as we go. A gap in the recording longer than
    the rig's ``quiet_after_s`` silences the outputs, as the daemon would.
    """
    from .frames import FrameSettings, make_decoder
    from .outputs.midi import MidiSettings, MidiSink
    from .outputs.osc import OscSettings, OscSink
    from .recording import RecordingSource, read_header

    header = read_header(path)
    names = [c.name for c in rig.channels]
    if header.channels and header.channels != names:
        raise ConfigError(f"{path}: recorded channels {header.channels}, but the rig reads "
                          f"{names}: replay it with the rig it was made with (--home)")
    kinds = [c.kind for c in rig.channels]
    if header.kinds and header.kinds != kinds:
        raise ConfigError(f"{path}: recorded kinds {header.kinds}, but the rig's channels are "
                          f"{kinds}")
    try:
        frames = FrameSettings.model_validate(header.frame_settings or
                                              {"format": header.frame_format})
    except ValueError as e:
        raise ConfigError(f"{path}: the header's frame settings are not valid: {e}") from e
    decoder = make_decoder(frames, names)
    engine = setup.engine()
    window = 1.0 / setup.rate_hz
    quiet_after = rig.source.quiet_after_s
    result = ReplayResult(path, setup.profile)
    result.voices = [VoiceSeries(v.name) for v in engine.reading.voices]

    midi_settings = rig.outputs.midi or MidiSettings()
    result.midi_mode = midi_settings.mode
    collector = CollectPort()
    ports: list[Any] = [collector]
    if midi_file is not None:
        from .outputs.midifile import MidiFileRecorder

        ports.append(MidiFileRecorder(midi_file))
    osc_base = rig.outputs.osc or OscSettings()
    counter: socket.socket | None = None
    if osc_to is None:
        counter = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        counter.bind(("127.0.0.1", 0))
        counter.setblocking(False)
        osc_to = f"127.0.0.1:{counter.getsockname()[1]}"
        result.osc_to = "(counted here, not sent on)"
    else:
        result.osc_to = osc_to
    osc_settings = OscSettings.model_validate({**osc_base.model_dump(), "destinations": [osc_to]})
    buf = bytearray(65536)

    def drain() -> None:
        if counter is None:
            return
        while True:
            try:
                counter.recv_into(buf)
            except (BlockingIOError, InterruptedError):
                return

    midi = MidiSink(midi_settings, ports)
    osc = OscSink(osc_settings)
    src = RecordingSource(path, realtime=realtime)
    clock = time.perf_counter()
    last_t: float | None = None
    second = 0
    prev_frame_t = -math.inf
    try:
        with midi, osc:
            gen = src.generation
            while True:
                data = src.read(0.5)
                if src.generation != gen:
                    gen = src.generation
                    decoder.reset()
                if not data:
                    if src.finished:
                        break
                    continue
                t_chunk = src.last_t
                if last_t is not None and t_chunk - last_t > quiet_after:
                    midi.silence("gap in the recording")
                    osc.silence("gap in the recording")
                    result.silences += 1
                last_t = t_chunk
                got = decoder.feed(data)
                k = len(got)
                for i, frame in enumerate(got):
                    # Frames that arrived together were sent one window apart.
                    t = max(prev_frame_t, t_chunk - (k - 1 - i) * window)
                    prev_frame_t = t
                    reading = engine.process(frame.values, frame.seq, t)
                    midi.send(reading)
                    osc.send(reading)
                    drain()
                    result.frames += 1
                    result.t.append(t)
                    for series, v in zip(result.voices, reading.voices):
                        series.note.append(v.note)
                        series.level.append(v.level)
                        series.present.append(1 if v.present else 0)
                    if result.frames % every == 0:
                        result.records.append({
                            "t": round(t, 4), "frame": result.frames, "seq": frame.seq,
                            "voices": _voice_record(reading),
                            "channels": [{"name": c.name, "raw": c.raw,
                                          "position": round(c.position, 4),
                                          "present": bool(c.present)}
                                         for c in reading.channels],
                        })
                    while t >= second + 1.0:
                        second += 1
                        line = {"t": second, "voices": _voice_record(reading)}
                        result.seconds.append(line)
                        if on_second is not None:
                            on_second(line)
            drain()
        drain()
    finally:
        src.close()
        if counter is not None:
            counter.close()
    result.compute_s = time.perf_counter() - clock
    result.duration_s = result.t[-1] - result.t[0] if result.frames else 0.0
    result.midi_counts = dict(midi.counts)
    result.midi_messages = len(collector.messages)
    result.midi_bytes = sum(len(m) for m in collector.messages)
    result.osc_datagrams = osc.datagrams
    result.osc_send_errors = dict(osc.send_errors)
    result.drops = {k: v for k, v in decoder.drops.items() if v}
    result.resyncs = decoder.resyncs
    return result


def plot_replay(result: ReplayResult, out: Path, title: str) -> None:
    """Pitch (note) and level of every voice against recording time, as a PNG."""
    import numpy as np

    fig, axes = _pyplot_figure(2, 1, (11.0, 6.5), sharex=True,
                               gridspec_kw={"height_ratios": [3, 2]})
    ax_pitch, ax_level = axes[0][0], axes[1][0]
    t = np.frombuffer(result.t, dtype=float) if result.frames else np.zeros(0)
    lo, hi = math.inf, -math.inf
    for s in result.voices:
        note = np.frombuffer(s.note, dtype=float) if result.frames else np.zeros(0)
        present = np.frombuffer(s.present, dtype=np.int8).astype(bool) if result.frames \
            else np.zeros(0, bool)
        shown = np.where(present, note, np.nan)
        if present.any():
            lo, hi = min(lo, float(np.nanmin(shown))), max(hi, float(np.nanmax(shown)))
        ax_pitch.plot(t, shown, lw=1.2, label=f"{s.name} (hand near)")
        level = np.frombuffer(s.level, dtype=float) if result.frames else np.zeros(0)
        ax_level.plot(t, level, lw=1.2, label=s.name)
    if math.isfinite(lo):
        pad = max(1.0, 0.05 * (hi - lo))
        ax_pitch.set_ylim(lo - pad, hi + pad)
        _note_ticks(ax_pitch, lo - pad, hi + pad)
    ax_pitch.set_ylabel("pitch (note name, MIDI number)")
    ax_pitch.grid(True, alpha=0.3)
    ax_pitch.legend(loc="upper right")
    ax_level.set_ylim(-0.02, 1.02)
    ax_level.set_ylabel("level (linear gain 0..1)")
    ax_level.set_xlabel("time in the recording (s)")
    ax_level.grid(True, alpha=0.3)
    ax_level.legend(loc="upper right")
    fig.suptitle(title)
    _save_figure(fig, out)


def cmd_replay(args: argparse.Namespace) -> int:
    store = store_for(args)
    rig = store.load_rig()
    path = recording_path(store, args.file)
    if not path.exists():
        raise ConfigError(f"{path}: no such recording (recordings in {path.parent}: "
                          f"{_recordings_listing(path)}); a file in this folder is ./NAME")
    setup = setup_for(store, args.venue)
    every = args.every or max(1, round(setup.rate_hz / 10.0))
    texts = not args.json

    def second_line(line: dict[str, Any]) -> None:
        parts = []
        for v in line["voices"]:
            pitch = f"{v['note_name']:>4} {v['cents']:+5.1f}c {v['hz']:8.2f} Hz" \
                if v["present"] else "   -  (no hand)      "
            parts.append(f"{v['name']}: {pitch}  level {v['level']:.2f}")
        print(f"  {line['t']:6.0f} s  " + "   ".join(parts), flush=True)

    if texts and args.osc:
        from .cli import SAFETY

        print(SAFETY)  # the OSC goes to a real receiver, which may drive a synth
    if texts:
        print(f"Replaying {path} through venue {setup.profile}"
              + (" in real time" if args.realtime else "") + " ...")
    with _sigterm_as_interrupt():
        result = replay_recording(
            path, rig, setup, realtime=args.realtime, every=every,
            midi_file=Path(args.midi) if args.midi else None, osc_to=args.osc,
            on_second=second_line if texts else None,
        )
    if args.plot:
        plot_replay(result, Path(args.plot),
                    f"{path.name} through venue {setup.profile}: pitch and level")
    summary = result.summary()
    summary["midi_file"] = args.midi
    summary["plot"] = args.plot
    if args.json:
        print(json.dumps({"ok": True, "recording": str(path), "every": every,
                          "records": result.records, "summary": summary}, indent=1))
        return 0
    by_type = ", ".join(f"{k} {v}" for k, v in sorted(result.midi_counts.items())) or "none"
    lines = [
        (f"\n{result.frames} frames, {result.duration_s:.1f} s of recording, computed in "
         f"{result.compute_s:.2f} s; decoder drops {result.drops or 'none'}, "
         f"{result.resyncs} resync(s), {result.silences} gap silence(s)"),
        (f"  MIDI ({result.midi_mode} mode): {result.midi_messages} messages, "
         f"{result.midi_bytes} bytes: {by_type}"),
        f"  OSC: {result.osc_datagrams} datagrams {result.osc_to}"
        + (f", send errors {result.osc_send_errors}" if result.osc_send_errors else ""),
    ]
    if args.midi:
        lines.append(f"  MIDI file: {args.midi}")
    if args.plot:
        lines.append(f"  plot: {args.plot}")
    print("\n".join(lines))
    return 0


# ------------------------------------------------------------------------------ plot


def plot_calibration(name: str, venue: Any, rig: Any, out: Path,
                     threshold_sigma: float | None = None) -> None:
    """Per channel: hand position against c (captured points and fitted model), and the
    pitch in semitones (pitch channels) or level in dB (volume channels) the position gives."""
    import numpy as np

    from .mapping import LevelMap, PitchMap

    chans = list(venue.channels.items())
    fig, axes = _pyplot_figure(len(chans), 2, (12.0, 4.2 * len(chans)))
    pitch_of = {v.pitch_channel: v for v in rig.voices}
    volume_of = {v.volume_channel: v for v in rig.voices if v.volume_channel}
    sigma = threshold_sigma if threshold_sigma is not None else rig.baseline.threshold_sigma
    for row, (ch, cal) in enumerate(chans):
        ax, ax2 = axes[row][0], axes[row][1]
        unit = "ticks" if cal.kind == "period" else "counts"
        pts_c = np.array([p.c for p in cal.points])
        pts_pos = np.array([p.position for p in cal.points])
        c_hi = float(pts_c.max()) * 1.3
        c_thr = sigma * cal.noise_c
        c_lo = max(min(float(pts_c.min()), c_thr if c_thr > 0 else math.inf) / 2.0, c_hi * 1e-4)
        cs = np.geomspace(c_lo, c_hi, 400)
        ax.plot(cs, [cal.position(float(c)) for c in cs], lw=2, label=f"fitted {cal.model} model")
        ax.plot(pts_c, pts_pos, "o", ms=8, mfc="none", mew=2, label="captured holds")
        for p in cal.points:
            if p.distance_m is not None:
                ax.annotate(f"{p.distance_m * 100:.0f} cm", (p.c, p.position),
                            textcoords="offset points", xytext=(8, -12), fontsize=9)
        if c_thr > 0:
            ax.axvline(c_thr, ls=":", color="grey",
                       label=f"presence threshold ({sigma:g} x noise)")
        ax.set_xscale("log")
        ax.set_xlim(c_lo, c_hi)
        ax.set_ylim(-0.05, 1.05)
        ax.set_xlabel("c = relative capacitance the hand adds (log scale)")
        ax.set_ylabel("hand position (0 far .. 1 near)")
        ax.set_title(f"{ch}: {cal.model} model, fit error {cal.fit_error:.2%} of the range; "
                     f"baseline {cal.baseline:.6g} {unit}, noise {cal.noise:.3g}", fontsize=10)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(loc="upper left", fontsize=9)
        pos = np.linspace(0.0, 1.0, 401)
        if ch in pitch_of:
            v = pitch_of[ch]
            pm = PitchMap(v.pitch)
            semis = [pm.note(float(p)) - pm.low for p in pos]
            ax2.plot(pos, semis, lw=2, color="tab:purple", label=f"voice {v.name}")
            marks = [PitchMap(v.pitch).note(float(p)) - pm.low for p in pts_pos]
            ax2.plot(pts_pos, marks, "o", ms=7, mfc="none", mew=2, color="tab:orange",
                     label="captured holds")
            span = v.pitch.span_semitones
            ticks = np.arange(0.0, span + 0.01, 12.0 if span > 24 else 6.0)
            ax2.set_yticks(ticks, [f"{t:g} ({split_note(pm.low + t)[0]})" for t in ticks])
            ax2.set_ylabel(f"semitones above {split_note(pm.low)[0]} (note)")
            ax2.set_title(f"{ch} -> pitch of voice {v.name}: {span:g} semitones, "
                          f"scale {v.pitch.scale}, pull {v.pitch.pull:g}", fontsize=10)
        elif ch in volume_of:
            v = volume_of[ch]
            lm = LevelMap(v.level)
            levels = np.array([lm.level(float(p)) for p in pos])
            with np.errstate(divide="ignore"):
                db = np.where(levels > 0, 20.0 * np.log10(np.maximum(levels, 1e-12)), np.nan)
            ax2.plot(pos, db, lw=2, color="tab:green", label=f"voice {v.name}")
            ax2.set_ylabel("level (dB; gaps are silence)")
            ax2.set_ylim(v.level.floor_db - 3.0, 3.0)
            ax2.set_title(f"{ch} -> level of voice {v.name}: {v.level.taper} taper, ceiling "
                          f"{v.level.ceiling:g}", fontsize=10)
        else:
            ax2.text(0.5, 0.5, "no voice plays this channel", ha="center", va="center",
                     transform=ax2.transAxes)
        ax2.set_xlim(0.0, 1.0)
        ax2.set_xlabel("hand position (0 far .. 1 near)")
        ax2.grid(True, alpha=0.3)
        if ax2.get_legend_handles_labels()[0]:
            ax2.legend(loc="best", fontsize=9)
    models = ", ".join(f"{ch} {cal.model}" for ch, cal in chans)
    fig.suptitle(f"Venue {name}: calibration of {venue.created:%Y-%m-%d %H:%M} ({models})",
                 fontsize=13)
    _save_figure(fig, out)


def cmd_plot(args: argparse.Namespace) -> int:
    from .profiles import apply_venue

    store = store_for(args)
    rig = store.load_rig()
    name = args.name or store.active
    if not name:
        raise ConfigError("no venue named and none active: fieldbridge plot NAME --out FILE.png")
    venue = store.load_venue(name)
    try:
        played = apply_venue(rig, venue)
    except ConfigError as e:
        log.warning("%s; the mapping panels use the rig's own settings", e)
        played = rig
    out = Path(args.out)
    plot_calibration(name, venue, played, out)
    obj = {"ok": True, "venue": name, "path": str(out),
           "channels": {ch: {"model": cal.model, "points": len(cal.points)}
                        for ch, cal in venue.channels.items()}}
    emit(args, obj, f"Calibration of {name} drawn to {out}")
    return 0


# ------------------------------------------------------------------------------ table


def register(cli: Any, common: Any) -> None:
    """Add the tool commands to the parser."""
    p = cli.add("check", "check the files and this machine: board device, MIDI, OSC, daemon",
                ["fieldbridge check", "fieldbridge check --json",
                 "fieldbridge check --home /var/lib/fieldbridge"], cmd_check)
    common(p)

    p = cli.add("watch", "live meters: raw readings, baselines, hand positions, pitch and level",
                ["fieldbridge watch", "fieldbridge watch --simulate --seconds 20",
                 "fieldbridge watch --json --seconds 5 > readings.jsonl"], cmd_watch)
    common(p)
    p.add_argument("--seconds", type=_positive, help="stop this long after the first update")
    p.add_argument("--rate", type=_positive, default=WATCH_RATE_HZ,
                   help=f"updates a second, at most the frame rate (default {WATCH_RATE_HZ:g})")
    p.add_argument("--venue", help="profile to play without a daemon (default: the active one)")
    p.add_argument("--simulate", action="store_true",
                   help="a simulated board (the rig's [sim] settings) instead of the board")
    p.add_argument("--performance", default="warmup", help="simulated scenario (with --simulate)")
    p.add_argument("--seed", type=int, default=0, help="simulator seed (with --simulate)")

    p = cli.add("tape", "record the board's raw bytes with their times, for replay",
                ["fieldbridge tape friday-set", "fieldbridge tape ./take1.rec --seconds 60",
                 "fieldbridge tape demo-take --simulate --seconds 20"], cmd_tape)
    common(p)
    p.add_argument("file", help="a name (kept in the store's recordings/ folder) or a path")
    p.add_argument("--seconds", type=_positive, help="stop after this long (default: Ctrl-C)")
    p.add_argument("--force", action="store_true", help="overwrite an existing recording")
    p.add_argument("--notes", default="", help="free text kept in the recording's header")
    p.add_argument("--simulate", action="store_true", help="record a simulated board")
    p.add_argument("--performance", default="warmup", help="simulated scenario (with --simulate)")
    p.add_argument("--seed", type=int, default=0, help="simulator seed (with --simulate)")

    p = cli.add("replay", "play a recording through a venue profile offline: what would be sent",
                ["fieldbridge replay friday-set",
                 "fieldbridge replay friday-set --venue ferry-shed --midi set.mid --plot set.png",
                 "fieldbridge replay ./take1.rec --json --every 1 > frames.json"], cmd_replay)
    common(p)
    p.add_argument("file", help="a recording name (in recordings/) or a path")
    p.add_argument("--venue", help="venue profile to play it through (default: the active one)")
    p.add_argument("--realtime", action="store_true", help="at the recorded pace, not at once")
    p.add_argument("--every", type=_count, metavar="N",
                   help="--json: one record every N frames (default: ten a second)")
    p.add_argument("--midi", metavar="OUT.mid", help="also write a Standard MIDI File")
    p.add_argument("--plot", metavar="OUT.png", help="also draw pitch and level over time")
    p.add_argument("--osc", metavar="HOST:PORT", type=_destination,
                   help="send the OSC to this receiver (default: only count it)")

    p = cli.add("plot", "draw a venue profile's calibration curves to a PNG file",
                ["fieldbridge plot tin-lantern --out tin-lantern.png",
                 "fieldbridge plot --out active.png"], cmd_plot)
    common(p)
    p.add_argument("name", nargs="?", help="venue profile (default: the active one)")
    p.add_argument("--out", required=True, metavar="FILE.png", help="where to write the PNG")
