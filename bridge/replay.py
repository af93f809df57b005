"""The ``replay`` (a recording through a venue profile, offline) and ``plot`` commands.
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import socket
import time
from array import array
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .commands import (
    emit,
    named_venue,
    setup_for,
    store_for,
)
from .errors import ConfigError
from .tools import (
    note_ticks,
    pyplot_figure,
    recording_path,
    recordings_listing,
    save_figure,
    sigterm_as_interrupt,
    split_note,
)

log = logging.getLogger(__name__)

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

    fig, axes = pyplot_figure(2, 1, (11.0, 6.5), sharex=True,
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
        note_ticks(ax_pitch, lo - pad, hi + pad)
    ax_pitch.set_ylabel("pitch (note name, MIDI number)")
    ax_pitch.grid(True, alpha=0.3)
    ax_pitch.legend(loc="upper right")
    ax_level.set_ylim(-0.02, 1.02)
    ax_level.set_ylabel("level (linear gain 0..1)")
    ax_level.set_xlabel("time in the recording (s)")
    ax_level.grid(True, alpha=0.3)
    ax_level.legend(loc="upper right")
    fig.suptitle(title)
    save_figure(fig, out)


def cmd_replay(args: argparse.Namespace) -> int:
    store = store_for(args)
    rig = store.load_rig()
    path = recording_path(store, args.file)
    if not path.exists():
        raise ConfigError(f"{path}: no such recording (recordings in {path.parent}: "
                          f"{recordings_listing(path)}); a file in this folder is ./NAME")
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
    with sigterm_as_interrupt():
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
    fig, axes = pyplot_figure(len(chans), 2, (12.0, 4.2 * len(chans)))
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
    save_figure(fig, out)


def cmd_plot(args: argparse.Namespace) -> int:
    from .profiles import apply_venue

    store = store_for(args)
    rig = store.load_rig()
    name, venue = named_venue(store, args.name)
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
