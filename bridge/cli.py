"""The ``fieldbridge`` command line. The only place errors become exit codes.

Exit codes (also in ``fieldbridge --help``):

    0  ok
    1  unexpected failure (a bug: please report it with the log)
    2  usage: a wrong option or argument
    3  bad file: a rig or venue file is missing, unreadable or invalid
    4  device: the board, MIDI system or network peer cannot be used
    5  calibration: the soundcheck could not produce a usable calibration
    6  control: no daemon is running, or it refused the request
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import textwrap
from collections.abc import Callable, Sequence
from typing import Any

from . import __version__
from .errors import BridgeError, CalibrationError, ConfigError, ControlError, DeviceError

log = logging.getLogger("bridge.cli")

EXIT_OK, EXIT_FAIL, EXIT_USAGE, EXIT_FILE, EXIT_DEVICE, EXIT_CALIBRATION, EXIT_CONTROL = range(7)
EXIT_CODES: list[tuple[type[BridgeError], int]] = [
    (ConfigError, EXIT_FILE),
    (DeviceError, EXIT_DEVICE),
    (CalibrationError, EXIT_CALIBRATION),
    (ControlError, EXIT_CONTROL),
]

EPILOG = """\
exit codes: 0 ok, 1 unexpected failure, 2 usage, 3 bad file, 4 device,
            5 calibration, 6 control (no daemon, or request refused)

Caution: a calibration error or a lost sensor can make a sudden loud tone. Keep the
synth and amplifier low the first time; fieldbridge starts muted, ramps levels in and
mutes when the board is lost. See docs/safety.md.
"""

SAFETY = """\
Before you play
  Hearing: a calibration error or a lost sensor can make a sudden loud tone. Turn the
  synth and the amplifier down before the first notes; fieldbridge starts muted, fades
  levels in, and mutes when the board goes quiet or is unplugged.
  Electricity: the antennas couple to your body and to ground. Power the board from a
  low-voltage isolated supply (a USB port of a battery-powered computer or an isolated
  adapter); never improvise connections to mains earth. Mains-powered stage equipment
  should be checked under your local electrical codes by a licensed electrician.
