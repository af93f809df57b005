"""The live daemon: startup, main loop, shutdown.

One thread does the work, in the order a frame flows::

    source.read() -> decoder.feed() -> engine.process() -> sink.send() for every sink

Everything else reaches that thread through flags and a queue, so no lock sits in the
frame path: signal handlers only set flags (SIGTERM/SIGINT stop, a second one forces the
exit; SIGHUP reloads), and control requests (status, activate, rebase, reload) wait in
a queue that the loop empties between frames. A profile switch therefore lands before the
next frame is processed, ends held notes first, and keeps the old profile when the new
one is invalid.

Safety: outputs are silenced (notes ended, levels to zero) on sensor loss, on a quiet
sensor, on a profile switch, when a sink raises, and on every way out. Levels ramp in
when playing starts or resumes (outputs/midi.py).
"""

from __future__ import annotations

import gc
import json
import logging
import queue
import signal
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

from .baseline import BaselineSettings
from .control import Activate, ControlServer, OscControl, Rebase, Reload, Status
from .errors import BridgeError
from .frames import FrameSettings, make_decoder
from .humfilter import MainsFilterSettings
from .mapping import note_name
from .notify import Notifier
from .outputs import Sink
from .pipeline import ChannelSettings, Engine, VoiceSettings
from .smoothing import SmoothingSettings
from .soundcheck import RigCalibration
from .sources import LinkState, SerialSource, SourceSettings, StateChange

log = logging.getLogger(__name__)

STOP_GRACE_S = 2.0


@dataclass
class Setup:
    """Everything the loop needs, resolved from the rig file and the active venue profile."""

    channels: list[ChannelSettings]
    voices: list[VoiceSettings]
    frames: FrameSettings
    source: SourceSettings
    rate_hz: float
    calibration: RigCalibration
    baseline: BaselineSettings = field(default_factory=BaselineSettings)
    smoothing: SmoothingSettings = field(default_factory=SmoothingSettings)
    profile: str = "(none)"
    mains_filter: MainsFilterSettings = field(default_factory=MainsFilterSettings)

    def engine(self) -> Engine:
        return Engine(
            self.channels,
            self.voices,
            self.calibration.channels,
            rate_hz=self.rate_hz,
            baseline=self.baseline,
            smoothing=self.smoothing,
            reference_base=self.calibration.reference_base,
            mains_filter=self.mains_filter,
        )


#: Turns a profile name (None: the active one / reload) into a Setup; raises BridgeError.
Loader = Callable[[str | None], Setup]


@dataclass
class Counters:
    frames: int = 0
    silences: int = 0
    sink_errors: int = 0
    switches: int = 0
    switch_frames: list[int] = field(default_factory=list)  # frames seen while switching


