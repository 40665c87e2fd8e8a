"""The ``rtstage`` command line.

Each subcommand lives in its own module of this package, which exposes
``register(subparsers)``: it adds its parser and sets ``handler`` (a callable
taking the parsed arguments and returning the exit status).  Shared options
are in :mod:`rtstage.cli.options`.  This package sits on top of every other
layer; nothing in rtstage imports it.  Errors raised as
:class:`rtstage.RtstageError` become one line on stderr and their exit status
(2 unless the error says otherwise); every other way out is mapped by
:mod:`rtstage.files.exits` (1 run-time failure, 128+N for signal N, a crash
log for an internal error), never a traceback.
"""

import importlib
import sys

from .. import __version__
from ..files.exits import Parser, UsageError, run_guarded
from ..files.policy import install_signal_handlers
from .examples import add_all_examples

COMMAND_MODULES = (
    "rtstage.cli.render",
    "rtstage.cli.pipe",
    "rtstage.cli.demo",
    "rtstage.cli.report",
    "rtstage.cli.measure",
    "rtstage.cli.shaper",
    "rtstage.cli.send",
    "rtstage.cli.run",
    "rtstage.cli.devices",
    "rtstage.cli.watch",
    "rtstage.cli.feed",
    "rtstage.cli.linktest",
)
"""Modules that register subcommands, in the order ``--help`` lists them; each registers the command its name ends with."""


def build_parser(command=None):
    """The argument parser (usage errors become one line, see :class:`rtstage.files.exits.Parser`).

    Parameters
    ----------
    command : str or None
        A command name: register that command alone, so that a command
        imports only what it needs (``rtstage render`` starts without the
        live engine and without numba).  None, or a name that is no
        command: register every command (``--help``, and the message that
        lists the commands).
    """
    parser = Parser(
        prog="rtstage",
        description="Real-time output stage: dithered requantization to a shorter word length, live or offline.",
        epilog="Exit status: 0 done, 1 run-time failure (I/O, unreachable server, internal error), "
        "2 bad input or usage, 128+N interrupted by signal N (130 SIGINT, 143 SIGTERM, 129 SIGHUP).",
    )
    parser.add_argument("--version", action="version", version=f"rtstage {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    modules = [m for m in COMMAND_MODULES if m.rsplit(".", 1)[1] == command] or COMMAND_MODULES
    for name in modules:
        importlib.import_module(name).register(subparsers)
    add_all_examples(subparsers)
    return parser


def main(argv=None):
    """Run the command line; returns the exit status.

    Every way out is one line on stderr at most and a documented status
    (:mod:`rtstage.files.exits`); SIGINT, SIGTERM and SIGHUP remove the
    temporary files of unfinished outputs (:mod:`rtstage.files.policy`).
    """
    install_signal_handlers()

    def command():
        args_given = sys.argv[1:] if argv is None else argv
        parser = build_parser(args_given[0] if args_given and not args_given[0].startswith("-") else None)
        args, extra = parser.parse_known_args(argv)
        if extra:  # name the command whose options they are not
            choices = parser._subparsers._group_actions[0].choices
            (choices.get(args.command) or parser).error(f"unrecognized arguments: {' '.join(extra)}")
        if getattr(args, "handler", None) is None:
            names = ", ".join(sorted(parser._subparsers._group_actions[0].choices))
            raise UsageError(f"give a command: {names} ('rtstage --help' describes them)")
        return args.handler(args)

    return run_guarded(command, argv=None if argv is None else ["rtstage", *argv])
