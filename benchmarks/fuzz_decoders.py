#!/usr/bin/env python3
"""Fuzz the frame decoders with random and damaged input, and measure their speed.

Each decoder gets a stream of three kinds of pieces in random order: valid frames (each
preceded by a delimiter, so the protocol guarantees they come out), random bytes, and
valid frames damaged by a random edit (a bit flip, a byte inserted, deleted or repeated,
a cut). The stream is fed in chunks of random size. The script checks that no call
raises, that every valid frame comes out in order, that every frame has the configured
number of values in range, and that ``frames_ok`` matches what came out. It prints one
``name: value unit`` line per figure and exits with status 1 if a check fails.

    python benchmarks/fuzz_decoders.py --chunks 200000 --seed 7

The chunk rate counts only the time spent inside ``feed``; making the input is not timed.
"""

from __future__ import annotations

import argparse
import logging
import random
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from bridge.frames import (
    DROP_REASONS,
    MAX_VALUE,
    BinaryDecoder,
    Frame,
    TextDecoder,
    encode_binary,
    encode_text,
)

CHANNELS = ["pitch", "volume", "ref"]
BATCH_PIECES = 2000


@dataclass
class Tally:
    chunks: int = 0
    bytes: int = 0
    feed_seconds: float = 0.0
    expected: int = 0
    recovered: int = 0
    extra: int = 0
    failures: list[str] = field(default_factory=list)


def damage(rng: random.Random, piece: bytes) -> bytes:
    """One random edit of a valid frame."""
    if not piece:
        return piece
    i = rng.randrange(len(piece))
    edit = rng.randrange(5)
    if edit == 0:
        return piece[:i] + bytes([piece[i] ^ (1 << rng.randrange(8))]) + piece[i + 1 :]
    if edit == 1:
        return piece[:i] + bytes([rng.randrange(256)]) + piece[i:]
    if edit == 2:
        return piece[:i] + piece[i + 1 :]
    if edit == 3:
        return piece[:i] + piece[i : i + 1] + piece[i:]
    return piece[:i]


def text_frame(rng: random.Random, seq: int) -> tuple[bytes, Frame]:
    values = [
        rng.choice((rng.randrange(1000, 60000), rng.randrange(MAX_VALUE + 1))) for _ in CHANNELS
    ]
    line = encode_text(
        values,
        seq=seq,
        names=CHANNELS if rng.random() < 0.3 else None,
        sep=rng.choice((" ", ",", ";", "\t", ", ")),
        newline=rng.choice(("\n", "\r\n")),
    )
    return line, Frame(seq, values)


def binary_frame(rng: random.Random, seq: int) -> tuple[bytes, Frame]:
    values = [
        rng.choice((rng.randrange(1000, 60000), rng.randrange(MAX_VALUE + 1))) for _ in CHANNELS
    ]
    return encode_binary(seq, values), Frame(seq % 65536, values)


def make_batch(
    rng: random.Random,
    make_frame: Callable[[random.Random, int], tuple[bytes, Frame]],
    delimiter: bytes,
    seq: int,
) -> tuple[bytes, list[Frame], int]:
    """A stream of pieces and the valid frames it must yield, in order."""
    parts: list[bytes] = []
    expected: list[Frame] = []
    for _ in range(BATCH_PIECES):
        kind = rng.random()
        if kind < 0.45:
            raw, frame = make_frame(rng, seq)
            parts.append(delimiter + raw)
            expected.append(frame)
        elif kind < 0.75:
            raw, _ = make_frame(rng, seq)
            parts.append(damage(rng, raw))
        else:
            parts.append(rng.randbytes(rng.randrange(1, 80)))
        seq += 1 if rng.random() < 0.9 else rng.randrange(2, 50)
    return b"".join(parts), expected, seq


def check_frames(got: list[Frame], expected: list[Frame], tally: Tally, where: str) -> None:
    want = 0
    for f in got:
        if len(f.values) != len(CHANNELS) or not all(0 <= v <= MAX_VALUE for v in f.values):
            tally.failures.append(f"{where}: frame out of range {f!r}")
        if want < len(expected) and f == expected[want]:
            want += 1
        else:
            tally.extra += 1
    tally.recovered += want
    tally.expected += len(expected)
    if want != len(expected):
        tally.failures.append(f"{where}: valid frame lost: {expected[want]!r}")


