"""The ``rtstage send`` subcommand: one request to a running rtstage, or an interactive session.

Also :func:`add_control_arguments`, the ``--control-*`` options a command that
runs a control server (``rtstage live``) adds to its parser, and
:func:`server_from_args`, which builds the server from them.
"""

import json
import sys

from ..errors import RtstageError
from . import DEFAULT_CONTROL_PORT
from .client import ControlClient, parse_words
from .server import ControlServer, read_token_file


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


def run_send(args):
    """Handler of ``rtstage send``; returns the exit status."""
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


def add_control_arguments(parser):
    """Add ``--control-port``, ``--control-host``, ``--control-token-file`` and ``--control-preset-dir``."""
    parser.add_argument("--control-port", type=int, default=DEFAULT_CONTROL_PORT,
                        help=f"TCP port of the control socket (default {DEFAULT_CONTROL_PORT}; 0 = off)")
    parser.add_argument("--control-host", default="127.0.0.1",
                        help="address the control socket listens on (default 127.0.0.1; others need a token)")
    parser.add_argument("--control-token-file", metavar="F",
                        help="file holding the control token (readable by its owner only)")
    parser.add_argument("--control-preset-dir", metavar="DIR", default=None,
                        help="directory of parameter presets for preset_load/preset_save and program changes")


def server_from_args(args, controller):
    """The control server the ``--control-*`` options ask for, not started; None when the port is 0."""
    if args.control_port == 0:
        return None
    if not 0 < args.control_port < 65536:
        raise RtstageError(f"--control-port must be 0 (off) or 1..65535, got {args.control_port}")
    token = read_token_file(args.control_token_file) if args.control_token_file else None
    return ControlServer(controller, host=args.control_host, port=args.control_port, token=token)


def add_midi_arguments(parser):
    """Add ``--midi-api``, ``--midi-in``, ``--midi-out``, ``--midi-map`` and ``--midi-virtual``."""
    parser.add_argument("--midi-api", default="auto", choices=("auto", "jack", "alsa", "coremidi", "winmm"),
                        help="MIDI API (default auto: the first that works, in this order)")
    parser.add_argument("--midi-in", metavar="NAME", help="MIDI input port: a name substring (client numbers ignored)")
    parser.add_argument("--midi-out", metavar="NAME", help="MIDI output port for value feedback: a name substring")
    parser.add_argument("--midi-map", metavar="MAP", default="default",
                        help="controller map: a name in presets/midi/ or a path to a .toml (default: default)")
    parser.add_argument("--midi-virtual", action="store_true",
                        help="open virtual ports control-in/control-out instead of connecting by name")


def midi_from_args(args, controller):
    """The :class:`~rtstage.control.midi.MidiControl` the ``--midi-*`` options ask for, not started; None without MIDI."""
    if not (args.midi_in or args.midi_out or args.midi_virtual):
        return None
    from .midi import MidiControl, load_map

    return MidiControl(controller, load_map(args.midi_map), api=args.midi_api, in_port=args.midi_in,
                       out_port=args.midi_out, virtual=args.midi_virtual)
