"""Sub-commands that work with the profile store and a running daemon (see cli.py).

Each ``cmd_*`` takes the parsed arguments and returns an exit code; errors are raised as
BridgeError and turned into exit codes by cli.main. Commands that talk to a daemon try
its control socket first and fall back to opening the board themselves.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import threading
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from .control import ControlClient, socket_path
from .errors import CalibrationError, ConfigError, ControlError, DeviceError

log = logging.getLogger(__name__)


# ------------------------------------------------------------------------------ shared


def store_for(args: argparse.Namespace) -> Any:
    from .profiles import Store

    return Store.locate(getattr(args, "home", None), system=getattr(args, "service", False))


def control_path(args: argparse.Namespace, rig: Any = None, *, client: bool = False) -> Path:
    sock = getattr(getattr(rig, "control", None), "socket", None)
    return Path(sock) if sock else socket_path(getattr(args, "runtime", None), client=client)


def daemon_client(args: argparse.Namespace, rig: Any = None) -> ControlClient | None:
    """A client if a daemon answers on the control socket, else None."""
    client = ControlClient(control_path(args, rig, client=True), timeout=3.0)
    try:
        client.request({"op": "status"})
    except (ControlError, OSError):
        return None
    return client


def named_venue(store: Any, name: str | None) -> tuple[str, Any]:
    """``name`` (None: the active venue) and its loaded profile; says what to do if none."""
    name = name or store.active
    if not name:
        raise ConfigError(
            f"no venue named and none active in {store.root}: name one, or run "
            "'fieldbridge soundcheck NAME' or 'fieldbridge use NAME'"
        )
    return name, store.load_venue(name)


def setup_for(store: Any, name: str | None = None, rig: Any = None) -> Any:
    """The daemon Setup for venue ``name`` (None: the active one) from the store's files."""
    from .daemon import Setup
    from .profiles import apply_venue

    rig = rig or store.load_rig()
    name, venue = named_venue(store, name)
    played = apply_venue(rig, venue)
    return Setup(
        channels=list(played.channels),
        voices=list(played.voices),
        frames=rig.frames,
        source=rig.source,
        rate_hz=rig.board.rate_hz,
        calibration=venue.calibration(),
        baseline=played.baseline,
        smoothing=played.smoothing,
        profile=name,
        mains_filter=played.mains_filter.with_board_mains(rig.board.mains_hz),
    )


def emit(args: argparse.Namespace, obj: Any, text: str) -> None:
    """Print ``obj`` as JSON with --json, else ``text``."""
    if getattr(args, "json", False):
        print(json.dumps(obj, indent=2, default=str))
    else:
        print(text)


@contextmanager
def simulated_board(rig: Any, performance: Any) -> Iterator[str]:
    """A simulated board for this rig on a pseudo-terminal; yields the path to open."""
    import os
    import shutil
    import tempfile

    from .sim import SimBoard, SimSettings
    from .sources import PtyBoard

    s = rig.sim or SimSettings(window_s=rig.board.window_s)
    board = SimBoard(s, performance)
    folder = tempfile.mkdtemp(prefix="fieldbridge-sim-")
    link = os.path.join(folder, "board")
    pty = PtyBoard(board.next_bytes, s.window_s, link_path=link)
    pty.start()
    try:
        yield link
    finally:
        pty.stop()
        shutil.rmtree(folder, ignore_errors=True)


def local_frames(rig: Any, url: str | None = None, stop: threading.Event | None = None
                 ) -> Iterator[list[int]]:
    """Frames read straight from the board (no daemon): raw values per frame."""
    from .frames import make_decoder
    from .sources import SerialSource

    settings = rig.source if url is None else rig.source.model_copy(update={"url": url})
    dec = make_decoder(rig.frames, [c.name for c in rig.channels])
    src = SerialSource(settings, stop=stop, quiet_by="frames")
    gen = src.generation
    try:
        while stop is None or not stop.is_set():
            data = src.read(0.1)
            if src.generation != gen:
                gen = src.generation
                dec.reset()
            for f in dec.feed(data):
                src.note_frame()
                yield f.values
    finally:
        src.close()


def daemon_frames(client: ControlClient) -> Iterator[list[int]]:
    for line in client.watch(every=1, raw=True):
        yield line["raw"]


# ------------------------------------------------------------------------------ run


