"""``rtstage send``: one request to a running rtstage, or an interactive session."""

import json
import math
import sys

from ..control import DEFAULT_CONTROL_PORT
from ..control.client import ControlClient, parse_words
from ..control.server import read_token_file
from ..errors import RtstageError


def register(subparsers):
    """Add the ``send`` parser to ``subparsers``."""
    parser = subparsers.add_parser(
        "send",
        help="send a control request to a running rtstage and print the reply",
        description="Send one request (a JSON object, or OP [NAME=VALUE …]) and print the reply on stdout; "
        "exit status 0 only when the reply is ok.  Without REQUEST (or with -i), read one request per line "
        "from stdin and print every reply and event.",
    )
    parser.add_argument("request", nargs="*", metavar="REQUEST",
                        help='e.g. \'{"op": "set", "values": {"bits": 12}}\' or: set bits=12 dither=rpdf')
    parser.add_argument("--host", default="127.0.0.1", help="server address (default 127.0.0.1)")
    parser.add_argument("--port", type=int, default=DEFAULT_CONTROL_PORT, help=f"server port (default {DEFAULT_CONTROL_PORT})")
    parser.add_argument("--token-file", metavar="F", help="file holding the token (readable by its owner only)")
    parser.add_argument("--timeout-s", type=float, default=5.0, help="seconds to wait for a reply (default 5)")
    parser.add_argument("-i", "--interactive", action="store_true", help="read requests from stdin")
    parser.set_defaults(handler=run_send)


def check_client_args(args):
    """Refuse a port or timeout the client cannot use (one line, exit status 2)."""
    if not 0 < args.port < 65536:
        raise RtstageError(f"--port must be 1..65535, got {args.port}")
    if not (math.isfinite(args.timeout_s) and args.timeout_s > 0):
        raise RtstageError(f"--timeout-s must be a positive number of seconds, got {args.timeout_s:g}")


def run_send(args):
    """Handler of ``rtstage send``; returns the exit status."""
    check_client_args(args)
    token = read_token_file(args.token_file) if args.token_file else None
    if args.request and not args.interactive:
        obj = parse_words(args.request)
        with ControlClient(args.host, args.port, token, args.timeout_s) as client:
            reply = client.request(obj)
        print(json.dumps(reply), flush=True)
        return 0 if reply.get("ok") else 1
    return _interactive(args, token)


def _interactive(args, token):
    status = 0
    with ControlClient(args.host, args.port, token, args.timeout_s) as client:
        print(json.dumps(client.greeting), flush=True)
        for line in sys.stdin:
            words = line.split() if not line.lstrip().startswith("{") else [line.strip()]
            if not words:
                continue
            try:
                reply = client.request(parse_words(words))
            except RtstageError as exc:
                if "closed the connection" in str(exc):
                    raise
                print(f"rtstage: {exc}", file=sys.stderr, flush=True)
                status = 1
                continue
            for event in client.events:
                print(json.dumps(event), flush=True)
            client.events.clear()
            print(json.dumps(reply), flush=True)
            if not reply.get("ok"):
                status = 1
    return status
