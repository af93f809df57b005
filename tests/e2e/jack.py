"""A private JACK server for peer tests: ``jackd --no-realtime -d dummy`` under a unique name.

The dummy driver needs no sound hardware. Every client (our rtmidi client, jack_connect,
jack_midi_dump) finds the server through the ``JACK_DEFAULT_SERVER`` environment
variable, so parallel test runs never meet each other's servers. The session fixture
sets it in ``os.environ`` for this process (libjack reads it when a client opens) and
passes it to every program it starts.
"""

from __future__ import annotations

import os
import queue
import re
import signal
import subprocess
import tempfile
import threading
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import IO

import pytest

try:  # tests/e2e/peers.py: skip when a program is absent, fail under CI's flag
    from .peers import require
except ImportError:
    from peers import require  # type: ignore[no-redef]


def _stop(
    proc: subprocess.Popen[bytes] | subprocess.Popen[str],
    timeout: float = 5.0,
    sig: int = signal.SIGTERM,
) -> None:
    """End a process we started: ``sig``, then SIGKILL if it lingers."""
    if proc.poll() is not None:
        return
    proc.send_signal(sig)
    try:
        proc.wait(timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(timeout)


@dataclass
class JackServer:
    """A running dummy JACK server and the environment its clients need."""

    name: str
    proc: subprocess.Popen[bytes]
    env: dict[str, str]
    log: IO[bytes]

    def stop(self) -> None:
        # Be patient: a jackd killed before it unregisters leaves its entry in JACK's
        # machine-wide registry (at most 8 servers) until a server of the same name starts.
        _stop(self.proc, timeout=20.0)
        self.log.close()

    def run(self, *args: str, timeout: float = 10.0) -> subprocess.CompletedProcess[str]:
        """Run a JACK command-line client (jack_connect, jack_lsp, ...) against this server."""
        return subprocess.run(
            list(args), env=self.env, capture_output=True, text=True, timeout=timeout, check=False
        )

    def ports(self) -> list[str]:
        return self.run(require("jack_lsp")).stdout.split("\n")

    def wait_port(self, port: str, timeout: float = 10.0) -> None:
        """Wait until ``port`` exists (polls jack_lsp; JACK offers no blocking wait for it)."""
        deadline = time.monotonic() + timeout
        delay = 0.02
        while port not in self.ports():
            if time.monotonic() > deadline:
                raise AssertionError(f"JACK port {port!r} did not appear; ports: {self.ports()}")
            time.sleep(delay)
            delay = min(0.2, delay * 2)

    def wait_connected(self, port: str, timeout: float = 10.0) -> list[str]:
        """Wait until ``port`` has a connection; return the ports it is connected to."""
        deadline = time.monotonic() + timeout
        delay = 0.02
        while True:
            lines = self.run(require("jack_lsp"), "-c", port).stdout.splitlines()
            peers = [ln.strip() for ln in lines[1:] if ln.startswith((" ", "\t"))]
            if peers:
                return peers
            if time.monotonic() > deadline:
                raise AssertionError(f"JACK port {port!r} got no connection: {lines}")
            time.sleep(delay)
            delay = min(0.2, delay * 2)

    def connect(self, source: str, dest: str) -> None:
        done = self.run(require("jack_connect"), source, dest)
        assert done.returncode == 0, f"jack_connect {source} {dest}: {done.stderr}"


#: Server names tried in turn. JACK keeps at most 8 servers in a machine-wide registry and
#: frees a dead server's entry only when a server of the same name starts again, so a
#: small fixed set of names never fills it, even after crashed runs.
SERVER_NAMES = [f"fbtest{k}" for k in range(6)]


def _running(name: str) -> bool:
    env = dict(os.environ, JACK_DEFAULT_SERVER=name, JACK_NO_START_SERVER="1")
    done = subprocess.run(
        [require("jack_wait"), "-c"],
        env=env,
        capture_output=True,
        text=True,
        timeout=10,
        check=False,
    )
    return done.stdout.strip() == "running"


def start_jack(timeout: float = 15.0) -> JackServer:
    """Start ``jackd --no-realtime -d dummy -r 48000 -p 256`` under a name nobody uses now."""
    jackd = require("jackd")
    errors: list[str] = []
    for name in SERVER_NAMES:
        if _running(name):  # another test session has it
            continue
        env = dict(os.environ, JACK_DEFAULT_SERVER=name, JACK_NO_START_SERVER="1")
        # jackd's log goes to a file: an unread pipe would fill up and stall the server.
        log = tempfile.TemporaryFile()  # noqa: SIM115 - kept open as long as the server
        proc = subprocess.Popen(
            [jackd, "--no-realtime", "-d", "dummy", "-r", "48000", "-p", "256"],
            env=env,
            stdout=log,
            stderr=subprocess.STDOUT,
        )
        server = JackServer(name, proc, env, log)
        # jack_wait -w blocks until the server answers (or its timeout passes).
        ready = server.run(require("jack_wait"), "-w", "-t", str(int(timeout)), timeout=timeout + 5)
        if ready.returncode == 0 and proc.poll() is None:
            return server
        # Lost a race for the name, or jackd failed: note why and try the next name.
        _stop(proc)
        log.seek(0)
        errors.append(f"{name}: {log.read().decode(errors='replace')[-600:]}")
        log.close()
    raise AssertionError("jackd did not start under any test name:\n" + "\n".join(errors))


@pytest.fixture(scope="session")
def jack_server() -> Iterator[JackServer]:
    """One dummy JACK server for the test session; this process talks to it too."""
    server = start_jack()
    saved = {k: os.environ.get(k) for k in ("JACK_DEFAULT_SERVER", "JACK_NO_START_SERVER")}
    os.environ["JACK_DEFAULT_SERVER"] = server.name
    os.environ["JACK_NO_START_SERVER"] = "1"
    try:
        yield server
    finally:
        for key, value in saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value
        server.stop()


# One dumped event: "<frame>: <hex bytes> [description]", e.g. "   0: 90 45 64 note on ...".
_DUMP_LINE = re.compile(r"^\s*-?\d+:((?:\s[0-9a-f]{2})+)(?:\s|$)")


@dataclass
class MidiDump:
    """``jack_midi_dump`` running against a server; collects each event's raw bytes."""

    server: JackServer
    # jack_midi_dump's default client is "midi-monitor"; a fresh name per dump keeps a
    # dump that is still shutting down from being mistaken for the next one.
    client: str = field(default_factory=lambda: f"midi-monitor-{uuid.uuid4().hex[:6]}")
    proc: subprocess.Popen[str] | None = None
    events: queue.Queue[bytes] = field(default_factory=queue.Queue)
    lines: list[str] = field(default_factory=list)

    @property
    def port(self) -> str:
        return f"{self.client}:input"

    def start(self) -> None:
        # stdbuf -oL: line-buffered stdout, so events arrive while it runs.
        self.proc = subprocess.Popen(
            [require("stdbuf"), "-oL", require("jack_midi_dump"), self.client],
            env=self.server.env,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
        )
        threading.Thread(target=self._read, daemon=True).start()
        self.server.wait_port(self.port)

    def _read(self) -> None:
        assert self.proc is not None and self.proc.stdout is not None
        for line in self.proc.stdout:
            self.lines.append(line.rstrip("\n"))
            m = _DUMP_LINE.match(line)
            if m:
                self.events.put(bytes.fromhex(m.group(1)))

    def take(self, count: int, timeout: float = 10.0) -> list[bytes]:
        """The next ``count`` events, waiting up to ``timeout`` seconds in all."""
        deadline = time.monotonic() + timeout
        got: list[bytes] = []
        while len(got) < count:
            left = deadline - time.monotonic()
            try:
                got.append(self.events.get(timeout=max(0.0, left)))
            except queue.Empty:
                raise AssertionError(
                    f"jack_midi_dump gave {len(got)} of {count} events; "
                    f"got {[g.hex(' ') for g in got]}"
                ) from None
        return got

    def quiet(self, wait: float = 0.3) -> list[bytes]:
        """Events that arrive within ``wait`` seconds (to prove nothing extra was sent)."""
        extra: list[bytes] = []
        try:
            while True:
                extra.append(self.events.get(timeout=wait))
        except queue.Empty:
            return extra

    def stop(self) -> None:
        # SIGINT: jack_midi_dump closes its client cleanly. On SIGTERM it just dies and
        # the server waits 5 s before giving up on it.
        if self.proc is not None:
            _stop(self.proc, sig=signal.SIGINT)


@pytest.fixture
def midi_dump(jack_server: JackServer) -> Iterator[MidiDump]:
    """A fresh ``jack_midi_dump`` (client ``midi-monitor-<random>``, port ``<client>:input``)."""
    dump = MidiDump(jack_server)
    dump.start()
    try:
        yield dump
    finally:
        dump.stop()
