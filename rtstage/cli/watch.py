"""``rtstage watch``: show the meters of a running engine, over its control socket.

Connects to the control server (loopback by default), subscribes to meter
frames (``subscribe``, docs/protocol.md) and shows them with the same display
as ``rtstage run`` (:class:`rtstage.live.display.LiveDisplay`) on stderr.  With
``--json`` every frame received is also printed on stdout as one JSON line.
"""

import json
import math
import signal
import sys
import threading

from ..control import DEFAULT_CONTROL_PORT
from ..errors import RtstageError

DEFAULT_WATCH_RATE_HZ = 10.0


def register(subparsers):
    """Add the ``watch`` parser to ``subparsers``."""
    parser = subparsers.add_parser(
        "watch",
        help="show the live meters of a running rtstage (over its control socket)",
        description="Subscribe to a running engine's meter frames and show them: a live panel on a terminal, "
        "one status line per second otherwise.  Levels only; if you listen to error monitoring with make-up "
        "gain or to test tones, keep the monitor level down and follow local codes and licensed practice.",
    )
    parser.add_argument("--host", default="127.0.0.1", help="server address (default 127.0.0.1)")
    parser.add_argument("--port", type=int, default=DEFAULT_CONTROL_PORT,
                        help=f"server port (default {DEFAULT_CONTROL_PORT})")
    parser.add_argument("--token-file", metavar="F", help="file holding the token (readable by its owner only)")
    parser.add_argument("--rate-hz", type=float, default=DEFAULT_WATCH_RATE_HZ,
                        help=f"meter frames per second to ask for (default {DEFAULT_WATCH_RATE_HZ:g})")
    parser.add_argument("--duration", type=float, help="stop after this many seconds")
    parser.add_argument("--timeout-s", type=float, default=5.0,
                        help="give up when no line arrives for this many seconds (default 5)")
    parser.add_argument("--json", action="store_true", help="print every meter frame on stdout as a JSON line")
    parser.add_argument("--quiet", action="store_true", help="no display on stderr")
    parser.set_defaults(handler=run_watch)


class _Latest:
    """The last meter frame received (read by the display thread)."""

    def __init__(self):
        self._lock = threading.Lock()
        self.frame = None

    def put(self, frame):
        with self._lock:
            self.frame = frame

    def __call__(self):
        with self._lock:
            return self.frame


def run_watch(args):
    """Handler of ``rtstage watch``; returns the exit status (0 on a clean stop)."""
    from ..control.client import ControlClient
    from ..control.server import read_token_file
    from ..live.display import LiveDisplay

    from .send import check_client_args

    check_client_args(args)
    if not (math.isfinite(args.rate_hz) and args.rate_hz > 0):
        raise RtstageError(f"--rate-hz must be a positive number, got {args.rate_hz:g}")
    if args.duration is not None and not (math.isfinite(args.duration) and args.duration > 0):
        raise RtstageError(f"--duration must be a positive number of seconds, got {args.duration:g}")
    token = read_token_file(args.token_file) if args.token_file else None
    latest = _Latest()
    stop = threading.Event()
    previous = {sig: signal.signal(sig, lambda *_: stop.set()) for sig in (signal.SIGINT, signal.SIGTERM)}
    client = ControlClient(args.host, args.port, token, timeout_s=args.timeout_s)
    display = None
    failure = []

    def read_frames():
        try:
            for event in client.events:
                handle(event)
            while not stop.is_set():
                if not handle(client.read_line()):
                    break
        except RtstageError as exc:
            if not stop.is_set():
                failure.append(str(exc))
        finally:
            stop.set()

    def handle(event):
        kind = event.get("event")
        if kind == "closing":  # the engine went away or dropped us: a normal end of watching
            print(f"rtstage: watch: server closed the connection: {event.get('reason')}", file=sys.stderr, flush=True)
            return False
        if kind == "meters":
            latest.put(event.get("meters"))
            if args.json:
                print(json.dumps(event.get("meters")), flush=True)
        return True

    reader = threading.Thread(target=read_frames, name="rtstage-watch", daemon=True)
    try:
        client.connect()
        reply = client.request({"op": "subscribe", "rate_hz": args.rate_hz})
        if not reply.get("ok"):
            raise RtstageError(f"subscribe refused: {reply.get('error')}")
        display = LiveDisplay(latest, quiet=args.quiet).start()
        reader.start()
        stop.wait(args.duration)
        stop.set()
    finally:
        if display is not None:
            display.stop()
        client.close()
        if reader.is_alive():
            reader.join(1.0)
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    if failure:
        raise RtstageError(f"watch: {failure[0]}")
    return 0
