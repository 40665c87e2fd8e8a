"""The ``rtstage`` command line.

Each subcommand lives in its own module of this package, which exposes
``register(subparsers)``: it adds its parser and sets ``handler`` (a callable
taking the parsed arguments and returning the exit status).  Shared options
are in :mod:`rtstage.cli.options`.  This package sits on top of every other
layer; nothing in rtstage imports it.  Errors raised as
:class:`rtstage.RtstageError` become one line on stderr and exit status 2.
"""

import argparse
import importlib
import sys

from .. import __version__
from ..errors import RtstageError
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
"""Modules that register subcommands, in the order ``--help`` lists them."""


def build_parser():
    """The full argument parser."""
    parser = argparse.ArgumentParser(
        prog="rtstage",
        description="Real-time output stage: dithered requantization to a shorter word length, live or offline.",
    )
    parser.add_argument("--version", action="version", version=f"rtstage {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(name).register(subparsers)
    add_all_examples(subparsers)
    return parser


def main(argv=None):
    """Run the command line; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "handler", None) is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(args.handler(args) or 0)
    except RtstageError as exc:
        from ..log import error_line

        print(error_line(exc), file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
