"""Where bytes come from: a serial URL that survives unplugging, and boards to test it with.

Cheat sheet::

    src = SerialSource(SourceSettings(url="/dev/serial/by-id/usb-...-if00"),
                       on_state=print)          # StateChange(old, new, generation, reason, t)
    gen = 0
    while running:
        data = src.read(0.05)                   # b"" = nothing arrived; src.state says why
        if src.generation != gen:               # the port was (re)opened: the board may
            gen = src.generation                # have reset, so resynchronise the decoder
            decoder.reset()
        for frame in decoder.feed(data):
            src.note_frame()                    # only needed with quiet_by="frames"
            ...
    src.close()

The link as a state machine (:class:`LinkState`)::

    connecting --bytes--> streaming --no data for quiet_after_s--> quiet --bytes--> streaming
        |                     |                                      |
        +-- open fails -------+------- read error / device gone ----+--> lost
    lost --(back-off 0.25 s, 0.5 s, 1 s ... 5 s; path resolved again)--> connecting
    any --interrupt() / close()--> stopped

Who decides "quiet": by default the source does, from bytes (no bytes at all for
``quiet_after_s``). A board sending garbage (wrong baud rate, a reset in progress) still
looks like streaming at the byte level, so a caller that decodes frames should build the
source with ``quiet_by="frames"`` and call :meth:`SerialSource.note_frame` for every valid
frame: then "streaming" means "valid frames are arriving" and the daemon can silence its
outputs on ``lost`` *and* ``quiet`` and resume on ``streaming`` with one rule.

Lessons from pyserial's issue tracker (see DOMAIN.md section 11) shape the code here: an
unplug surfaces as ``SerialException`` ("returned no data"), ``OSError`` or ``termios.error``
and ``is_open`` stays true, so every one of them means "lost"; an empty read after the
timeout is a quiet sensor, not an unplug; reads always block with a timeout (never 0);
opening resets many boards through DTR, so the caller must resynchronise after each open
(:attr:`SerialSource.generation`); device numbers change on replug, so the configured path
(ideally a ``/dev/serial/by-id`` link) is resolved again before every open; adapters that
buffer 16 ms need low-latency mode set again after every open.

:class:`PtyBoard` and :class:`SocketBoard` are real transports (a pseudo-terminal and a TCP
socket) that play a simulated board's bytes at a steady frame rate. They can be unplugged
and plugged back in, which is how the tests and the demo exercise the reconnect logic.
"""

from __future__ import annotations

import contextlib
import errno
import logging
import os
import socket
import termios
import threading
import time
import tty
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from enum import Enum
from typing import Any, Literal, NamedTuple, Protocol, TypeVar

import serial
from pydantic import BaseModel, ConfigDict, Field, model_validator

from bridge.errors import ConfigError, DeviceError

log = logging.getLogger(__name__)

#: What a read error looks like after an unplug (pyserial, the OS, the tty layer).
LINK_ERRORS: tuple[type[BaseException], ...] = (serial.SerialException, OSError, termios.error)

#: What opening can raise besides those (pyserial's ValueError for a bad setting).
_OPEN_ERRORS: tuple[type[BaseException], ...] = (ValueError, *LINK_ERRORS)

#: Setting low-latency mode: ValueError from pyserial, NotImplementedError off Linux.
_LOW_LATENCY_ERRORS: tuple[type[BaseException], ...] = (NotImplementedError, *_OPEN_ERRORS)

#: Longest chunk :meth:`SerialSource.read` returns; more stays in the OS buffer for next time.
MAX_CHUNK = 4096

#: Default wait of one read call, in seconds.
DEFAULT_WAIT_S = 0.05


