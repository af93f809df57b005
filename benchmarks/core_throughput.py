#!/usr/bin/env python3
"""How many frames a second the core can carry on one core: bytes in, MIDI bytes out.

The input is what a board sends: two-channel text frames (pitch and volume periods from
the simulator's period-timing board at 1000 frames a second, a performer gliding,
wandering, playing vibrato and leaving), encoded once before timing. The timed loops:

``full``    TextDecoder.feed, Engine.process (reference, baseline, c, calibration,
            smoothing, mapping) and MidiSink.send turning each Reading into raw MIDI
            bytes, sent to a port whose ``send`` does nothing (so no MIDI system is
            measured, only our work)
``decode``  TextDecoder.feed only, in the same run (the floor every path pays)
``engine``  Engine.process alone, over frames decoded beforehand
``midi``    MidiSink.send alone, over the engine's readings replayed

Two ways of feeding bytes: one frame per ``feed`` call (what a serial read returns at
1000 frames a second when the loop keeps up, the per-call costs included; the goal
figure) and 4096-byte chunks cut anywhere (a loop catching up after a stall). Each loop
runs ``--repeats`` times on fresh objects and the fastest run counts (least disturbed by
other load on a shared machine). One Python thread: one core.

    python benchmarks/core_throughput.py                  # 200,000 frames
    python benchmarks/core_throughput.py --quick          # 20,000 frames
    python benchmarks/core_throughput.py --profile        # also cProfile the full path

Goal (issue "Foundation and signal core"): the full path at 100,000 frames/s or more.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import logging
import pstats
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from common import Rig, best_time, figure, header, make_engine, make_rig, note

from bridge.frames import TextDecoder, encode_text
from bridge.outputs.midi import MidiSettings, MidiSink
from bridge.sim import Performance, SimBoard

GOAL_FPS = 100_000.0
CHUNK_BYTES = 4096


class NullPort:
    """A MIDI port that accepts bytes and does nothing with them (no MIDI system measured)."""

    name = "null"

    def send(self, data: bytes) -> None:
        pass

    def close(self) -> None:
        pass


def performance(seed: int = 11) -> Performance:
    """About 30 s of playing, looped: every part of the pipeline gets exercised."""
    p = Performance(seed, loop=True, tremor_m=0.0003)
    p.silence(1.0).glide(0.6, pitch=0.3, volume=0.25).wander(8.0)
    p.vibrato(3.0, rate_hz=5.8).steps(0.4, [0.2, 0.12, 0.08, 0.15, 0.25])
    p.leave(1.5, "volume").glide(0.5, volume=0.2).wander(6.0).leave(2.0)
    return p.silence(1.0)


def make_input(rig: Rig, n_frames: int) -> tuple[list[bytes], list[bytes]]:
    """The frames as the board's bytes: one line per item, and the same cut in 4 kB chunks."""
    board = SimBoard(rig.sim.model_copy(update={"seed": 500}), performance())
    values, _ = board.run(n_frames)  # the performance loops for as long as needed
    lines = [encode_text(row) for row in values.tolist()]
    blob = b"".join(lines)
    chunks = [blob[i : i + CHUNK_BYTES] for i in range(0, len(blob), CHUNK_BYTES)]
    return lines, chunks


def decode_only(rig: Rig, pieces: Sequence[bytes]) -> Callable[[], int]:
    names = [c.name for c in rig.channels]

    def run() -> int:
        dec = TextDecoder(names, synced=True)
        feed = dec.feed
        n = 0
        for piece in pieces:
            n += len(feed(piece))
        return n

    return run


def engine_only(rig: Rig, frames: Sequence[list[int]]) -> Callable[[], int]:
    """Engine.process over frames decoded beforehand: the pipeline's own cost."""
    dt = 1.0 / rig.rate_hz

    def run() -> int:
        process = make_engine(rig).process
        t = 0.0
        for values in frames:
            t += dt
            process(values, None, t)
        return len(frames)

    return run


