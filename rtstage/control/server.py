"""The control server: JSON lines over TCP, on its own thread.

The server runs an asyncio loop on one thread.  It only reads and writes
sockets and calls the :class:`~rtstage.control.protocol.Controller`; changes
reach the engine through the target's parameter block, so nothing a client
does (or fails to do) can make the audio thread wait.

Limits, each enforced per client
--------------------------------
* line length: a line longer than ``max_line_bytes`` gets an error reply and
  the connection is closed (the rest of the line cannot be framed);
* request rate: a token bucket of ``rate_hz`` requests per second with a burst
  of ``burst``; a request over the rate gets an error reply, and a client that
  keeps sending ``max_refused`` refused requests in a row is dropped;
* output: a client that does not read its replies or meter frames is dropped
  once ``max_buffer_bytes`` wait unsent (the server never waits for it);
* idle: a client that sends nothing for ``idle_timeout_s`` is dropped;
* clients: at most ``max_clients`` at once; more are told so and closed.

Every drop is announced to the client with ``{"event": "closing", "reason": …}``
when the socket still takes it, and logged on stderr.

Authentication
--------------
Listening on an address other than loopback needs a token.  With a token the
first request must be ``{"op": "auth", "token": "…"}``; it is compared in
constant time (:func:`hmac.compare_digest` of SHA-256 digests) before any other
request is looked at, and a wrong or missing token closes the connection.
"""

import asyncio
import concurrent.futures
import hashlib
import hmac
import ipaddress
import os
import stat
import threading
import time

from .. import __version__
from ..log import log as _log
from ..errors import RtstageError
from ..threads import Startable
from . import DEFAULT_CONTROL_PORT, PROTOCOL_VERSION
from .protocol import Dispatcher, Session, encode, error_reply, parse_request

BLOCKING_OPS = frozenset(("preset_load", "preset_save", "learn", "learn_cancel"))
"""Ops that may wait (for a block boundary or a file): run on a worker thread."""


