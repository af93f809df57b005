"""The daemon's control channel: small JSON requests over an owner-only Unix socket.

Wire format: one JSON object per line (UTF-8, at most MAX_REQUEST bytes), one reply
line per request. A ``watch`` request turns the connection into a stream of reading
lines until the client hangs up::

    {"op": "status"}
    {"op": "activate", "name": "harbour-chapel"}
    {"op": "rebase"}
    {"op": "reload"}
    {"op": "watch", "every": 10, "raw": false}

Replies are ``{"ok": true, ...}`` or ``{"ok": false, "error": "what went wrong"}``. A
malformed, oversized or unknown request gets an error reply and changes nothing.

Security: the socket lives in a folder only its owner may enter (0700) and is itself
0600; the server also checks the peer's uid (SO_PEERCRED) and refuses anyone but its
own user and root. Requests are validated by pydantic models; nothing from the wire is
evaluated, unpickled or passed to a shell.
"""

from __future__ import annotations

import json
import logging
import os
import queue
import socket
import stat
import struct
import threading
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Annotated, Any, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, TypeAdapter, ValidationError

from .errors import ControlError

log = logging.getLogger(__name__)

MAX_REQUEST = 4096  # bytes in one request line
MAX_CLIENTS = 8
SOCKET_NAME = "control.sock"


class _Req(BaseModel):
    model_config = ConfigDict(extra="forbid")


class Status(_Req):
    op: Literal["status"]


class Activate(_Req):
    op: Literal["activate"]
    name: str = Field(min_length=1, max_length=64)


class Rebase(_Req):
    op: Literal["rebase"]


class Reload(_Req):
    op: Literal["reload"]


class Watch(_Req):
    op: Literal["watch"]
    every: int = Field(10, ge=1, le=10_000, description="send every n-th frame")
    raw: bool = Field(False, description="raw values only (for captures): a compact line")


Request = Annotated[Union[Status, Activate, Rebase, Reload, Watch], Field(discriminator="op")]
_REQUEST = TypeAdapter(Request)