def midi_only(rig: Rig, frames: Sequence[list[int]]) -> Callable[[], int]:
    """MidiSink.send over the readings an engine produced beforehand: the output's own cost.

    The voice's figures are replayed into the engine's own (reused) Reading, as the engine
    would have left them, so the sink sees exactly what the full path gives it.
    """
    engine = make_engine(rig)
    dt = 1.0 / rig.rate_hz
    rows = []
    t = 0.0
    for values in frames:
        t += dt
        v = engine.process(values, None, t).voices[0]
        rows.append((t, v.note, v.level, v.present))
    reading = engine.reading
    voice = reading.voices[0]

    def run() -> int:
        sink = MidiSink(MidiSettings(), ports=[NullPort()], voices=len(rig.voices))
        sink.open()
        send = sink.send
        for t, note_, level, present in rows:
            reading.t = t
            voice.note, voice.level, voice.present = note_, level, present
            send(reading)
        sink.close()
        return len(rows)

    return run


def full(
    rig: Rig, pieces: Sequence[bytes], counts: dict[str, int] | None = None
) -> Callable[[], int]:
    names = [c.name for c in rig.channels]
    dt = 1.0 / rig.rate_hz

    def run() -> int:
        dec = TextDecoder(names, synced=True)
        feed = dec.feed
        engine = make_engine(rig)
        process = engine.process
        sink = MidiSink(MidiSettings(), ports=[NullPort()], voices=len(rig.voices))
        sink.open()
        send = sink.send
        t = 0.0
        for piece in pieces:
            for fr in feed(piece):
                t += dt
                send(process(fr.values, fr.seq, t))
        sink.close()
        if counts is not None:
            counts.clear()
            counts.update(sink.counts)
        return dec.frames_ok

    return run


def profile_full(rig: Rig, pieces: Sequence[bytes], top: int = 25) -> None:
    """cProfile one run of the full path; print the top functions by own time as comments."""
    prof = cProfile.Profile()
    run = full(rig, pieces)
    prof.enable()
    run()
    prof.disable()
    buf = io.StringIO()
    st = pstats.Stats(prof, stream=buf)
    st.sort_stats("tottime").print_stats(top)
    note(f"cProfile of the full path, one frame per feed, top {top} by own time:")
    for line in buf.getvalue().splitlines():
        if line.strip():
            print(f"#   {line}")


def run(n_frames: int = 200_000, repeats: int = 5, profile: bool = False) -> None:
    header("core throughput")
    t0 = time.perf_counter()
    rig = make_rig("period", 0.001)
    lines, chunks = make_input(rig, n_frames)
    note(
        f"{len(lines)} two-channel text frames ({sum(map(len, lines)) / len(lines):.1f} bytes "
        f"each), period board at 1000 frames/s; set-up {time.perf_counter() - t0:.1f} s"
    )
    frames = [
        fr.values
        for fr in TextDecoder([c.name for c in rig.channels], synced=True).feed(b"".join(lines))
    ]
    if len(frames) != len(lines):  # the input itself would be wrong: no figure means anything
        raise RuntimeError(f"the decoder returned {len(frames)} of {len(lines)} frames")
    n = len(frames)
    counts: dict[str, int] = {}
    t_full = best_time(full(rig, lines, counts), repeats)
    t_dec = best_time(decode_only(rig, lines), repeats)
    figure("throughput_full", n / t_full, "frames/s", goal=f">= {GOAL_FPS:.0f}")
    figure("throughput_decode_only", n / t_dec, "frames/s")
    figure("throughput_full_over_decode", t_dec / t_full, "ratio")
    t_eng = best_time(engine_only(rig, frames), repeats)
    t_midi = best_time(midi_only(rig, frames), repeats)
    figure("time_full", t_full / n * 1e6, "us/frame")
    figure("time_decode", t_dec / n * 1e6, "us/frame")
    figure("time_engine", t_eng / n * 1e6, "us/frame")
    figure("time_midi", t_midi / n * 1e6, "us/frame")
    figure("midi_messages_per_frame", sum(counts.values()) / n, "messages/frame")
    t_full_c = best_time(full(rig, chunks), repeats)
    t_dec_c = best_time(decode_only(rig, chunks), repeats)
    figure("throughput_full_chunked", n / t_full_c, "frames/s")
    figure("throughput_decode_only_chunked", n / t_dec_c, "frames/s")
    figure("throughput_full_over_decode_chunked", t_dec_c / t_full_c, "ratio")
    if profile:
        profile_full(rig, lines)


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="20,000 frames, one repeat")
    ap.add_argument("--frames", type=int, default=200_000)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--profile", action="store_true", help="cProfile the full path")
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING)
    if args.quick:
        run(20_000, 1, args.profile)
    else:
        run(args.frames, args.repeats, args.profile)
    return 0


if __name__ == "__main__":
    sys.exit(main())