class SourceSettings(BaseModel):
    """How to reach the board. Lives in the rig file under the source section."""

    model_config = ConfigDict(extra="forbid")

    url: str = Field(
        min_length=1,
        description="Anything pyserial's serial_for_url opens: /dev/ttyACM0, a "
        "/dev/serial/by-id/... link (preferred: stable across replugs), a pseudo-terminal, "
        "socket://host:port, loop://, hwgrep://VID:PID.",
    )
    baud: int = Field(default=115200, gt=0, description="Bits per second.")
    quiet_after_s: float = Field(
        default=0.5,
        gt=0,
        description="No data for this long while connected means the sensor is quiet.",
    )
    backoff_start_s: float = Field(default=0.25, gt=0, description="First wait before reopening.")
    backoff_max_s: float = Field(default=5.0, gt=0, description="Longest wait between reopens.")
    read_timeout_s: float = Field(
        default=0.05,
        gt=0,
        le=10.0,
        description="How long one blocking read waits for the first byte. Never 0: "
        "a zero timeout turns the read into a busy poll.",
    )
    low_latency: bool = Field(
        default=True, description="Ask the serial driver for low-latency mode after every open."
    )
    exclusive: bool = Field(default=True, description="Lock the port so a second reader fails.")

    @model_validator(mode="after")
    def _backoff_order(self) -> SourceSettings:
        if self.backoff_max_s < self.backoff_start_s:
            raise ValueError("backoff_max_s must be at least backoff_start_s")
        return self

    @property
    def is_device_path(self) -> bool:
        """True for a filesystem path (resolved again at each open), False for a URL."""
        return "://" not in self.url


class LinkState(str, Enum):
    """Where the link to the board stands. The values are what logs and status show."""

    CONNECTING = "connecting"  #: opening, or open and waiting for the first data
    STREAMING = "streaming"  #: data is arriving
    QUIET = "quiet"  #: open, but no data for quiet_after_s
    LOST = "lost"  #: open failed or the link broke; reopening after a back-off
    STOPPED = "stopped"  #: interrupted or closed; reads return b"" at once


class StateChange(NamedTuple):
    """One transition, as passed to the ``on_state`` callback."""

    old: LinkState
    new: LinkState
    generation: int
    reason: str
    t: float  #: time.monotonic() of the change


@dataclass
class SourceStats:
    """Counters a status display or a benchmark reads."""

    bytes_in: int = 0
    chunks: int = 0
    opens: int = 0
    reconnects: int = 0  #: successful opens after a loss
    open_failures: int = 0
    read_errors: int = 0
    vanished: int = 0  #: device node gone or link re-pointed while reads timed out
    quiet_spells: int = 0


class ByteSource(Protocol):
    """What the daemon needs from any source (serial link or recording)."""

    @property
    def state(self) -> LinkState: ...

    @property
    def generation(self) -> int: ...

    def read(self, max_wait: float | None = None) -> bytes: ...

    def interrupt(self) -> None: ...

    def close(self) -> None: ...


class Backoff:
    """Waits that double from ``start`` up to ``limit``; :attr:`history` keeps the last ones.

    Doubling with a cap is common practice for reconnect loops: quick retries catch a
    brief glitch, and a board that stays away costs one attempt every ``limit`` seconds.
    """

    def __init__(self, start: float, limit: float, factor: float = 2.0) -> None:
        self.start = start
        self.limit = limit
        self.factor = factor
        self._next = start
        self.history: deque[float] = deque(maxlen=64)

    def next(self) -> float:
        """The wait to use now; the following one is longer (up to the limit)."""
        delay = self._next
        self._next = min(delay * self.factor, self.limit)
        self.history.append(delay)
        return delay

    def reset(self) -> None:
        """Start again from the shortest wait (after the link carried data)."""
        self._next = self.start