def cmd_run(args: argparse.Namespace) -> int:
    """Start the daemon with the store's rig and active venue profile."""
    from .daemon import Daemon
    from .notify import Notifier

    store = store_for(args)
    store_name = args.venue
    if store_name:
        store.activate(store_name)
    rig = store.load_rig()
    setup = setup_for(store, rig=rig)
    notifier = Notifier.from_env()
    stop = threading.Event()
    with _maybe_sim(rig, args) as url:
        if url:
            setup.source = setup.source.model_copy(update={"url": url})
        sinks = open_sinks(rig, notifier, stop)
        control = None
        if rig.control is None or rig.control.enabled:
            control = control_path(args, rig)
        factory = None
        if args.replay:
            from .recording import RecordingSource
            from .tools import recording_path

            path = recording_path(store, args.replay)

            def factory(stop: threading.Event, on_state: Any) -> Any:
                return RecordingSource(path, realtime=not args.fast, loop=args.loop, stop=stop,
                                       on_state=on_state)

        daemon = Daemon(
            setup,
            sinks,
            source_factory=factory,
            loader=lambda name: setup_for(store_for(args), name),
            control_path=control,
            osc_control=rig.control.osc_listen if rig.control else None,
            notifier=notifier,
            run_for_s=args.seconds,
            on_second=(lambda d: print(d.live_line(), flush=True)) if args.show else None,
        )
        daemon.stop_event = stop
        daemon.install_signal_handlers()
        counters = daemon.run()
    from .cli import _summary

    print(_summary(daemon, counters), file=sys.stderr)
    return 0


@contextmanager
def _maybe_sim(rig: Any, args: argparse.Namespace) -> Iterator[str | None]:
    if not args.simulate:
        yield None
        return
    from .sim import scenario

    perf = scenario(args.performance, args.seed)
    perf.loop = True
    with simulated_board(rig, perf) as link:
        yield link


def open_sinks(rig: Any, notifier: Any, stop: threading.Event) -> list[Any]:
    """Every output the rig names; a missing MIDI system is retried (with watchdog pings)."""
    from .outputs import make_sink
    from .outputs.midiports import open_ports

    sinks = []
    for kind, settings in rig.outputs.enabled().items():
        if kind != "midi":
            sinks.append(make_sink(kind, settings))
            continue
        delay = 0.5
        while True:
            try:
                ports = open_ports(settings)
                break
            except DeviceError as e:
                log.warning("%s (retrying in %.1f s)", e, delay)
                notifier.status(f"waiting for the MIDI system: {e}")
                if stop.wait(delay):
                    raise
                notifier.watchdog()
                delay = min(delay * 2, 5.0)
        sinks.append(make_sink("midi", settings, ports=ports))
    return sinks


# ------------------------------------------------------------------------------ profiles


def cmd_venues(args: argparse.Namespace) -> int:
    store = store_for(args)
    rows = store.list_venues()
    obj = [
        {"name": v.name, "created": str(v.created), "active": v.active, "quality": v.quality,
         "problem": v.problem}
        for v in rows
    ]
    lines = [f"Venue profiles in {store.venues_dir}:"]
    for v in rows:
        mark = "*" if v.active else " "
        lines.append(f" {mark} {v.name:24} {str(v.created)[:16]:16}  {v.problem or v.quality}")
    if not rows:
        lines.append("  (none yet: run 'fieldbridge soundcheck NAME')")
    emit(args, obj, "\n".join(lines))
    return 0


def reports_for(rig: Any, venue: Any) -> dict[str, Any]:
    from .calibrate import resolution_report

    out = {}
    spans = {v.pitch_channel: v.pitch.span_semitones for v in rig.voices}
    for name, cal in venue.channels.items():
        out[name] = resolution_report(
            cal,
            window_s=rig.board.window_s,
            pitch_span_semitones=spans.get(name),
            clock_hz=rig.board.clock_hz,
            mains_hz=rig.board.mains_hz,
            smoothing_cutoff_hz=rig.smoothing.min_cutoff_hz if rig.smoothing.enabled else None,
            rate_hz=rig.board.rate_hz,
        )
    return out


def cmd_show(args: argparse.Namespace) -> int:
    store = store_for(args)
    name, venue = named_venue(store, args.name)
    reports = reports_for(store.load_rig(), venue)
    obj = {"name": name, "active": name == store.active,
           "profile": venue.model_dump(mode="json"),
           "reports": {k: r.model_dump(mode="json") for k, r in reports.items()}}
    text = [f"Venue {name}{' (active)' if name == store.active else ''}: "
            f"{store.venue_path(name)}", f"  created {venue.created}"]
    if venue.notes.strip():
        text.append("  notes: " + venue.notes.strip().replace("\n", "\n         "))
    for ch, cal in venue.channels.items():
        text.append(f"\n[{ch}] {cal.kind} board, baseline {cal.baseline:.6g}, noise "
                    f"{cal.noise:.3g}, model {cal.model} {cal.params}, fit error "
                    f"{cal.fit_error:.2%} of the range, {len(cal.points)} points")
        text.append(str(reports[ch]))
    emit(args, obj, "\n".join(text))
    return 0


