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
import logging
import math
import os
import queue
import signal
import tempfile
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from .errors import ConfigError, DeviceError
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


def recordings_listing(path: Path) -> str:
    names = sorted(p.name for p in path.parent.glob("*" + RECORDING_SUFFIX)) if path.parent.is_dir() else []
    return ", ".join(names) or "none"


@contextlib.contextmanager
def sigterm_as_interrupt() -> Iterator[None]:
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


END_OF_FEED = object()


class Feed:
    """Runs a blocking producer (an iterator) in a thread; the caller takes items with a
    timeout, so deadlines and Ctrl-C work even while the producer waits on a socket."""

    def __init__(self, items: Iterator[Any], stop: threading.Event, name: str) -> None:
        self._items = items
        self.stop_event = stop
        self.error: BaseException | None = None
        self._q: queue.Queue[Any] = queue.Queue(maxsize=512)
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)

    def start(self) -> Feed:
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
            self._put(END_OF_FEED, force=True)

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
        """The next item, None when none came within ``timeout``, or ``END_OF_FEED``."""
        try:
            item = self._q.get(timeout=max(0.0, timeout))
        except queue.Empty:
            return None
        if item is END_OF_FEED and self.error is not None:
            raise self.error
        return item

    def stop(self, wait_s: float = 2.0) -> None:
        self.stop_event.set()
        self._thread.join(wait_s)


def require_device(rig: Any) -> None:
    """Fail at once (exit 4) when the board's device path does not exist."""
    url = rig.source.url
    if "://" not in url and not os.path.exists(url):
        raise DeviceError(
            f"no board at {url}: plug it in, check [source] url in rig.toml, or try "
            "--simulate; 'fieldbridge check' lists the serial devices present"
        )


def pyplot_figure(rows: int, cols: int, size: tuple[float, float], **kw: Any) -> tuple[Any, Any]:
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


def save_figure(fig: Any, path: Path) -> None:
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


def note_ticks(ax: Any, lo: float, hi: float) -> None:
    """Y ticks at every C (and every F# when the range is small), labelled with note names."""
    step = 6 if hi - lo <= 30 else 12
    first = math.ceil(lo / step) * step
    ticks = list(range(int(first), math.floor(hi) + 1, step))
    if ticks:
        ax.set_yticks(ticks, [f"{split_note(t)[0]} ({t})" for t in ticks])


# ------------------------------------------------------------------------------ table


def register(cli: Any, common: Any) -> None:
    """Add the tool commands to the parser (their modules are imported here, not at the
    top, because they import this module's shared helpers)."""
    from .checks import cmd_check
    from .monitor import cmd_tape, cmd_watch
    from .replay import cmd_plot, cmd_replay

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