"""


def _examples(*lines: str) -> str:
    return "examples:\n" + "\n".join(f"  {line}" for line in lines)


Command = Callable[[argparse.Namespace], int]


class Cli:
    """Builds the parser from one table of sub-commands (name, help, examples, setup)."""

    def __init__(self) -> None:
        self.parser = argparse.ArgumentParser(
            prog="fieldbridge",
            description="Play a synthesizer with a contactless sensor board: serial counts in, "
            "calibrated MIDI and OSC out.",
            epilog=EPILOG,
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        self.parser.add_argument("--version", action="version", version=f"fieldbridge {__version__}")
        self.parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output")
        self.parser.add_argument("-q", "--quiet", action="store_true", help="warnings and errors only")
        self.sub = self.parser.add_subparsers(dest="command", metavar="COMMAND")

    def add(
        self, name: str, help: str, examples: Sequence[str], func: Command
    ) -> argparse.ArgumentParser:
        p = self.sub.add_parser(
            name,
            help=help,
            description=help,
            epilog=_examples(*examples) + "\n\n" + EPILOG,
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        p.set_defaults(func=func)
        return p


# ------------------------------------------------------------------------------ commands


def cmd_demo(args: argparse.Namespace) -> int:
    """Run the real daemon against the built-in simulated board on a pseudo-terminal."""
    from .calibrate import resolution_report
    from .daemon import Daemon
    from .demo import out_dir, start_demo_board
    from .outputs import make_sink
    from .outputs.midifile import MidiFileSettings
    from .outputs.osc import OscSettings

    print(SAFETY)
    print(f"Simulated soundcheck and board ({args.performance}, seed {args.seed}) ...")
    rig = start_demo_board(args.seed, args.performance)
    try:
        setup = rig.setup
        for name, cal in setup.calibration.channels.items():
            span = setup.voices[0].pitch.span_semitones if name == "pitch" else None
            rep = resolution_report(
                cal, window_s=rig.sim.window_s, pitch_span_semitones=span,
                clock_hz=rig.sim.clock_hz,
            )
            print(f"\n[{name}] " + str(rep))
        sinks = [
            make_sink("osc", OscSettings(destinations=[args.osc])),
            make_sink("midifile", MidiFileSettings(path=out_dir() / "demo.mid", program=73)),
        ]
        midi_note = _maybe_virtual_midi(sinks)
        print(f"\nBoard on pseudo-terminal {rig.board.slave_path} (stable link {rig.link})")
        print(f"OSC to {args.osc}; MIDI file {out_dir() / 'demo.mid'}; {midi_note}")
        print(f"Playing for {args.seconds:g} s (Ctrl-C stops) ...\n")
        daemon = Daemon(
            setup, sinks, run_for_s=args.seconds,
            on_second=lambda d: print(d.live_line(), flush=True),
        )
        daemon.install_signal_handlers()
        counters = daemon.run()
    finally:
        rig.board.stop()
    print()
    print(_summary(daemon, counters))
    return EXIT_OK


def _maybe_virtual_midi(sinks: list[Any]) -> str:
    """Add a virtual MIDI port when this machine has a MIDI system (ALSA or JACK)."""
    from .outputs import make_sink
    from .outputs.midi import MidiSettings
    from .outputs.midiports import open_ports

    import glob
    import os

    apis = ["alsa"] if os.path.exists("/dev/snd/seq") else []
    if glob.glob("/dev/shm/jack*") or os.environ.get("JACK_DEFAULT_SERVER"):
        apis.append("jack")  # only when a JACK server seems to run: no noisy failed attempt
    for api in apis:
        settings = MidiSettings(api=api, virtual=True, client_name="fieldbridge", port_name="demo")
        try:
            ports = open_ports(settings)
        except BridgeError as e:
            log.debug("no %s MIDI: %s", api, e)
            continue
        sinks.append(make_sink("midi", settings, ports=ports))
        return f"virtual MIDI port fieldbridge:demo ({api})"
    return "no MIDI system here (no ALSA sequencer, no JACK server): MIDI port skipped"


def _summary(daemon: Any, counters: Any) -> str:
    lines = [f"Summary: {counters.frames} frames, {counters.silences} silences, "
             f"{counters.sink_errors} output errors"]
    dec = getattr(daemon, "decoder", None)
    if dec is not None:
        drops = {k: v for k, v in dec.drops.items() if v}
        lines.append(f"  decoder: {dec.frames_ok} frames ok, drops {drops or 'none'}")
    for sink in daemon.sinks:
        if sink.kind == "osc":
            lines.append(f"  osc: {sink.datagrams} datagrams, send errors {sink.send_errors or 'none'}")
        else:
            lines.append(f"  {sink.kind}: {getattr(sink, 'counts', {}) or 'nothing sent'}")
    return "\n".join(lines)


# ------------------------------------------------------------------------------ entry


def build() -> Cli:
    cli = Cli()
    p = cli.add(
        "demo",
        "run the daemon on a built-in simulated board (no hardware needed)",
        ["fieldbridge demo", "fieldbridge demo --seconds 60 --performance comings-and-goings"],
        cmd_demo,
    )
    p.add_argument("--seconds", type=float, default=12.0, help="how long to play (default 12)")
    p.add_argument("--seed", type=int, default=7, help="simulator seed (default 7)")
    p.add_argument("--performance", default="warmup", help="scenario: warmup, soundcheck, "
                   "long-rest, comings-and-goings (default warmup)")
    p.add_argument("--osc", default="127.0.0.1:9000", help="OSC destination host:port")
    from . import commands

    commands.register(cli)
    return cli


def main(argv: Sequence[str] | None = None) -> int:
    cli = build()
    args = cli.parser.parse_args(argv)
    from .notify import configure_logging

    level = logging.WARNING if args.quiet else (logging.DEBUG if args.verbose > 1 else logging.INFO)
    configure_logging(level)
    if not getattr(args, "func", None):
        cli.parser.print_help()
        return EXIT_USAGE
    try:
        return int(args.func(args))
    except BridgeError as e:
        code = next((c for t, c in EXIT_CODES if isinstance(e, t)), EXIT_FAIL)
        if getattr(args, "json", False):
            print(json.dumps({"ok": False, "error": str(e), "exit": code}))
        else:
            print("fieldbridge: " + textwrap.fill(str(e), 100, subsequent_indent="  ",
                                                 break_on_hyphens=False, break_long_words=False),
                  file=sys.stderr)
        return code
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