def parse_request(line: bytes) -> Status | Activate | Rebase | Reload | Watch:
    """Validate one request line; raises ControlError with a short reason."""
    if len(line) > MAX_REQUEST:
        raise ControlError(f"request longer than {MAX_REQUEST} bytes")
    try:
        data = json.loads(line.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as e:
        raise ControlError(f"not JSON: {e}") from None
    except RecursionError:  # deeply nested arrays or objects, well under the size limit
        raise ControlError("request nested too deeply") from None
    try:
        return _REQUEST.validate_python(data)
    except ValidationError as e:
        first = e.errors()[0]
        where = ".".join(str(x) for x in first["loc"]) or "request"
        raise ControlError(f"{where}: {first['msg']}") from None


#: Where the system service's socket lives (RuntimeDirectory=fieldbridge in the unit).
SERVICE_RUNTIME = Path("/run/fieldbridge")


def runtime_dir(override: str | os.PathLike[str] | None = None) -> Path:
    """Folder of the control socket, in this order: the option, FIELDBRIDGE_RUNTIME,
    RUNTIME_DIRECTORY (set by the service manager for the unit), the per-user runtime
    folder ($XDG_RUNTIME_DIR/fieldbridge)."""
    if override:
        return Path(override)
    for var in ("FIELDBRIDGE_RUNTIME", "RUNTIME_DIRECTORY"):
        env = os.environ.get(var)
        if env:
            return Path(env.split(":")[0])
    import platformdirs

    return Path(platformdirs.user_runtime_dir("fieldbridge"))


def socket_path(override: str | os.PathLike[str] | None = None, *, client: bool = False) -> Path:
    """The control socket. A client (``client=True``) with no daemon of its own finds the
    system service's (``sudo fieldbridge use NAME`` on a headless board)."""
    path = runtime_dir(override) / SOCKET_NAME
    if (client and override is None and not path.exists()
            and (SERVICE_RUNTIME / SOCKET_NAME).exists()):
        return SERVICE_RUNTIME / SOCKET_NAME
    return path


def _private_dir(path: Path) -> None:
    """Create ``path`` as 0700 owned by us, or refuse one someone else could enter."""
    path.mkdir(mode=0o700, parents=True, exist_ok=True)
    st = path.lstat()
    if not stat.S_ISDIR(st.st_mode) or st.st_uid != os.getuid():
        raise ControlError(f"{path} is not a folder owned by this user: refusing to use it")
    if st.st_mode & 0o077:
        os.chmod(path, 0o700)


def peer_uid(conn: socket.socket) -> int:
    """The uid of the process on the other end of a Unix socket (Linux SO_PEERCRED)."""
    creds = conn.getsockopt(socket.SOL_SOCKET, socket.SO_PEERCRED, struct.calcsize("3i"))
    _pid, uid, _gid = struct.unpack("3i", creds)
    return uid


Handler = Callable[[Any], dict[str, Any]]


class ControlServer:
    """Accepts control connections in a background thread.

    Requests other than ``watch`` are handed to ``submit`` (which runs them on the
    daemon's loop and returns the reply). ``watch`` connections are fed by
    :meth:`publish`, called from the loop with each reading's dict.
    """

    def __init__(self, path: Path, submit: Handler) -> None:
        self.path = path
        self._submit = submit
        self._sock: socket.socket | None = None
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        self._watchers: list[tuple[Watch, queue.Queue[bytes | None]]] = []
        self._lock = threading.Lock()
        self._clients = 0

    def start(self) -> None:
        _private_dir(self.path.parent)
        try:
            self.path.unlink()
        except FileNotFoundError:
            pass
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        old = os.umask(0o177)
        try:
            sock.bind(str(self.path))
        finally:
            os.umask(old)
        os.chmod(self.path, 0o600)
        sock.listen(MAX_CLIENTS)
        sock.settimeout(0.2)
        self._sock = sock
        self._thread = threading.Thread(target=self._accept, name="control", daemon=True)
        self._thread.start()
        log.info("control socket %s", self.path)

    def stop(self) -> None:
        self._stop.set()
        with self._lock:
            for _w, q in self._watchers:
                try:
                    q.put_nowait(None)
                except queue.Full:  # a watcher that stopped reading: make room for the end mark
                    q.get_nowait()
                    q.put_nowait(None)
        if self._thread is not None:
            self._thread.join(timeout=1.0)
        if self._sock is not None:
            self._sock.close()
            self._sock = None
        try:
            self.path.unlink()
        except FileNotFoundError:
            pass

    @property
    def watching(self) -> bool:
        return bool(self._watchers)

    def publish(self, frame: int, make_line: Callable[[bool], bytes]) -> None:
        """Give watchers the current reading; ``make_line(raw)`` builds a line once per kind."""
        lines: dict[bool, bytes] = {}
        with self._lock:
            for w, q in self._watchers:
                if frame % w.every:
                    continue
                line = lines.get(w.raw)
                if line is None:
                    line = lines[w.raw] = make_line(w.raw)
                try:
                    q.put_nowait(line)
                except queue.Full:  # a slow watcher loses lines rather than holding us up
                    pass

    # -- threads -----------------------------------------------------------------------------

    def _accept(self) -> None:
        assert self._sock is not None
        while not self._stop.is_set():
            try:
                conn, _ = self._sock.accept()
            except socket.timeout:
                continue
            except OSError:
                break
            uid = peer_uid(conn)
            if uid not in (os.getuid(), 0):
                log.warning("control connection from uid %d refused", uid)
                conn.close()
                continue
            with self._lock:
                if self._clients >= MAX_CLIENTS:
                    conn.close()
                    continue
                self._clients += 1
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn: socket.socket) -> None:
        try:
            conn.settimeout(30.0)
            f = conn.makefile("rwb", buffering=0)
            while not self._stop.is_set():
                line = f.readline(MAX_REQUEST + 2)
                if not line:
                    return
                if len(line.rstrip(b"\r\n")) > MAX_REQUEST:
                    self._reply(conn, {"ok": False, "error": f"request over {MAX_REQUEST} bytes"})
                    return
                try:
                    req = parse_request(line.strip())
                except ControlError as e:
                    self._reply(conn, {"ok": False, "error": str(e)})
                    continue
                if isinstance(req, Watch):
                    self._stream(conn, req)
                    return
                self._reply(conn, self._submit(req))
        except (OSError, ValueError) as e:
            log.debug("control connection ended: %s", e)
        finally:
            with self._lock:
                self._clients -= 1
            conn.close()

    @staticmethod
    def _reply(conn: socket.socket, obj: dict[str, Any]) -> None:
        conn.sendall(json.dumps(obj).encode() + b"\n")

    def _stream(self, conn: socket.socket, req: Watch) -> None:
        q: queue.Queue[bytes | None] = queue.Queue(maxsize=2048)
        entry = (req, q)
        with self._lock:
            self._watchers.append(entry)
        try:
            self._reply(conn, {"ok": True, "watching": True})
            while True:
                line = q.get()
                if line is None:
                    return
                conn.sendall(line)
        finally:
            with self._lock:
                self._watchers.remove(entry)