class Daemon:
    """Runs one rig until stopped. Build it, then call :meth:`run` (blocks)."""

    def __init__(
        self,
        setup: Setup,
        sinks: Sequence[Sink],
        *,
        loader: Loader | None = None,
        control_path: Any = None,
        osc_control: str | None = None,
        notifier: Notifier | None = None,
        on_second: Callable[[Daemon], None] | None = None,
        run_for_s: float | None = None,
        source_factory: Callable[[threading.Event, Callable[[StateChange], Any]], Any]
        | None = None,
    ) -> None:
        self.setup = setup
        self.sinks = list(sinks)
        self.loader = loader
        self.control_path = control_path
        self.osc_control_listen = osc_control
        self.osc_control: OscControl | None = None
        self.notifier = notifier or Notifier.from_env()
        self.on_second = on_second
        self.run_for_s = run_for_s
        #: Builds the byte source from (stop event, state callback); default: the rig's
        #: serial URL. A recording (bridge.recording.RecordingSource) fits the same slot.
        self.source_factory = source_factory
        self.counters = Counters()
        self.stop_event = threading.Event()
        self._reload = threading.Event()
        self._requests: queue.Queue[tuple[Any, queue.Queue[dict[str, Any]]]] = queue.Queue()
        self._signals = 0
        self.engine: Engine | None = None
        self.source: SerialSource | None = None
        self.control: ControlServer | None = None
        self._silent = True
        self._fps = 0.0
        self.started_at = 0.0
        self.first_frame_at: float | None = None

    # -- signals and requests (any thread) ------------------------------------------------

    def request_stop(self, *_: object) -> None:
        self._signals += 1
        if self._signals > 1:
            log.warning("second stop request: leaving now")
            self._silence_all("forced exit")
            raise SystemExit(130)
        self.stop_event.set()
        if self.source is not None:
            self.source.interrupt()

    def request_reload(self, *_: object) -> None:
        self._reload.set()

    def submit(self, req: Any, timeout: float = 5.0) -> dict[str, Any]:
        """Run a control request on the loop thread and wait for its reply."""
        if isinstance(req, Status):
            return {"ok": True, **self.status()}
        reply: queue.Queue[dict[str, Any]] = queue.Queue(maxsize=1)
        self._requests.put((req, reply))
        try:
            return reply.get(timeout=timeout)
        except queue.Empty:
            return {"ok": False, "error": "the daemon did not answer in time"}

    def install_signal_handlers(self) -> None:
        """Only from the main thread; kept out of the constructor on purpose."""
        signal.signal(signal.SIGTERM, self.request_stop)
        signal.signal(signal.SIGINT, self.request_stop)
        signal.signal(signal.SIGHUP, self.request_reload)

    # -- the three phases -----------------------------------------------------------------

    def run(self) -> Counters:
        self.startup()
        try:
            self.loop()
        finally:
            self.shutdown()
        return self.counters

    def startup(self) -> None:
        self.started_at = time.monotonic()
        self.engine = self.setup.engine()
        self.decoder = make_decoder(self.setup.frames, [c.name for c in self.setup.channels])
        for sink in self.sinks:
            sink.open()
        if self.source_factory is not None:
            self.source = self.source_factory(self.stop_event, self._on_link)
        else:
            self.source = SerialSource(
                self.setup.source, stop=self.stop_event, on_state=self._on_link,
                quiet_by="frames",
            )
        if self.control_path is not None:
            self.control = ControlServer(self.control_path, self.submit)
            self.control.start()
        if self.osc_control_listen:
            self.osc_control = OscControl(self.osc_control_listen, self.submit)
            self.osc_control.start()
        gc.collect()
        gc.freeze()  # start-up objects never need scanning again
        self.notifier.ready(self._status_text())
        log.info("playing profile %r from %s", self.setup.profile, self.setup.source.url)

    def loop(self) -> None:
        src, dec = self.source, self.decoder
        assert src is not None
        sinks = self.sinks
        gen = src.generation
        next_second = time.monotonic() + 1.0
        frames_at_second = 0
        deadline = None if self.run_for_s is None else time.monotonic() + self.run_for_s
        wait = min(0.05, self.setup.source.read_timeout_s)
        watch = self.control
        note_frame = getattr(src, "note_frame", lambda t: None)
        while not self.stop_event.is_set():
            data = src.read(wait)
            if src.generation != gen:
                gen = src.generation
                dec.reset()
            now = time.monotonic()
            if data:
                engine = self.engine
                assert engine is not None
                for frame in dec.feed(data):
                    note_frame(now)
                    if self.first_frame_at is None:
                        self.first_frame_at = now
                    reading = engine.process(frame.values, frame.seq, now)
                    self._silent = False
                    for sink in sinks:
                        try:
                            sink.send(reading)
                        except Exception:  # a failing output must not stop the others
                            self._sink_failed(sink)
                    if watch is not None and watch.watching:
                        watch.publish(reading.frame, self._line_maker(reading, frame))
                    self.counters.frames += 1
                    if not self._requests.empty():
                        self._serve_requests()  # a switch lands before the next frame
                        engine = self.engine
                        assert engine is not None
            if not self._requests.empty():
                self._serve_requests()
            if self._reload.is_set():
                self._reload.clear()
                self._switch(None, "reload")
            self.notifier.watchdog()
            if now >= next_second:
                self._fps = (self.counters.frames - frames_at_second) / (now - next_second + 1.0)
                frames_at_second = self.counters.frames
                next_second = now + 1.0
                self.notifier.status(self._status_text())
                if self.on_second is not None:
                    self.on_second(self)
            if deadline is not None and now >= deadline:
                break
            if getattr(src, "finished", False):  # a recording played to its end
                break

    def shutdown(self) -> None:
        t0 = time.monotonic()
        self.notifier.stopping()
        self._silence_all("shutdown")
        for sink in self.sinks:
            try:
                sink.close()
            except Exception:
                log.exception("closing %s failed", sink.kind)
        if self.control is not None:
            self.control.stop()
        if self.osc_control is not None:
            self.osc_control.stop()
        if self.source is not None:
            self.source.close()
        gc.unfreeze()
        log.info("stopped in %.0f ms after %d frames", (time.monotonic() - t0) * 1e3,
                 self.counters.frames)

    # -- helpers --------------------------------------------------------------------------

    def _on_link(self, change: StateChange) -> None:
        log.info("board %s -> %s (%s)", change.old.value, change.new.value, change.reason)
        if change.new in (LinkState.LOST, LinkState.QUIET, LinkState.STOPPED):
            self._silence_all(f"sensor {change.new.value}")

    def _silence_all(self, reason: str) -> None:
        if self._silent and reason not in ("shutdown", "forced exit"):
            return
        self._silent = True
        self.counters.silences += 1
        for sink in self.sinks:
            try:
                sink.silence(reason)
            except Exception:
                log.exception("silencing %s failed", sink.kind)

    def _sink_failed(self, sink: Sink) -> None:
        self.counters.sink_errors += 1
        log.exception("output %s failed; silencing it", sink.kind)
        try:
            sink.silence("output error")
        except Exception:
            log.exception("silencing %s failed too", sink.kind)

    def _serve_requests(self) -> None:
        while True:
            try:
                req, reply = self._requests.get_nowait()
            except queue.Empty:
                return
            try:
                if isinstance(req, Activate):
                    out = self._switch(req.name, "activate")
                elif isinstance(req, Reload):
                    out = self._switch(None, "reload")
                elif isinstance(req, Rebase):
                    assert self.engine is not None
                    self.engine.rebase()
                    out = {"ok": True, "baselines": self.engine.baselines}
                else:
                    out = {"ok": False, "error": f"unsupported request {req!r}"}
            except Exception as e:  # the loop must survive any request
                log.exception("control request failed")
                out = {"ok": False, "error": str(e)}
            reply.put(out)

    def _switch(self, name: str | None, why: str) -> dict[str, Any]:
        """Load and validate the new profile first; only then end notes and swap."""
        if self.loader is None:
            return {"ok": False, "error": "this daemon was started without a profile store"}
        frame_before = self.counters.frames
        self.notifier.reloading()
        try:
            setup = self.loader(name)
            engine = setup.engine()
            if [c.name for c in setup.channels] != [c.name for c in self.setup.channels]:
                raise BridgeError("the new profile names other channels: restart the daemon")
        except Exception as e:  # any failure keeps the old profile playing
            log.warning("%s refused, keeping profile %r: %s", why, self.setup.profile, e)
            self.notifier.ready(self._status_text())
            return {"ok": False, "error": str(e), "profile": self.setup.profile}
        self._silence_all(f"profile switch to {setup.profile!r}")
        self.setup, self.engine = setup, engine
        self.decoder = self.decoder  # same frame layout: keep the decoder's sync
        self.counters.switches += 1
        self.counters.switch_frames.append(self.counters.frames - frame_before)
        log.info("%s: now playing profile %r", why, setup.profile)
        self.notifier.ready(self._status_text())
        return {"ok": True, "profile": setup.profile, "frame": self.counters.frames}

    def _line_maker(self, reading: Any, frame: Any) -> Callable[[bool], bytes]:
        def make(raw: bool) -> bytes:
            if raw:
                obj: dict[str, Any] = {"frame": reading.frame, "seq": frame.seq,
                                       "raw": list(frame.values)}
            else:
                obj = reading.as_dict()
                obj["profile"] = self.setup.profile
            return json.dumps(obj).encode() + b"\n"

        return make

    def status(self) -> dict[str, Any]:
        eng = self.engine
        voices = [v.as_dict() for v in eng.reading.voices] if eng else []
        return {
            "profile": self.setup.profile,
            "frames": self.counters.frames,
            "frames_per_s": round(self._fps, 1),
            "link": self.source.state.value if self.source else "not started",
            "voices": voices,
            "decoder_drops": dict(getattr(self.decoder, "drops", {})),
            "silences": self.counters.silences,
            "switches": self.counters.switches,
            "sink_errors": self.counters.sink_errors,
        }

    def _status_text(self) -> str:
        eng = self.engine
        text = f"profile {self.setup.profile}, {self._fps:.0f} frames/s"
        if eng and eng.reading.voices:
            v = eng.reading.voices[0]
            text += f", {note_name(v.note)}, level {v.level:.2f}"
        return text

    def live_line(self) -> str:
        """One line for a terminal: frames/s, pitch and level of every voice, link state."""
        eng = self.engine
        parts = [f"{self._fps:6.0f} frames/s"]
        if eng:
            for v in eng.reading.voices:
                pitch = f"{note_name(v.note):>10} {v.hz:8.2f} Hz" if v.present else " " * 22
                parts.append(f"{v.name}: {pitch} level {v.level:4.2f}")
        parts.append(self.source.state.value if self.source else "")
        return "  ".join(parts)