def cmd_compare(args: argparse.Namespace) -> int:
    store = store_for(args)
    diffs = store.compare(args.a, args.b)
    obj = [{"field": d.path, args.a: d.a, args.b: d.b} for d in diffs]
    lines = [f"{args.a} vs {args.b}: {len(diffs)} difference(s)"]
    for d in diffs:
        lines.append(f"  {d.path}: {d.a} -> {d.b}")
    emit(args, obj, "\n".join(lines))
    return 0


def cmd_use(args: argparse.Namespace) -> int:
    store = store_for(args)
    store.activate(args.name)  # validates against the rig; refuses an invalid profile
    client = daemon_client(args, store.load_rig())
    if client is None:
        emit(args, {"ok": True, "active": args.name, "daemon": False},
             f"{args.name} is now the active venue (no daemon running; it starts with it)")
        return 0
    reply = client.request({"op": "activate", "name": args.name})
    if not reply.get("ok"):
        raise ControlError(f"the daemon kept {reply.get('profile')!r}: {reply.get('error')}")
    emit(args, reply, f"the daemon now plays {args.name}")
    return 0


# ------------------------------------------------------------------------------ soundcheck


def _frames_for(args: argparse.Namespace, rig: Any, stack: Any, performance: Any = None
                ) -> tuple[Iterator[list[int]], str]:
    """Where a capture reads frames: the simulator, a running daemon, or the board itself."""
    if getattr(args, "simulate", False):
        link = stack.enter_context(simulated_board(rig, performance))
        return local_frames(rig, link), "simulated board"
    client = daemon_client(args, rig)
    if client is not None:
        return daemon_frames(client), "through the running daemon"
    return local_frames(rig), rig.source.url


def collect(frames: Iterator[list[int]], n: int, on_frame: Any = None) -> np.ndarray:
    rows = []
    for values in frames:
        rows.append(values)
        if on_frame is not None:
            on_frame(len(rows), values)
        if len(rows) >= n:
            break
    if len(rows) < n:
        raise DeviceError("the board stopped sending frames during the capture")
    return np.asarray(rows, dtype=float)


def cmd_soundcheck(args: argparse.Namespace) -> int:
    """The guided capture: holds, checks, fit, report, save, activate."""
    from contextlib import ExitStack

    from .cli import SAFETY
    from .profiles import VenueProfile, check_name
    from .soundcheck import Hold, default_steps, fit_rig, judge_hold, paced_performance

    name = check_name(args.name)
    store = store_for(args)
    rig = store.load_rig()
    rate = rig.board.rate_hz
    d_far, d_near = args.far_cm / 100.0, args.near_cm / 100.0
    steps = default_steps(d_far, d_near, [m / 100.0 for m in args.mark_cm])
    paced = args.paced or args.simulate or not sys.stdin.isatty()
    hold_n = max(10, round(args.hold * rate))
    settle_n = round(args.settle * rate)
    move_s = 1.0
    ui = CaptureView(args)
    if not args.json:
        print(SAFETY)
    holds: list[Hold] = []
    perf = paced_performance(steps, move_s=move_s, settle_s=args.settle, hold_s=args.hold,
                             seed=args.seed) if args.simulate else None
    with ExitStack() as stack:
        frames, where = _frames_for(args, rig, stack, perf)
        ui.say(f"Soundcheck for {name!r}, reading {where}, {rate:g} frames/s.")
        for step in steps:
            for attempt in range(1, args.tries + 1):
                ui.say(f"\n{step.prompt}")
                if paced:
                    collect(frames, round(move_s * rate), ui.meter(rig, "move"))
                else:
                    input("  press Enter when ready ")
                collect(frames, settle_n, ui.meter(rig, "settle"))
                values = collect(frames, hold_n, ui.meter(rig, "hold", hold_n))
                verdict = judge_hold(values, rig.channels, rate_hz=rate)
                if verdict.ok:
                    holds.append(Hold(step.label, values, distance_m=step.distance_m))
                    ui.say("  ok")
                    break
                ui.say("  hold rejected: " + "; ".join(verdict.problems))
                if paced or attempt == args.tries:
                    if attempt == args.tries or paced:
                        raise CalibrationError(
                            f"the {step.label!r} hold was not steady: " + "; ".join(verdict.problems)
                        )
    cal = fit_rig(rig.channels, holds, rate_hz=rate)
    venue = VenueProfile.from_calibration(cal, notes=args.notes)
    reports = reports_for(rig, venue)
    store.save_venue(name, venue)
    activated = False
    if not args.no_activate:
        store.activate(name)
        client = daemon_client(args, rig)
        if client is not None:
            reply = client.request({"op": "activate", "name": name})
            if not reply.get("ok"):
                raise ControlError(f"saved, but the daemon refused it: {reply.get('error')}")
        activated = True
    obj = {"ok": True, "name": name, "path": str(store.venue_path(name)), "active": activated,
           "reports": {k: r.model_dump(mode="json") for k, r in reports.items()}}
    text = "\n".join(f"\n[{k}] {r}" for k, r in reports.items())
    text += f"\n\nSaved {store.venue_path(name)}" + (" and made it active." if activated else ".")
    emit(args, obj, text)
    return 0


