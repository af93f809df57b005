"""MIDI ports: where :class:`~bridge.outputs.midi.MidiSink` writes its bytes.

Ports are opened through mido's python-rtmidi backend (ALSA sequencer or JACK), and the
hot path then calls python-rtmidi's ``send_message`` on the underlying ``MidiOut``
directly: a mido ``Message`` validates every field on construction (about 5 us a
message), the raw call costs about 2 us.

* Virtual port: we create ``client_name:port_name``; the synth (or a patchbay) connects
  to it. Works with ALSA and JACK, not on Windows.
* Named port: we connect to an existing port. ALSA appends ``client:port`` numbers to
  names ("Synth A:Synth A Port 1 128:0"), and those change between boots, so names are
  matched without them (:func:`match_port`).

A missing MIDI system is a :class:`~bridge.errors.DeviceError` that says what to start;
:func:`open_ports_retry` keeps trying until it appears.
"""

from __future__ import annotations

import logging
import os
import re
import threading
import time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from bridge.errors import ConfigError, DeviceError

if TYPE_CHECKING:
    from bridge.outputs.midi import MidiSettings, RawPort

log = logging.getLogger(__name__)

#: Our API names -> mido backend strings (python-rtmidi API names).
BACKENDS: dict[str, str] = {
    "alsa": "mido.backends.rtmidi/LINUX_ALSA",
    "jack": "mido.backends.rtmidi/UNIX_JACK",
}

ALSA_SEQUENCER = "/dev/snd/seq"

# ALSA port names end in " <client>:<port>", e.g. "Midi Through:Midi Through Port-0 14:0".
_ALSA_NUMBERS = re.compile(r"\s+\d+:\d+\s*$")


def bare_name(name: str) -> str:
    """A port name without ALSA's trailing client:port numbers, case-folded, trimmed."""
    return _ALSA_NUMBERS.sub("", name).strip().casefold()


def match_port(wanted: str, available: list[str]) -> str:
    """The one name in ``available`` that ``wanted`` means.

    Tried in order: the exact name; the name without ALSA's client:port numbers (either
    side may carry them, case ignored); then the client or port part alone ("Synth A"
    for "Synth A:Synth A Port 1 128:0"); then the start of a name. Several hits at the
    same step, or none, raise :class:`DeviceError` listing what there is.
    """
    if wanted in available:
        return wanted
    key = bare_name(wanted)
    steps: list[Callable[[str], bool]] = [
        lambda n: bare_name(n) == key,
        lambda n: any(part.strip() == key for part in bare_name(n).split(":")),
        lambda n: bare_name(n).startswith(key),
    ]
    for step in steps:
        hits = [n for n in available if step(n)]
        if len(hits) == 1:
            return hits[0]
        if len(hits) > 1:
            raise DeviceError(
                f"MIDI port name {wanted!r} is ambiguous; it matches: {', '.join(hits)}. "
                "Write more of the name."
            )
    listing = ", ".join(available) if available else "none"
    raise DeviceError(f"no MIDI port called {wanted!r}; ports available: {listing}")


class RtMidiPort:
    """An open rtmidi output (virtual or connected). :meth:`send` takes one raw message."""

    timed = False

    def __init__(self, mido_port: Any, name: str, *, close_wait_s: float = 0.0) -> None:
        self._mido = mido_port
        self.name = name
        self.close_wait_s = close_wait_s
        #: JACK only: the server this port lives on (see jack_server_identity), and what
        #: to reopen (None: our virtual port) when that server comes back.
        self.server: tuple[int, int] | None = None
        self.target: str | None = None
        rt = getattr(mido_port, "_rt", None)  # mido's backend keeps the rtmidi.MidiOut here
        if rt is not None:
            self.send = rt.send_message  # type: ignore[method-assign]

    def send(self, data: bytes) -> None:
        # Fallback when mido's internals change: the documented, slower path.
        import mido

        self._mido.send(mido.Message.from_bytes(data))

    def close(self) -> None:
        if self._mido.closed:
            return
        if self.close_wait_s > 0:
            # JACK moves queued bytes into the graph only in its next process cycle; a
            # port unregistered before that loses them, and those are the final
            # note-offs. rtmidi's own wait on close is not reliable, so give the server
            # a few cycles (seen on a dummy server: lost about one close in ten).
            time.sleep(self.close_wait_s)
        self._mido.close()

    def __repr__(self) -> str:
        return f"RtMidiPort({self.name!r})"


class NullPort:
    """Counts what it is given and sends it nowhere: dry runs and benchmarks."""

    timed = False

    def __init__(self, name: str = "null") -> None:
        self.name = name
        self.messages = 0
        self.bytes = 0

    def send(self, data: bytes) -> None:
        self.messages += 1
        self.bytes += len(data)

    def close(self) -> None:
        pass


def check_system(api: str) -> None:
    """Raise :class:`DeviceError` saying what to do when the MIDI system is absent."""
    if api == "alsa" and not os.path.exists(ALSA_SEQUENCER):
        raise DeviceError(
            f"the ALSA sequencer is missing ({ALSA_SEQUENCER} does not exist): load it with "
            "'sudo modprobe snd-seq' (add snd-seq to /etc/modules to keep it), or set api = "
            '"jack" if a JACK server runs'
        )


