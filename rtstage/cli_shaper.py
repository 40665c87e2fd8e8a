"""The ``rtstage shaper`` subcommand: list, design and plot noise shapers."""


def register(subparsers):
    """Add the ``shaper`` parser to ``subparsers``."""
    parser = subparsers.add_parser("shaper", help="list, design and plot noise shapers")
    parser.set_defaults(handler=lambda args: parser.print_help() or 2)
