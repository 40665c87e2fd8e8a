"""``rtstage feed``: check a feed file, print an example, print the template unit."""

import json
import sys

from ..errors import RtstageError


def _usage(args):
    from ..files.exits import UsageError

    raise UsageError("feed: give an action: check, example or unit ('rtstage feed --help' describes them)")


def register(subparsers):
    """Add the ``feed`` command with ``check``, ``example`` and ``unit``."""
    feed = subparsers.add_parser("feed", help="feed files for running around the clock (docs/service.md)",
                                 description="Feed files: one TOML file per long-running feed.")
    sub = feed.add_subparsers(dest="feed_command", metavar="ACTION")
    check = sub.add_parser("check", help="validate a feed file and print the resolved configuration (opens no device)")
    check.add_argument("path", metavar="FEED.toml")
    check.add_argument("--json", action="store_true", help="print the resolved configuration as JSON")
    check.set_defaults(handler=check_command)
    example = sub.add_parser("example", help="print a commented example feed file")
    example.set_defaults(handler=example_command)
    unit = sub.add_parser("unit", help="print the template systemd unit (install as NAME@.service)")
    unit.add_argument("name", nargs="?", default="rtstage", help="unit name without @.service (default rtstage)")
    unit.add_argument("--feed-dir", default="/etc/rtstage", help="directory of the feed files (default /etc/rtstage)")
    unit.add_argument("--exec", dest="exec_command", help="command that runs rtstage (default: this Python with -m rtstage)")
    unit.set_defaults(handler=unit_command)
    feed.set_defaults(handler=_usage)


def _run_parser():
    from . import build_parser

    parser = build_parser()
    for action in parser._subparsers._group_actions:
        return parser, action.choices["run"]
    raise RtstageError("the run command is missing")


def resolve(path):
    """The resolved configuration of feed ``path``: ``(feed, {section.key: (value, origin)}, settings dict)``."""
    from ..service import feed as F
    from ..service.runner import load_run_feed, settings_with_feed
    from .options import settings_from_args

    parser, _ = _run_parser()
    args = parser.parse_args(["run", "--feed", path])
    feed = load_run_feed(args)
    origin = args._feed_origin
    out = {}
    for section, keys in F.SCHEMA.items():
        for key, (_, dest, _) in keys.items():
            if dest is not None:
                out[f"{section}.{key}"] = (getattr(args, dest), origin.get(dest, "default"))
            elif key in feed.values.get(section, {}):
                out[f"{section}.{key}"] = (feed.values[section][key], "feed")
    seed_given = args.seed is not None
    settings = settings_with_feed(settings_from_args(args), feed)
    if args.samplerate:
        settings = settings.resolved(args.samplerate)  # a shaper family becomes the design for the feed's rate
    s = settings.to_dict()
    if not seed_given:
        s["seed"] = None
    return feed, out, s


def _toml(value):
    if value is None:
        return None
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    return json.dumps(str(value))


def check_command(args):
    """Handler of ``rtstage feed check``."""
    feed, resolved, settings = resolve(args.path)
    if args.json:
        print(json.dumps({"feed": feed.name, "file": feed.path,
                          "options": {k: {"value": v, "from": o} for k, (v, o) in resolved.items()},
                          "engine_settings": settings}, indent=1, default=str))
        return 0
    print(f"# feed {feed.name!r} from {feed.path}: valid; resolved configuration (value  # where it came from)")
    section = None
    for key, (value, origin) in resolved.items():
        sec, name = key.split(".", 1)
        if sec != section:
            section = sec
            print(f"\n[{sec}]")
        text = _toml(value)
        if text is None:
            print(f"# {name} = (not set)  # {origin}")
        else:
            print(f"{name} = {text}  # {origin}")
    print("\n# engine settings at start (seed null: drawn at start and logged)")
    print("# " + json.dumps(settings, default=str))
    return 0


def example_command(args):
    """Handler of ``rtstage feed example``."""
    from ..service.feed import EXAMPLE

    sys.stdout.write(EXAMPLE)
    return 0


def unit_command(args):
    """Handler of ``rtstage feed unit``."""
    from ..service.feed import unit_text

    sys.stdout.write(unit_text(args.name, args.exec_command, args.feed_dir))
    return 0