class ControlClient:
    """Talks to a running daemon. Raises ControlError when none is listening."""

    def __init__(self, path: Path, timeout: float = 5.0) -> None:
        self.path = path
        self.timeout = timeout

    def _connect(self) -> socket.socket:
        s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        s.settimeout(self.timeout)
        try:
            s.connect(str(self.path))
        except (FileNotFoundError, ConnectionRefusedError) as e:
            s.close()
            raise ControlError(f"no daemon is listening on {self.path} ({e.strerror})") from None
        except PermissionError:
            s.close()
            raise ControlError(f"not allowed to use {self.path}: it belongs to another user")
        return s

    def request(self, obj: dict[str, Any]) -> dict[str, Any]:
        with self._connect() as s:
            s.sendall(json.dumps(obj).encode() + b"\n")
            line = s.makefile("rb").readline(1 << 20)
        if not line:
            raise ControlError("the daemon closed the connection without replying")
        reply: dict[str, Any] = json.loads(line)
        return reply

    def watch(self, every: int = 10, raw: bool = False) -> Iterator[dict[str, Any]]:
        """Yield reading dicts (or ``{"frame":..,"raw":[..]}``) until the daemon stops."""
        s = self._connect()
        try:
            s.sendall(json.dumps({"op": "watch", "every": every, "raw": raw}).encode() + b"\n")
            f = s.makefile("rb")
            first = json.loads(f.readline(1 << 16) or b"{}")
            if not first.get("ok"):
                raise ControlError(first.get("error", "watch refused"))
            s.settimeout(None)
            for line in f:
                yield json.loads(line)
        finally:
            s.close()


class OscControl:
    """Optional OSC control input: ``<prefix>/control/activate s:NAME`` and
    ``<prefix>/control/rebase``, e.g. from a phone controller app on the same network.

    It listens on 127.0.0.1 unless the rig names another address; anything that reaches
    it can switch venues, so open it to a network only where that network is trusted.
    Requests go through the same ``submit`` path (and validation) as the Unix socket.
    """

    def __init__(self, listen: str, submit: Handler, prefix: str = "/fieldbridge") -> None:
        from .outputs.osc import parse_destination

        self.host, self.port = parse_destination(listen)
        self._submit = submit
        self.prefix = prefix
        self._server: Any = None
        self._thread: threading.Thread | None = None
        self.handled = 0

    def start(self) -> None:
        from pythonosc.dispatcher import Dispatcher
        from pythonosc.osc_server import BlockingOSCUDPServer

        d = Dispatcher()
        d.map(f"{self.prefix}/control/activate", self._activate)
        d.map(f"{self.prefix}/control/rebase", self._rebase)
        d.set_default_handler(lambda addr, *a: log.debug("OSC control: ignored %s", addr))
        self._server = BlockingOSCUDPServer((self.host, self.port), d)
        self.port = self._server.server_address[1]
        self._thread = threading.Thread(target=self._server.serve_forever, name="osc-control",
                                        kwargs={"poll_interval": 0.2}, daemon=True)
        self._thread.start()
        log.info("OSC control input on %s:%d", self.host, self.port)

    def stop(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._server = None

    def _handle(self, obj: dict[str, Any]) -> None:
        try:
            req = parse_request(json.dumps(obj).encode())
        except ControlError as e:
            log.warning("OSC control request refused: %s", e)
            return
        reply = self._submit(req)
        self.handled += 1
        if not reply.get("ok"):
            log.warning("OSC control %s refused: %s", obj["op"], reply.get("error"))

    def _activate(self, _addr: str, *args: Any) -> None:
        if len(args) != 1 or not isinstance(args[0], str):
            log.warning("OSC control: activate needs one string argument (a venue name)")
            return
        self._handle({"op": "activate", "name": args[0]})

    def _rebase(self, _addr: str, *args: Any) -> None:
        self._handle({"op": "rebase"})