def cmd_zero(args: argparse.Namespace) -> int:
    """Re-capture only the hand-absent baseline and save it into the venue profile."""
    from contextlib import ExitStack

    from .calibrate import hold_stats
    from .sim import Performance

    store = store_for(args)
    rig = store.load_rig()
    name, venue = named_venue(store, args.name)
    rate = rig.board.rate_hz
    n = max(10, round(args.seconds * rate))
    with ExitStack() as stack:
        frames, where = _frames_for(args, rig, stack, Performance(args.seed).silence(60.0))
        if not args.json:
            print(f"Hands away from the antennas: measuring {args.seconds:g} s ({where}) ...")
        values = collect(frames, n)
    changes = {}
    channels = dict(venue.channels)
    for i, ch in enumerate(rig.channels):
        st = hold_stats(values[:, i], rate)
        if ch.name in channels:
            old = channels[ch.name]
            channels[ch.name] = old.model_copy(update={"baseline": st.mean, "noise": st.noise,
                                                       "baseline_stable": st.stable})
            changes[ch.name] = {"old": old.baseline, "new": st.mean,
                                "change_pct": 100.0 * (st.mean / old.baseline - 1.0)}
        elif ch.role == "reference":
            changes[ch.name] = {"old": venue.reference_base, "new": st.mean}
            venue = venue.model_copy(update={"reference_base": st.mean})
    from .calibrate import ChannelCalibration

    # model_copy skips validation: validate the new calibrations explicitly.
    channels = {k: ChannelCalibration.model_validate(v.model_dump()) for k, v in channels.items()}
    venue = venue.model_copy(update={"channels": channels})
    store.save_venue(name, venue)
    client = daemon_client(args, rig)
    if client is not None and store.active == name:
        reply = client.request({"op": "activate", "name": name})
        if not reply.get("ok"):
            raise ControlError(f"saved, but the daemon refused it: {reply.get('error')}")
    lines = [f"New hand-absent levels for {name}:"]
    for ch, c in changes.items():
        pct = f" ({c['change_pct']:+.3f} %)" if "change_pct" in c else ""
        lines.append(f"  {ch}: {c['old']:.6g} -> {c['new']:.6g}{pct}")
    emit(args, {"ok": True, "name": name, "changes": changes}, "\n".join(lines))
    return 0


class CaptureView:
    """The terminal side of a capture: prompts, a level meter and a hold progress bar."""

    def __init__(self, args: argparse.Namespace) -> None:
        self.quiet = bool(getattr(args, "json", False))

    def say(self, text: str) -> None:
        if not self.quiet:
            print(text, flush=True)

    def meter(self, rig: Any, phase: str, total: int | None = None) -> Any:
        if self.quiet or not sys.stdout.isatty():
            return None
        names = [c.name for c in rig.channels]
        first: dict[str, float] = {}

        def show(i: int, values: Sequence[int]) -> None:
            if i % 5 and i != total:
                return
            parts = []
            for n, v in zip(names, values):
                ref = first.setdefault(n, float(v) or 1.0)
                dev = (float(v) / ref - 1.0) * 1e4  # change since this phase began, 0.01 % units
                bar = "#" * min(20, int(abs(dev)))
                parts.append(f"{n} {v:>9} {bar:<20}")
            prog = ""
            if total:
                done = int(20 * i / total)
                prog = f" [{'=' * done}{' ' * (20 - done)}] {i}/{total}"
            sys.stdout.write(f"\r  {phase:6} " + " ".join(parts) + prog)
            sys.stdout.flush()
            if i == total:
                sys.stdout.write("\n")

        return show


