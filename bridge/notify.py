"""Talking to the service manager, and logging that suits it.

When fieldbridge runs as a service (``Type=notify`` in service/fieldbridge.service) the
service manager hands it the address of a datagram socket in the ``NOTIFY_SOCKET``
environment variable. The daemon reports its state by sending short text datagrams of
``KEY=VALUE`` lines to that socket (the protocol described in the sd_notify(3) manual):

    READY=1                      start-up finished; the manager marks the unit "active"
    STATUS=...                   one line of free text shown by ``systemctl status``
    WATCHDOG=1                   "still alive"; missing pings for WatchdogSec restart us
    RELOADING=1 + MONOTONIC_USEC re-reading configuration; READY=1 again when done
    STOPPING=1                   shutdown has begun

Nothing here needs a library: a Unix datagram socket from the standard library does it.
Outside a service (``NOTIFY_SOCKET`` unset) every call is a cheap no-op, so the daemon
calls the same methods whether it runs under the service manager, in a terminal or in a
test. No method raises: a failed notification is logged at debug level and forgotten,
because losing a status line must never stop the music.

Typical use in a main loop::

    notifier = Notifier.from_env()
    ...start-up...
    notifier.ready("playing venue 'harbour-hall'")
    while running:
        ...one frame...
        notifier.watchdog()          # rate-limited: cheap to call every frame
    notifier.stopping()

``configure_logging`` sets up the process's log output: timestamps on a terminal, none
under the journal (it stamps each line itself, and reads a ``<N>`` priority prefix), and a
filter that lets a repeated warning through at most once per interval with a count of
what it held back, so a flapping cable cannot flood an SD card with identical lines.
"""

from __future__ import annotations

import logging
import os
import socket
import sys
import threading
import time
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING, TextIO

if TYPE_CHECKING:
    from typing_extensions import Self

logger = logging.getLogger(__name__)

__all__ = [
    "Notifier",
    "RepeatFilter",
    "configure_logging",
    "running_under_journal",
    "watchdog_interval",
]

# How long a notification may block when the manager's queue is full. Normally a send
# returns at once; the limit only matters if the manager is stuck, and then a dropped
# ping is better than a stalled frame loop.
_SEND_TIMEOUT_S = 0.25


def watchdog_interval(env: Mapping[str, str] | None = None) -> float | None:
    """Return the service watchdog timeout in seconds, or None when no watchdog is armed.

    The manager sets ``WATCHDOG_USEC`` (microseconds) when the unit has ``WatchdogSec=``,
    and ``WATCHDOG_PID`` to the process it expects pings from; if that is another
    process (we were started by a wrapper, or inherited the environment), the watchdog
    is not ours and this returns None, as sd_watchdog_enabled(3) specifies.
    """
    env = os.environ if env is None else env
    raw = env.get("WATCHDOG_USEC")
    if not raw:
        return None
    try:
        usec = int(raw)
    except ValueError:
        logger.debug("ignoring unparseable WATCHDOG_USEC=%r", raw)
        return None
    if usec <= 0:
        return None
    pid_raw = env.get("WATCHDOG_PID")
    if pid_raw:
        try:
            if int(pid_raw) != os.getpid():
                return None
        except ValueError:
            logger.debug("ignoring unparseable WATCHDOG_PID=%r", pid_raw)
            return None
    return usec / 1_000_000.0


def _socket_address(value: str | None) -> str | bytes | None:
    """Turn a NOTIFY_SOCKET value into an address for ``socket.sendto``.

    A leading '@' names a socket in Linux's abstract namespace, which the kernel spells
    with a leading NUL byte instead. Other schemes (newer managers may pass "vsock:...")
    are not supported here and disable notifications.
    """
    if not value:
        return None
    if value.startswith("@"):
        return b"\0" + value[1:].encode()
    if value.startswith("/"):
        return value
    logger.debug("unsupported NOTIFY_SOCKET address %r; notifications disabled", value)
    return None