class SerialSource:
    """A byte source on a pyserial URL that reconnects by itself until stopped.

    Nothing happens in the constructor; the first :meth:`read` opens the port. All reading,
    opening and state callbacks happen in the thread that calls :meth:`read`;
    :meth:`interrupt` may be called from any thread (or a signal handler) and makes a
    blocked read or back-off return promptly.
    """

    def __init__(
        self,
        settings: SourceSettings,
        *,
        stop: threading.Event | None = None,
        on_state: Callable[[StateChange], Any] | None = None,
        quiet_by: Literal["bytes", "frames"] = "bytes",
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.settings = settings
        self.stats = SourceStats()
        self.backoff = Backoff(settings.backoff_start_s, settings.backoff_max_s)
        self._stop = stop if stop is not None else threading.Event()
        self._on_state = on_state
        self._by_frames = quiet_by == "frames"
        self._clock = clock
        self._port: serial.SerialBase | None = None
        self._port_lock = threading.Lock()
        self._state = LinkState.CONNECTING
        self._generation = 0
        self._next_attempt = 0.0
        self._last_activity = 0.0
        self._opened_target: str | None = None
        self._held_error: BaseException | None = None

    # -- public surface -------------------------------------------------------------------

    @property
    def state(self) -> LinkState:
        return self._state

    @property
    def generation(self) -> int:
        """Counts successful opens. When it changes, reset the frame decoder."""
        return self._generation

    @property
    def port(self) -> serial.SerialBase | None:
        """The open pyserial object, or None while disconnected (for writes to the board)."""
        return self._port

    @property
    def device(self) -> str | None:
        """What the last open actually opened (a by-id link resolved to its device)."""
        return self._opened_target

    def read(self, max_wait: float | None = None) -> bytes:
        """Return the bytes that arrived, waiting up to about ``max_wait`` seconds for some.

        Returns as soon as any bytes are there, and at once when the link breaks.
        ``b""`` means nothing arrived: the sensor is quiet, the link is lost or being
        re-established, or the source was stopped; look at :attr:`state` to tell which.
        The wait is rounded up to the port's read timeout. Never raises for link trouble;
        raises :class:`~bridge.errors.ConfigError` for a URL pyserial cannot handle at all.
        """
        wait = DEFAULT_WAIT_S if max_wait is None else max_wait
        deadline = self._clock() + wait
        while not self._stop.is_set():
            port = self._port
            if port is None:
                if self._clock() >= self._next_attempt and self._open():
                    continue
                now = self._clock()
                if now >= deadline:
                    return b""
                self._stop.wait(max(0.0, min(deadline, self._next_attempt) - now))
                continue
            error = self._held_error
            try:
                if error is not None:  # bytes before the break went out with the last read
                    self._held_error = None
                    raise error
                data = port.read(1)
                if data:
                    data = self._drain(port, data)
            except LINK_ERRORS as exc:
                self.stats.read_errors += 1
                self._lose(f"read failed: {exc}")
                return b""  # give the caller control at once: the link just went away
            now = self._clock()
            if data:
                self.stats.bytes_in += len(data)
                self.stats.chunks += 1
                self.backoff.reset()
                if not self._by_frames:
                    self._activity(now, "data arriving")
                else:
                    self._check_quiet(now)
                return data
            if self._vanished():
                self.stats.vanished += 1
                self._lose("device vanished or its link now points elsewhere")
                return b""
            self._check_quiet(now)
            if now >= deadline:
                return b""
        self._shutdown("stopped")
        return b""

    def note_frame(self, t: float | None = None) -> None:
        """Tell the source a valid frame was decoded (drives quiet/streaming with
        ``quiet_by="frames"``; harmless otherwise)."""
        if self._port is not None:
            self._activity(self._clock() if t is None else t, "valid frames arriving")

    def interrupt(self) -> None:
        """Stop for good: wake a blocked read or back-off; the next read returns b""."""
        self._stop.set()
        with self._port_lock:
            port = self._port
            cancel = getattr(port, "cancel_read", None) if port is not None else None
            if cancel is not None and port is not None and port.is_open:
                try:
                    cancel()
                except LINK_ERRORS as exc:  # the port broke meanwhile; the reader copes
                    log.debug("cancel_read failed: %s", exc)

    def close(self) -> None:
        """Stop and release the port. Safe to call twice; call from the reading thread
        (or after it has finished)."""
        self._stop.set()
        self._shutdown("closed")

    def __enter__(self) -> SerialSource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- internals ------------------------------------------------------------------------

    def _drain(self, port: serial.SerialBase, data: bytes) -> bytes:
        # One byte has arrived; take whatever else is already buffered without waiting.
        # (For socket:// pyserial reports at most 1 waiting byte, so this loops per byte.)
        # A break found here is held for the next read, so the bytes before it still count.
        try:
            while len(data) < MAX_CHUNK:
                waiting: int = port.in_waiting  # type: ignore[attr-defined]
                if not waiting:
                    break
                data += port.read(min(waiting, MAX_CHUNK - len(data)))
        except LINK_ERRORS as exc:
            self._held_error = exc
        return data

    def _target(self) -> str:
        url = self.settings.url
        if self.settings.is_device_path:
            # A /dev/serial/by-id link points at whatever ttyUSBn/ttyACMn the board got
            # this time; resolve it now, not once at start-up.
            return os.path.realpath(os.path.expanduser(url))
        return url

    def _open(self) -> bool:
        target = self._target()
        s = self.settings
        try:
            port = serial.serial_for_url(
                target,
                baudrate=s.baud,
                timeout=s.read_timeout_s,
                exclusive=s.exclusive,
                do_not_open=True,
            )
        except ValueError as exc:  # unknown URL scheme or bad option: retrying cannot help
            raise ConfigError(f"source url {s.url!r} cannot be used: {exc}") from exc
        try:
            port.open()
            port.reset_input_buffer()  # bytes from before this open belong to nobody
        except _OPEN_ERRORS as exc:
            self._close_quietly(port)
            self.stats.open_failures += 1
            delay = self.backoff.next()
            self._next_attempt = self._clock() + delay
            reason = f"cannot open {target}: {exc}"
            if self._state is LinkState.LOST:
                log.debug("%s; next attempt in %.2f s", reason, delay)
            else:
                self._set_state(LinkState.LOST, reason)
            return False
        if s.low_latency:
            self._set_low_latency(port)
        with self._port_lock:
            self._port = port
        self._opened_target = target
        self._generation += 1
        self.stats.opens += 1
        if self._generation > 1:
            self.stats.reconnects += 1
        self._last_activity = self._clock()
        log.info("opened %s (generation %d)", target, self._generation)
        self._set_state(LinkState.CONNECTING, f"opened {target}")
        return True

    @staticmethod
    def _set_low_latency(port: serial.SerialBase) -> None:
        # Only real Linux serial drivers take it (pyserial's TIOCSSERIAL); ptys, sockets and
        # loop:// do not, and that is fine.
        setter = getattr(port, "set_low_latency_mode", None)
        if setter is None:
            return
        try:
            setter(True)
        except _LOW_LATENCY_ERRORS as exc:
            log.debug("low-latency mode not available on %s: %s", port.port, exc)

    def _vanished(self) -> bool:
        # Some drivers just stop delivering when unplugged; notice the node is gone or the
        # configured link now names another device. Only checked while reads time out.
        if not self.settings.is_device_path or self._opened_target is None:
            return False
        target = self._target()
        return target != self._opened_target or not os.path.exists(target)

    def _activity(self, now: float, reason: str) -> None:
        self._last_activity = now
        if self._state is not LinkState.STREAMING:
            self._set_state(LinkState.STREAMING, reason)

    def _check_quiet(self, now: float) -> None:
        if (
            self._state in (LinkState.CONNECTING, LinkState.STREAMING)
            and now - self._last_activity >= self.settings.quiet_after_s
        ):
            self.stats.quiet_spells += 1
            what = "valid frames" if self._by_frames else "data"
            self._set_state(LinkState.QUIET, f"no {what} for {self.settings.quiet_after_s:g} s")

    def _lose(self, reason: str) -> None:
        self._held_error = None
        with self._port_lock:
            port, self._port = self._port, None
        delay = self.backoff.next()
        # Report first, close after: outputs go silent at once, even where closing is slow
        # (pyserial's socket close waits 0.3 s).
        self._set_state(LinkState.LOST, f"{reason}; reopening in {delay:.2f} s")
        if port is not None:
            self._close_quietly(port)
        self._next_attempt = self._clock() + delay

    def _release(self) -> None:
        self._held_error = None
        with self._port_lock:
            port, self._port = self._port, None
        if port is not None:
            self._close_quietly(port)

    @staticmethod
    def _close_quietly(port: serial.SerialBase) -> None:
        try:
            port.close()
        except LINK_ERRORS as exc:  # closing a port whose device is gone may fail; it is gone
            log.debug("closing %s: %s", port.port, exc)

    def _shutdown(self, reason: str) -> None:
        self._release()
        self._set_state(LinkState.STOPPED, reason)

    def _set_state(self, new: LinkState, reason: str) -> None:
        old = self._state
        if new is old:
            return
        self._state = new
        level = logging.WARNING if new in (LinkState.LOST, LinkState.QUIET) else logging.INFO
        log.log(level, "source %s -> %s: %s", old.value, new.value, reason)
        if self._on_state is not None:
            self._on_state(StateChange(old, new, self._generation, reason, self._clock()))


# -- simulated boards on real transports ----------------------------------------------------

_Board = TypeVar("_Board", bound="_PacedBoard")


class _PacedBoard:
    """A thread that asks ``next_bytes()`` for one frame every ``period_s`` and sends it.

    Deadlines come from time.monotonic and advance by exactly one period, so the rate does
    not drift with the time spent producing and writing a frame. A board that falls more
    than ``_MAX_LAG`` periods behind (machine busy) starts a fresh schedule instead of
    sending a burst, as a real board would simply have sent them on time.
    """

    _MAX_LAG = 10

    def __init__(self, next_bytes: Callable[[], bytes], period_s: float) -> None:
        if period_s <= 0:
            raise ValueError("period_s must be positive")
        self.next_bytes = next_bytes
        self.period_s = period_s
        self.frames_sent = 0
        self.frames_dropped = 0
        self.error: BaseException | None = None
        self._lock = threading.Lock()
        self._halt = threading.Event()
        self._paused = False
        self._plugged = False
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        """Plug in and start sending."""
        if self._thread is not None:
            return
        with self._lock:
            self._plug()
            self._plugged = True
        self._halt.clear()
        self._thread = threading.Thread(target=self._run, name=type(self).__name__, daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Stop sending and unplug. Safe to call twice."""
        self._halt.set()
        if self._thread is not None:
            self._thread.join()
            self._thread = None
        self.unplug()

    def pause(self) -> None:
        """Stay plugged in but send nothing (a quiet sensor)."""
        self._paused = True

    def resume(self) -> None:
        self._paused = False

    def unplug(self) -> None:
        """Pull the cable: the reader's next read fails."""
        with self._lock:
            if self._plugged:
                self._plugged = False
                self._unplug()

    def replug(self) -> None:
        """Plug back in (a new connection, as after a real replug)."""
        with self._lock:
            if not self._plugged:
                self._plug()
                self._plugged = True

    def __enter__(self: _Board) -> _Board:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def _run(self) -> None:
        period = self.period_s
        deadline = time.monotonic()
        while True:
            deadline += period
            now = time.monotonic()
            if now - deadline > self._MAX_LAG * period:
                deadline = now
            if self._halt.wait(max(0.0, deadline - now)):
                return
            if self._paused or not self._plugged:
                continue
            try:
                data = self.next_bytes()
            except Exception as exc:  # a broken generator ends the board, visibly
                log.exception("board frame generator failed")
                self.error = exc
                return
            with self._lock:
                if self._plugged and self._send(data):
                    self.frames_sent += 1
                else:
                    self.frames_dropped += 1

    # Subclasses: called with self._lock held.
    def _plug(self) -> None:
        raise NotImplementedError

    def _unplug(self) -> None:
        raise NotImplementedError

    def _send(self, data: bytes) -> bool:
        raise NotImplementedError


def _repoint(link: str, target: str) -> None:
    """Make ``link`` a symlink to ``target`` atomically (a new link, then rename over)."""
    tmp = f"{link}.{os.getpid()}.{threading.get_ident()}.tmp"
    with contextlib.suppress(FileNotFoundError):
        os.unlink(tmp)
    os.symlink(target, tmp)
    os.replace(tmp, link)


class PtyBoard(_PacedBoard):
    """A simulated board behind a pseudo-terminal, opened by path like a USB serial device.

    ``path`` is what to give :class:`SerialSource`: the stable ``link_path`` if one was
    given (re-pointed at each replug, like a /dev/serial/by-id link), else the pty's own
    device name, which changes when the board is replugged.

    The pty is put in raw mode so bytes pass unchanged (no CR/LF translation, no echo, no
    signal characters). When nobody reads, the pty buffer fills and frames are dropped and
    counted, as a real UART with no listener loses them.
    """

    def __init__(
        self,
        next_bytes: Callable[[], bytes],
        period_s: float,
        *,
        link_path: str | os.PathLike[str] | None = None,
    ) -> None:
        super().__init__(next_bytes, period_s)
        self.link_path = os.fspath(link_path) if link_path is not None else None
        self.slave_path: str | None = None
        self._master = -1
        self._slave = -1

    @property
    def path(self) -> str:
        if self.link_path is not None:
            return self.link_path
        if self.slave_path is None:
            raise DeviceError("the simulated board has not been started")
        return self.slave_path

    def _plug(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(master, False)
        self._master, self._slave = master, slave
        # We keep our own slave descriptor open so the pty lives on while the reader
        # closes and reopens it; closing the master is what the reader sees as an unplug.
        self.slave_path = os.ttyname(slave)
        if self.link_path is not None:
            _repoint(self.link_path, self.slave_path)
        log.debug("board plugged in at %s", self.path)

    def _unplug(self) -> None:
        if self.link_path is not None:  # the system removes a by-id link on unplug
            with contextlib.suppress(FileNotFoundError):
                os.unlink(self.link_path)
        for fd in (self._master, self._slave):
            if fd >= 0:
                os.close(fd)
        self._master = self._slave = -1
        log.debug("board unplugged")

    def _send(self, data: bytes) -> bool:
        try:
            sent = os.write(self._master, data)
        except BlockingIOError:
            return False
        except OSError as exc:
            if exc.errno != errno.EIO:
                raise
            return False
        return sent == len(data)  # a partial write (full buffer) counts as a lost frame


class SocketBoard(_PacedBoard):
    """A simulated board behind a TCP server on 127.0.0.1, for ``socket://`` URLs.

    Every connected client gets every frame. :meth:`unplug` closes the server and all
    connections; :meth:`replug` listens again on the same port, so the same URL works.
    """

    def __init__(
        self,
        next_bytes: Callable[[], bytes],
        period_s: float,
        *,
        host: str = "127.0.0.1",
        port: int = 0,
    ) -> None:
        super().__init__(next_bytes, period_s)
        self.host = host
        self.port = port
        self._server: socket.socket | None = None
        self._clients: list[socket.socket] = []

    @property
    def url(self) -> str:
        if not self.port:
            raise DeviceError("the simulated board has not been started")
        return f"socket://{self.host}:{self.port}"

    @property
    def clients(self) -> int:
        return len(self._clients)

    def _plug(self) -> None:
        server = socket.create_server((self.host, self.port))  # SO_REUSEADDR on POSIX
        server.setblocking(False)
        self.port = server.getsockname()[1]
        self._server = server

    def _unplug(self) -> None:
        for sock in (*self._clients, self._server):
            if sock is not None:
                sock.close()
        self._clients.clear()
        self._server = None

    def _send(self, data: bytes) -> bool:
        self._accept()
        for client in list(self._clients):
            try:
                client.sendall(data)
            except OSError as exc:  # the reader went away or stopped reading
                log.debug("dropping client: %s", exc)
                client.close()
                self._clients.remove(client)
        return bool(self._clients)

    def _accept(self) -> None:
        assert self._server is not None
        while True:
            try:
                client, _ = self._server.accept()
            except BlockingIOError:
                return
            client.setblocking(True)
            client.settimeout(1.0)  # a reader that stops reading is dropped, not waited on
            self._clients.append(client)