def run(
    name: str,
    decoder: TextDecoder | BinaryDecoder,
    make_frame: Callable[[random.Random, int], tuple[bytes, Frame]],
    delimiter: bytes,
    chunks: int,
    max_chunk: int,
    rng: random.Random,
) -> Tally:
    tally = Tally()
    seq = rng.randrange(65536)
    total_frames = 0
    batch_no = 0
    while tally.chunks < chunks and len(tally.failures) < 5:
        data, expected, seq = make_batch(rng, make_frame, delimiter, seq)
        # The last batch is fed whole, so the run may go a little past --chunks.
        pieces: list[bytes] = []
        at = 0
        while at < len(data):
            size = rng.randrange(0, max_chunk + 1)  # 0: an empty read
            pieces.append(data[at : at + size])
            at += size
        got: list[Frame] = []
        feed = decoder.feed
        start = time.perf_counter()
        try:
            for piece in pieces:
                got.extend(feed(piece))
        except Exception as exc:  # noqa: BLE001  # decoders promise never to raise: report it
            tally.failures.append(f"{name} batch {batch_no}: {type(exc).__name__}: {exc}")
            break
        tally.feed_seconds += time.perf_counter() - start
        tally.chunks += len(pieces)
        tally.bytes += sum(len(p) for p in pieces)
        total_frames += len(got)
        check_frames(got, expected, tally, f"{name} batch {batch_no}")
        batch_no += 1
    if decoder.frames_ok != total_frames:
        tally.failures.append(f"{name}: frames_ok {decoder.frames_ok} != {total_frames} delivered")
    return tally


def report(name: str, tally: Tally, decoder: TextDecoder | BinaryDecoder) -> None:
    secs = tally.feed_seconds or float("nan")
    print(f"{name}_chunks: {tally.chunks} chunks")
    print(f"{name}_chunk_rate: {tally.chunks / secs:.0f} chunks/s")
    print(f"{name}_byte_rate: {tally.bytes / secs / 1e6:.2f} MB/s")
    print(f"{name}_frame_rate: {decoder.frames_ok / secs:.0f} frames/s")
    print(f"{name}_frames_expected: {tally.expected} frames")
    print(f"{name}_frames_recovered: {tally.recovered} frames")
    # Damaged pieces can still be frames: a cut that removed only the delimiter, a digit
    # turned into another digit (text has no CRC), or a CRC that matches by chance.
    print(f"{name}_frames_from_damage: {tally.extra} frames")
    for reason in DROP_REASONS:
        print(f"{name}_drop_{reason}: {decoder.drops[reason]} frames")
    print(f"{name}_resyncs: {decoder.resyncs} count")
    if isinstance(decoder, TextDecoder):
        print(f"{name}_comments: {decoder.comments} lines")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--chunks", type=int, default=10_000_000, help="chunks fed to each decoder")
    parser.add_argument("--seed", type=int, default=1, help="random seed (the run is repeatable)")
    parser.add_argument("--max-chunk", type=int, default=64, help="largest chunk in bytes")
    args = parser.parse_args(argv)
    # The decoders warn once about a field-count or name mismatch; keep it off stdout.
    logging.basicConfig(level=logging.WARNING, format="%(name)s: %(message)s", stream=sys.stderr)
    rng = random.Random(args.seed)
    print(f"seed: {args.seed} seed")
    failures: list[str] = []
    for name, decoder, make_frame, delim in (
        ("text", TextDecoder(CHANNELS, leading_seq=True, max_line=128), text_frame, b"\n"),
        ("binary", BinaryDecoder(len(CHANNELS)), binary_frame, b"\x00"),
    ):
        tally = run(name, decoder, make_frame, delim, args.chunks, args.max_chunk, rng)
        report(name, tally, decoder)
        failures += tally.failures
    print(f"failures: {len(failures)} count")
    for line in failures:
        print(f"FAIL {line}", file=sys.stderr)
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
