"""The ``watch`` (live meters) and ``tape`` (record raw frames) commands.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import os
import sys
import threading
import time
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

from .commands import (
    daemon_client,
    emit,
    local_frames,
    setup_for,
    simulated_board,
    store_for,
)
from .errors import DeviceError

from .tools import NO_DATA_S, RECORDINGS_DIR, END_OF_FEED, Feed, require_device, sigterm_as_interrupt, recording_path, split_note

log = logging.getLogger(__name__)

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
    require_device(rig)
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
    with contextlib.ExitStack() as stack, sigterm_as_interrupt():
        items, where = _watch_source(args, store, rig, every, stack, stop)
        feed = Feed(items, stop, "watch-feed").start()
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
                if item is END_OF_FEED:
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
    require_device(rig)
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
    with contextlib.ExitStack() as stack, sigterm_as_interrupt():
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
        feed = Feed(chunks, stop, "tape-feed").start()
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
                if item is END_OF_FEED:
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