def _backend(api: str) -> Any:
    import mido

    try:
        return mido.Backend(BACKENDS[api], load=True)
    except KeyError:
        raise ConfigError(
            f"unknown MIDI api {api!r}; choose one of: {', '.join(BACKENDS)}"
        ) from None


def _system_error(api: str, exc: BaseException) -> DeviceError:
    if api == "jack":
        server = os.environ.get("JACK_DEFAULT_SERVER", "default")
        return DeviceError(
            f"cannot reach a JACK server (server name {server!r}): start one (for example "
            "'jackd -d alsa', or your session's audio server) and try again. "
            f"MIDI system said: {exc}"
        )
    return DeviceError(f"the ALSA sequencer refused a client: {exc}")


def port_names(api: str) -> list[str]:
    """Names of the output ports another program offers (what ``connect`` can name)."""
    check_system(api)
    try:
        names: list[str] = _backend(api).get_output_names()
    except (OSError, RuntimeError) as exc:  # rtmidi.SystemError is an OSError
        raise _system_error(api, exc) from exc
    return names


def open_port(settings: MidiSettings, target: str | None = None) -> RawPort:
    """Open one output: our virtual port (``target`` None) or the existing port ``target``."""
    api = settings.api
    check_system(api)
    backend = _backend(api)
    try:
        if target is None:
            mido_port = backend.open_output(
                settings.port_name, virtual=True, client_name=settings.client_name
            )
            name = f"{settings.client_name}:{settings.port_name}"
        else:
            name = match_port(target, backend.get_output_names())
            mido_port = backend.open_output(name)
    except DeviceError:
        raise
    except (OSError, RuntimeError) as exc:
        raise _system_error(api, exc) from exc
    log.info("MIDI port open (%s): %s", api, name)
    port = RtMidiPort(mido_port, name, close_wait_s=settings.close_wait_s if api == "jack" else 0.0)
    if api == "jack":
        port.server = jack_server_identity()
        port.target = target
    return port


def abandon(port: Any) -> None:
    """Keep ``port`` alive for the rest of the process, never closed or collected.

    An rtmidi client whose JACK server has gone away crashes the process when it is
    closed or deallocated (seen with the dummy driver: a segmentation fault inside the
    JACK library). One extra reference that is never released keeps its destructor from
    ever running, even at interpreter exit; the cost is one small object per restart.
    """
    import ctypes

    ctypes.pythonapi.Py_IncRef(ctypes.py_object(port))
    log.debug("abandoned MIDI port %s of a stopped JACK server", getattr(port, "name", port))


def jack_server_identity() -> tuple[int, int] | None:
    """Which JACK server is running now: the identity of its socket file, or None.

    jackd2 listens on /dev/shm/jack_<server>_<uid>_0 (server from JACK_DEFAULT_SERVER,
    "default" otherwise). A client of a server that stopped gets no error from rtmidi,
    its sends just vanish; comparing this identity with the one seen at open tells
    "gone" (None) and "restarted" (another inode) apart, with one stat call.
    """
    server = os.environ.get("JACK_DEFAULT_SERVER") or "default"
    try:
        st = os.stat(f"/dev/shm/jack_{server}_{os.getuid()}_0")
    except OSError:
        return None
    return (st.st_ino, st.st_ctime_ns)


def open_ports(settings: MidiSettings) -> list[RawPort]:
    """Every port the settings name: the virtual port if asked for, then each ``connect``."""
    targets: list[str | None] = [None] if settings.virtual else []
    targets += settings.connect
    if not targets:
        raise ConfigError("MIDI output has no port: set virtual = true or name ports in connect")
    opened: list[RawPort] = []
    try:
        for target in targets:
            opened.append(open_port(settings, target))
    except BaseException:
        for port in opened:
            port.close()
        raise
    return opened


def open_ports_retry(
    settings: MidiSettings,
    *,
    timeout_s: float | None = None,
    first_delay_s: float = 0.5,
    max_delay_s: float = 5.0,
    stop: threading.Event | None = None,
) -> list[RawPort]:
    """:func:`open_ports`, retried with back-off while the MIDI system or port is missing.

    Gives up with the last :class:`DeviceError` after ``timeout_s`` (None: never), or
    when ``stop`` is set. Configuration errors are not retried.
    """
    deadline = None if timeout_s is None else time.monotonic() + timeout_s
    delay = first_delay_s
    logged = ""
    while True:
        try:
            return open_ports(settings)
        except DeviceError as exc:
            if str(exc) != logged:
                log.warning("%s (retrying)", exc)
                logged = str(exc)
            now = time.monotonic()
            if deadline is not None and now >= deadline:
                raise
            wait = delay if deadline is None else min(delay, max(0.0, deadline - now))
            if stop is not None:
                if stop.wait(wait):
                    raise
            else:
                time.sleep(wait)
            delay = min(max_delay_s, delay * 2)


__all__ = [
    "BACKENDS",
    "NullPort",
    "RtMidiPort",
    "bare_name",
    "check_system",
    "match_port",
    "open_port",
    "open_ports",
    "open_ports_retry",
    "port_names",
]