def is_loopback(host):
    """True for ``localhost`` and loopback addresses (127.0.0.0/8, ::1)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def read_token_file(path):
    """Read a token from a file that only its owner may read.

    Raises
    ------
    RtstageError
        The file cannot be read, is readable or writable by group or others,
        belongs to another user, or holds no token.
    """
    try:
        st = os.stat(path)
        with open(path, encoding="utf-8") as f:
            token = f.read().strip()
    except OSError as exc:
        raise RtstageError(f"cannot read token file {path}: {exc.strerror}") from None
    except UnicodeDecodeError:
        raise RtstageError(f"token file {path} is not UTF-8 text") from None
    if st.st_mode & (stat.S_IRWXG | stat.S_IRWXO):
        raise RtstageError(f"token file {path} is accessible to group or others; chmod 600 it")
    if hasattr(os, "getuid") and st.st_uid != os.getuid():
        raise RtstageError(f"token file {path} belongs to another user")
    if not token:
        raise RtstageError(f"token file {path} is empty")
    return token


def _digest(text):
    return hashlib.sha256(text.encode("utf-8", "surrogatepass")).digest()


class _TokenBucket:
    def __init__(self, rate_hz, burst):
        self.rate_hz = float(rate_hz)
        self.burst = float(burst)
        self.level = float(burst)
        self.t_s = time.monotonic()

    def take(self):
        now = time.monotonic()
        self.level = min(self.burst, self.level + (now - self.t_s) * self.rate_hz)
        self.t_s = now
        if self.level >= 1.0:
            self.level -= 1.0
            return True
        return False


class _Client:
    def __init__(self, server, reader, writer):
        self.server = server
        self.reader = reader
        self.writer = writer
        self.peer = writer.get_extra_info("peername")
        self.closed = False
        self.wake = asyncio.Event()
        self.bucket = _TokenBucket(server.rate_hz, server.burst)
        loop = server._loop
        self.session = Session(
            send_event=lambda obj: loop.call_soon_threadsafe(self.send, obj),
            authenticated=server._token_digest is None,
        )

    def send(self, obj):
        """Queue one line; drop the client when it does not read (never waits)."""
        if self.closed:
            return
        transport = self.writer.transport
        if transport.is_closing():
            self.close("connection lost", announce=False)
            return
        if transport.get_write_buffer_size() > self.server.max_buffer_bytes:
            self.close(f"client is not reading: more than {self.server.max_buffer_bytes} bytes unsent", announce=False)
            return
        self.writer.write(encode(obj))

    def close(self, reason, announce=True):
        if self.closed:
            return
        if announce and not self.writer.transport.is_closing():
            self.writer.write(encode({"event": "closing", "reason": reason}))
        self.closed = True
        self.wake.set()
        self.server._log(f"control: closed {self.peer}: {reason}")
        self.server.drops[reason.split(":")[0]] = self.server.drops.get(reason.split(":")[0], 0) + 1
        self.writer.close()


class ControlServer(Startable):
    """JSON-lines control server on a thread of its own.

    Parameters
    ----------
    controller : rtstage.control.protocol.Controller
        Where requests go.
    host : str
        Address to listen on; loopback unless a token is given.
    port : int
        TCP port; 0 picks a free one (read :attr:`port` after :meth:`start`).
    token : str or None
        Shared secret every client must send first; required off loopback.
    max_clients : int
        Clients at once.
    max_line_bytes : int
        Longest request line, newline excluded.
    rate_hz, burst : float
        Request rate allowed per client (token bucket).
    max_refused : int
        Over-rate requests in a row after which a client is dropped.
    max_buffer_bytes : int
        Unsent bytes after which a client that does not read is dropped.
    idle_timeout_s : float
        Silence after which a client is dropped.
    logger : callable
        ``logger(message)``; default: one line on stderr.

    Examples
    --------
    >>> server = ControlServer(controller, port=0).start()   # doctest: +SKIP
    >>> server.port                                          # doctest: +SKIP
    40213
    >>> server.stop()                                        # doctest: +SKIP
    """

    def __init__(self, controller, host="127.0.0.1", port=DEFAULT_CONTROL_PORT, token=None, max_clients=8,
                 max_line_bytes=4096, rate_hz=200.0, burst=400.0, max_refused=200, max_buffer_bytes=1 << 18,
                 idle_timeout_s=600.0, logger=_log):
        if not is_loopback(host) and not token:
            raise RtstageError(f"listening on {host} (not loopback) needs a token: give --control-token-file")
        if token is not None and (not isinstance(token, str) or not token):
            raise RtstageError("the control token must be a non-empty string")
        self.controller = controller
        self.host = host
        self.port = int(port)
        self.max_clients = int(max_clients)
        self.max_line_bytes = int(max_line_bytes)
        self.rate_hz = float(rate_hz)
        self.burst = float(burst)
        self.max_refused = int(max_refused)
        self.max_buffer_bytes = int(max_buffer_bytes)
        self.idle_timeout_s = float(idle_timeout_s)
        self._log = logger
        self._token_digest = _digest(token) if token else None
        self.dispatcher = Dispatcher(controller, server_status=self._status)
        self.clients = set()
        self.requests = 0
        self.drops = {}
        self._loop = None
        self._server = None
        self._thread = None
        self._ready = threading.Event()
        self._start_error = None
        self._pool = None

    # -- lifecycle ----------------------------------------------------------------------------
    def start(self):
        """Bind and serve on a new thread; returns self once listening.

        Raises
        ------
        RtstageError
            The address cannot be bound.
        """
        self._pool = concurrent.futures.ThreadPoolExecutor(max_workers=max(2, self.max_clients),
                                                           thread_name_prefix="rtstage-control")
        self._thread = threading.Thread(target=self._run, name="rtstage-control-server", daemon=True)
        self._thread.start()
        self._ready.wait()
        if self._start_error is not None:
            self._thread.join()
            self._pool.shutdown()
            raise self._start_error
        self._log(f"control: listening on {self.host}:{self.port}{' (token required)' if self._token_digest else ''}")
        return self

    def stop(self):
        """Close every client and the listening socket, and end the thread."""
        if self._thread is None:
            return
        if self._loop is not None and self._thread.is_alive():
            self._loop.call_soon_threadsafe(self._shutdown)
        self._thread.join()
        self._pool.shutdown(wait=True)
        self._thread = None

    def _run(self):
        loop = asyncio.new_event_loop()
        asyncio.set_event_loop(loop)
        self._loop = loop
        self._stopped = asyncio.Event()
        try:
            self._server = loop.run_until_complete(
                asyncio.start_server(self._handle, self.host, self.port, limit=self.max_line_bytes + 1)
            )
        except OSError as exc:
            self._start_error = RtstageError(f"cannot listen on {self.host}:{self.port}: {exc.strerror}")
            self._ready.set()
            loop.close()
            return
        self.port = self._server.sockets[0].getsockname()[1]
        self._ready.set()
        try:
            loop.run_until_complete(self._stopped.wait())
            self._server.close()
            loop.run_until_complete(self._server.wait_closed())
            pending = list(asyncio.all_tasks(loop))
            for task in pending:
                task.cancel()
            if pending:
                loop.run_until_complete(asyncio.gather(*pending, return_exceptions=True))
        finally:
            loop.close()

    def _shutdown(self):
        for client in list(self.clients):
            client.close("server stopping")
        self._stopped.set()

    def _status(self):
        return {
            "protocol": PROTOCOL_VERSION, "host": self.host, "port": self.port, "clients": len(self.clients),
            "max_clients": self.max_clients, "max_line_bytes": self.max_line_bytes, "rate_hz": self.rate_hz,
            "burst": self.burst, "requests": self.requests, "drops": dict(self.drops),
            "token_required": self._token_digest is not None,
        }

    # -- one client ---------------------------------------------------------------------------
    async def _handle(self, reader, writer):
        client = _Client(self, reader, writer)
        if len(self.clients) >= self.max_clients:
            client.close(f"too many clients (at most {self.max_clients})")
            return
        self.clients.add(client)
        meter_task = asyncio.ensure_future(self._meter_loop(client))
        try:
            client.send({"event": "greeting", "protocol": PROTOCOL_VERSION, "rtstage": __version__,
                         "auth": "required" if self._token_digest else "none"})
            await self._read_loop(client)
        except (ConnectionError, OSError):
            client.close("connection lost", announce=False)
        except asyncio.CancelledError:
            client.close("server stopping")
            raise
        finally:
            meter_task.cancel()
            self.clients.discard(client)
            if not client.closed:
                client.close("connection ended", announce=False)

    async def _read_loop(self, client):
        refused = 0
        loop = asyncio.get_running_loop()
        while not client.closed:
            try:
                line = await asyncio.wait_for(client.reader.readuntil(b"\n"), self.idle_timeout_s)
            except asyncio.LimitOverrunError:
                client.send(error_reply(None, f"request line longer than {self.max_line_bytes} bytes"))
                client.close(f"oversized line (more than {self.max_line_bytes} bytes)")
                return
            except asyncio.IncompleteReadError as exc:
                if exc.partial.strip():
                    client.send(error_reply(None, "request line not terminated by a newline before end of input"))
                client.close("end of input", announce=False)
                return
            except asyncio.TimeoutError:
                client.close(f"idle for {self.idle_timeout_s:g} s")
                return
            line = line.rstrip(b"\r\n")
            if len(line) > self.max_line_bytes:
                client.send(error_reply(None, f"request line longer than {self.max_line_bytes} bytes"))
                client.close(f"oversized line (more than {self.max_line_bytes} bytes)")
                return
            self.requests += 1
            if not client.bucket.take():
                refused += 1
                client.send(error_reply(None, f"rate limit: at most {self.rate_hz:g} requests per second"))
                if refused >= self.max_refused:
                    client.close(f"rate limit exceeded by {refused} requests in a row")
                    return
                continue
            refused = 0
            if not line.strip():
                client.send(error_reply(None, "empty request line"))
                continue
            req, rid = parse_request(line)
            if req is None:
                client.send(rid)
                if not client.session.authenticated:
                    client.close("not authenticated")
                continue
            session = client.session
            if not session.authenticated:
                reply = self._authenticate(req, rid, session)
                client.send(reply)
                if not session.authenticated:
                    client.close("bad or missing token")
                continue
            if req["op"] in BLOCKING_OPS:
                reply = await loop.run_in_executor(self._pool, self.dispatcher.handle, req, session)
            else:
                reply = self.dispatcher.handle(req, session, defer_wait=True)
                if reply.get("_wait"):
                    # queued on the loop at once; wait for the block boundary off the loop
                    reply = await loop.run_in_executor(self._pool, self.dispatcher.finish_set, reply)
            client.send(reply)
            if req["op"] == "subscribe" and reply["ok"]:
                client.wake.set()
            if session.closing:
                client.close(session.closing)

    def _authenticate(self, req, rid, session):
        token = req.get("token") if req["op"] == "auth" else None
        given = _digest(token) if isinstance(token, str) else _digest("\0invalid")
        if hmac.compare_digest(given, self._token_digest) and req["op"] == "auth":
            session.authenticated = True
            return {"id": rid, "ok": True, "authenticated": True}
        return error_reply(rid, "authentication failed: the first request must be auth with the right token")

    async def _meter_loop(self, client):
        due = {}
        while not client.closed:
            subs = client.session.subscriptions
            now = time.monotonic()
            for sub in list(due):
                if sub not in subs:
                    del due[sub]
            for sub in subs:
                due.setdefault(sub, now)
            if not due:
                client.wake.clear()
                await client.wake.wait()
                continue
            meters = None
            for sub, t_due in due.items():
                if t_due <= now:
                    if meters is None:
                        meters = self.controller.target.meters()
                    client.send({"event": "meters", "subscription": sub, "meters": meters})
                    due[sub] = max(t_due + 1.0 / subs[sub], now)
            wait_s = max(0.0, min(due.values()) - time.monotonic()) if due else 0.0
            client.wake.clear()
            try:
                await asyncio.wait_for(client.wake.wait(), wait_s)
            except asyncio.TimeoutError:
                pass