class Notifier:
    """Sends service-manager notifications; every method is a no-op without a socket.

    Build it with :meth:`from_env` (reads ``NOTIFY_SOCKET`` and ``WATCHDOG_USEC``) or
    directly with an address for tests. The socket is opened on the first send, not in
    the constructor. Methods return True when a datagram went out, False otherwise
    (disabled, rate-limited, or failed), so callers may ignore the result.
    """

    def __init__(
        self,
        address: str | None,
        *,
        watchdog_s: float | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self._address = _socket_address(address)
        self._watchdog_s = watchdog_s
        # Ping at half the timeout, as sd_watchdog_enabled(3) recommends, so one late
        # frame never costs a restart.
        self._ping_every = None if watchdog_s is None else watchdog_s / 2.0
        self._clock = clock
        self._last_ping: float | None = None
        self._sock: socket.socket | None = None
        self._lock = threading.Lock()

    @classmethod
    def from_env(
        cls,
        env: Mapping[str, str] | None = None,
        *,
        clock: Callable[[], float] = time.monotonic,
    ) -> Notifier:
        """A notifier for the service manager that started this process (if any)."""
        env = os.environ if env is None else env
        return cls(env.get("NOTIFY_SOCKET"), watchdog_s=watchdog_interval(env), clock=clock)

    @property
    def enabled(self) -> bool:
        """True when there is a manager to talk to."""
        return self._address is not None

    @property
    def watchdog_s(self) -> float | None:
        """The manager's watchdog timeout in seconds, or None when it is not watching."""
        return self._watchdog_s

    def notify(self, *lines: str) -> bool:
        """Send one datagram made of ``KEY=VALUE`` lines. Never raises."""
        if self._address is None:
            return False
        payload = "\n".join(lines).encode("utf-8", "replace")
        try:
            with self._lock:
                if self._sock is None:
                    # Not inherited by child processes (PEP 446: sockets are created
                    # non-inheritable), so a helper we start cannot notify as us.
                    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
                    sock.settimeout(_SEND_TIMEOUT_S)
                    self._sock = sock
                self._sock.sendto(payload, self._address)
        except (OSError, ValueError) as exc:  # incl. timeouts; the manager may be gone
            logger.debug("service notification %r not sent: %s", lines[:1], exc)
            return False
        return True

    def ready(self, status: str | None = None) -> bool:
        """Start-up (or a reload) is complete. Optionally set the status line too."""
        if status is None:
            return self.notify("READY=1")
        return self.notify("READY=1", "STATUS=" + _one_line(status))

    def status(self, text: str) -> bool:
        """Set the one-line status shown by ``systemctl status``."""
        return self.notify("STATUS=" + _one_line(text))

    def watchdog(self, *, force: bool = False) -> bool:
        """Tell the watchdog we are alive, at most once per half timeout.

        Call it from the loop that does the real work (not from a helper thread), so a
        hung loop really does stop the pings. Does nothing when no watchdog is armed.
        """
        if self._address is None or self._ping_every is None:
            return False
        now = self._clock()
        if not force and self._last_ping is not None and now - self._last_ping < self._ping_every:
            return False
        if self.notify("WATCHDOG=1"):
            self._last_ping = now
            return True
        return False

    def reloading(self) -> bool:
        """A reload has begun; send :meth:`ready` when it is finished.

        ``MONOTONIC_USEC`` carries the CLOCK_MONOTONIC time of the request, which newer
        managers use to match the reload with its completion (systemd 253 and later).
        """
        if self._address is None:
            return False
        usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        return self.notify("RELOADING=1", f"MONOTONIC_USEC={usec}")

    def stopping(self) -> bool:
        """Shutdown has begun (the manager then stops expecting watchdog pings)."""
        return self.notify("STOPPING=1")

    def close(self) -> None:
        """Release the socket. Safe to call twice; a later send reopens it."""
        with self._lock:
            if self._sock is not None:
                self._sock.close()
                self._sock = None

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _one_line(text: str) -> str:
    # A newline would start a new KEY=VALUE assignment inside the datagram.
    return " ".join(text.splitlines())


# --------------------------------------------------------------------------- logging

# Syslog priorities (RFC 5424 section 6.2.1), which the journal reads from a "<N>" prefix
# on each line written to a service's stderr (sd-daemon(3)).
_SYSLOG_PRIORITY = (
    (logging.CRITICAL, 2),
    (logging.ERROR, 3),
    (logging.WARNING, 4),
    (logging.INFO, 6),
)


def _priority(levelno: int) -> int:
    for threshold, prio in _SYSLOG_PRIORITY:
        if levelno >= threshold:
            return prio
    return 7  # debug


class _JournalFormatter(logging.Formatter):
    """No timestamp (the journal adds its own), a priority prefix the journal parses."""

    def format(self, record: logging.LogRecord) -> str:
        return f"<{_priority(record.levelno)}>" + super().format(record)


class RepeatFilter(logging.Filter):
    """Lets a repeated warning through at most once per ``interval_s``.

    Two records repeat each other when they come from the same logger at the same level
    with the same message template (the format string before its arguments are filled
    in), so "sensor lost on %s" floods are caught even when the argument differs. A
    caller can choose the key itself with ``extra={"repeat_key": ...}``. When a key is
    let through again after holding some back, the message says how many were held back.
    Records below ``min_level`` always pass.
    """

    def __init__(
        self,
        interval_s: float = 10.0,
        *,
        min_level: int = logging.WARNING,
        clock: Callable[[], float] = time.monotonic,
        max_keys: int = 512,
    ) -> None:
        super().__init__()
        self.interval_s = interval_s
        self.min_level = min_level
        self._clock = clock
        self._max_keys = max_keys
        # key -> [time last let through, number held back since]
        self._seen: dict[object, list[float]] = {}
        self._lock = threading.Lock()

    def filter(self, record: logging.LogRecord) -> bool:
        if record.levelno < self.min_level:
            return True
        key = getattr(record, "repeat_key", None)
        if key is None:
            key = (record.name, record.levelno, str(record.msg))
        now = self._clock()
        with self._lock:
            entry = self._seen.get(key)
            if entry is not None and now - entry[0] < self.interval_s:
                entry[1] += 1
                return False
            held = 0 if entry is None else int(entry[1])
            if entry is None and len(self._seen) >= self._max_keys:
                self._forget_old(now)
            self._seen[key] = [now, 0]
        if held:
            # Appended to the template so %-style arguments still apply; the note itself
            # must not contain a bare '%'.
            record.msg = (
                f"{record.msg} (repeated {held} more time{'s' if held != 1 else ''} "
                f"in the last {self.interval_s:g} s, not shown)"
            )
        return True

    def _forget_old(self, now: float) -> None:
        stale = [k for k, (t, _) in self._seen.items() if now - t >= self.interval_s]
        for k in stale:
            del self._seen[k]
        if len(self._seen) >= self._max_keys:  # all recent: drop the oldest half
            for k in sorted(self._seen, key=lambda k: self._seen[k][0])[: self._max_keys // 2]:
                del self._seen[k]


def running_under_journal(
    stream: TextIO | None = None, env: Mapping[str, str] | None = None
) -> bool:
    """True when ``stream`` (default stderr) is connected to the journal.

    The manager sets ``JOURNAL_STREAM=<device>:<inode>`` for a service whose output goes to
    the journal. Comparing it with the stream's own device and inode (as
    systemd.exec(5) advises) avoids a false yes in a child process whose output was
    redirected to a file or terminal while it inherited the variable.
    """
    env = os.environ if env is None else env
    value = env.get("JOURNAL_STREAM")
    if not value:
        return False
    stream = sys.stderr if stream is None else stream
    try:
        dev_s, ino_s = value.split(":", 1)
        st = os.fstat(stream.fileno())
        return st.st_dev == int(dev_s) and st.st_ino == int(ino_s)
    except (ValueError, OSError, AttributeError):
        return False


_HANDLER_MARK = "_fieldbridge_handler"
_LEVEL_NAMES = {
    "debug": logging.DEBUG,
    "info": logging.INFO,
    "warning": logging.WARNING,
    "error": logging.ERROR,
    "critical": logging.CRITICAL,
}


def configure_logging(
    level: int | str = logging.INFO,
    *,
    journald: bool | None = None,
    stream: TextIO | None = None,
    repeat_interval_s: float = 10.0,
) -> logging.Handler:
    """Configure the process's log output. Call once from the command line entry point.

    - ``level``: a logging level or its name ("debug", "INFO", ...).
    - ``journald``: True for journal style (no timestamp, ``<N>`` priority prefix), False
      for terminal style, None to detect it from ``JOURNAL_STREAM``.
    - ``stream``: where to write (default stderr, unbuffered under the service unit).
    - ``repeat_interval_s``: repeated warnings pass at most once per this many seconds.

    Calling it again replaces the handler it installed before instead of adding one.
    Returns the installed handler.
    """
    if isinstance(level, str):
        try:
            level = _LEVEL_NAMES[level.lower()]
        except KeyError:
            raise ValueError(
                f"unknown log level {level!r}; use debug, info, warning or error"
            ) from None
    stream = sys.stderr if stream is None else stream
    if journald is None:
        journald = running_under_journal(stream)

    handler = logging.StreamHandler(stream)
    setattr(handler, _HANDLER_MARK, True)
    if journald:
        handler.setFormatter(_JournalFormatter("%(name)s: %(message)s"))
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)-7s %(name)s: %(message)s"))
    handler.addFilter(RepeatFilter(repeat_interval_s))

    root = logging.getLogger()
    for old in [h for h in root.handlers if getattr(h, _HANDLER_MARK, False)]:
        root.removeHandler(old)
        old.close()
    root.addHandler(handler)
    root.setLevel(level)
    return handler
