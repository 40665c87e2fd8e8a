"""Every command's --help ends with worked examples, and every example parses with the real parser."""

import argparse
import re
import shlex

import pytest

from rtstage.cli import build_parser
from rtstage.cli.examples import EXAMPLES


def _commands():
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    out = []
    for name, p in sub.choices.items():
        out.append((name, p))
        for action in p._actions:
            if isinstance(action, argparse._SubParsersAction):
                out.extend((f"{name} {s}", sp) for s, sp in action.choices.items())
    return out


@pytest.mark.parametrize("name, parser", _commands(), ids=lambda v: v if isinstance(v, str) else "")
def test_help_ends_with_two_or_three_examples(name, parser):
    text = parser.format_help()
    if name not in EXAMPLES:
        # A command with its own worked example in its epilog (linktest): at least two command lines.
        assert parser.epilog and sum(line.lstrip().startswith("rtstage ") for line in parser.epilog.splitlines()) >= 2
        return
    tail = text[text.index("examples:"):]
    commands = [line for line in tail.splitlines() if "rtstage " in line and not line.strip().startswith("#")]
    assert 2 <= len(commands) <= 3, name
    assert text.rstrip().endswith(EXAMPLES[name].rstrip().splitlines()[-1].strip())


def _example_argvs():
    for name, text in EXAMPLES.items():
        joined = re.sub(r"\\\n\s*", " ", text)
        for line in joined.splitlines():
            line = line.strip()
            if not line or line.startswith("#"):
                continue
            # Keep the rtstage part of a shell pipeline or redirection.
            part = line[line.index("rtstage "):]
            part = re.split(r"\s[|<>]\s", part)[0]
            yield name, shlex.split(part)[1:]


@pytest.mark.parametrize("name, argv", list(_example_argvs()))
def test_every_example_parses(name, argv):
    # argparse exits (SystemExit) on any option or argument the command does not take.
    args = build_parser().parse_args(argv)
    assert argv[0] == name.split()[0] and callable(getattr(args, "handler", None))


def test_one_command_parser_is_the_full_parsers_subparser():
    # main() registers only the command named on the command line (so `rtstage render` imports no
    # live engine); that parser must accept and document exactly what the full parser does.
    from rtstage.cli import COMMAND_MODULES

    full = dict(_commands())
    for module in COMMAND_MODULES:
        name = module.rsplit(".", 1)[1]
        sub = next(a for a in build_parser(name)._actions if isinstance(a, argparse._SubParsersAction))
        assert list(sub.choices) == [name]
        assert sub.choices[name].format_help() == full[name].format_help()
    sub = next(a for a in build_parser("no-such-command")._actions if isinstance(a, argparse._SubParsersAction))
    assert len(sub.choices) == len(COMMAND_MODULES)