# ------------------------------------------------------------------------------ table


def register(cli: Any) -> None:
    """Add the store and daemon commands to the parser."""

    def common(p: argparse.ArgumentParser, json_out: bool = True) -> None:
        p.add_argument("--home", help="profile store folder (default: $FIELDBRIDGE_HOME, "
                       "then the per-user data folder)")
        p.add_argument("--runtime", help="folder of the daemon's control socket")
        if json_out:
            p.add_argument("--json", action="store_true", help="machine-readable output")

    p = cli.add("run", "start the daemon: read the board, play the active venue profile",
                ["fieldbridge run", "fieldbridge run --venue tin-lantern --show",
                 "fieldbridge run --simulate --seconds 30 --show",
                 "fieldbridge run --replay friday-set --show"], cmd_run)
    common(p, json_out=False)
    p.add_argument("--venue", help="activate this venue profile first")
    p.add_argument("--service", action="store_true",
                   help="run as a system service (system profile folder as the fallback)")
    p.add_argument("--show", action="store_true", help="print a live line every second")
    p.add_argument("--seconds", type=float, help="stop after this long (default: run until stopped)")
    p.add_argument("--simulate", action="store_true",
                   help="read a simulated board (the rig's [sim] settings) on a pseudo-terminal")
    p.add_argument("--performance", default="warmup", help="simulated scenario (with --simulate)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--replay", metavar="RECORDING",
                   help="play a recording (fieldbridge tape) instead of reading the board")
    p.add_argument("--fast", action="store_true", help="with --replay: as fast as possible")
    p.add_argument("--loop", action="store_true", help="with --replay: start over at the end")

    p = cli.add("soundcheck", "capture a venue profile: guided holds, report, save, activate",
                ["fieldbridge soundcheck tin-lantern",
                 "fieldbridge soundcheck ferry-shed --mark-cm 25 --mark-cm 10",
                 "fieldbridge soundcheck demo-room --simulate --json"], cmd_soundcheck)
    common(p)
    p.add_argument("name", help="venue profile name (letters, digits, . _ -)")
    p.add_argument("--far-cm", type=float, default=50.0, help="far playing position (default 50)")
    p.add_argument("--near-cm", type=float, default=3.0, help="nearest position (default 3)")
    p.add_argument("--mark-cm", type=float, action="append", default=[],
                   help="an extra marked position in cm (repeat; one mark makes the fit exact)")
    p.add_argument("--hold", type=float, default=2.0, help="seconds per hold (default 2)")
    p.add_argument("--settle", type=float, default=0.5, help="seconds to settle before a hold")
    p.add_argument("--tries", type=int, default=3, help="attempts per hold before giving up")
    p.add_argument("--paced", action="store_true",
                   help="no Enter key: each step starts after a 1 s move (headless use)")
    p.add_argument("--simulate", action="store_true", help="a simulated performer and board")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--notes", default="", help="free text stored with the profile")
    p.add_argument("--no-activate", action="store_true", help="save without activating")

    p = cli.add("zero", "re-capture only the hand-absent baseline (hands away, 2 s)",
                ["fieldbridge zero", "fieldbridge zero saltmarsh-chapel --seconds 3"], cmd_zero)
    common(p)
    p.add_argument("name", nargs="?", help="venue profile (default: the active one)")
    p.add_argument("--seconds", type=float, default=2.0)
    p.add_argument("--simulate", action="store_true", help="a simulated board, nobody near")
    p.add_argument("--seed", type=int, default=0)

    p = cli.add("use", "make a venue profile active; a running daemon switches at once",
                ["fieldbridge use saltmarsh-chapel"], cmd_use)
    common(p)
    p.add_argument("name")

    p = cli.add("venues", "list venue profiles with date, quality and which is active",
                ["fieldbridge venues", "fieldbridge venues --json"], cmd_venues)
    common(p)

    p = cli.add("show", "show a venue profile in full with its resolution report",
                ["fieldbridge show", "fieldbridge show ferry-shed --json"], cmd_show)
    common(p)
    p.add_argument("name", nargs="?", help="default: the active profile")

    p = cli.add("compare", "compare two venue profiles field by field",
                ["fieldbridge compare tin-lantern ferry-shed"], cmd_compare)
    common(p)
    p.add_argument("a")
    p.add_argument("b")

    from . import tools

    tools.register(cli, common)
