"""Worked examples printed at the end of every command's ``--help``.

Each command's help ends with two or three examples on one scenario of our
own: a 24-bit studio feed going out over a 16-bit transmitter link.  The
examples are kept here, in one place, so they read as one story and can be
checked together (``tests/test_cli_help.py`` parses every one of them with the
real parser).
"""

import argparse
import textwrap

EXAMPLES = {
    "render": """\
  # the studio's 24-bit evening bulletin, requantized for the 16-bit transmitter link
  rtstage render bulletin-24.wav bulletin-16.wav --preset link16 --seed 7

  # the same, with the meter report, its figures and a loudness check against EBU R 128
  rtstage render bulletin-24.wav bulletin-16.wav --preset link16 --seed 7 \\
      --report bulletin.json --plot bulletin-plots --loudness-target ebu-r128

  # in a script: no log lines, one JSON summary on stdout
  rtstage render bulletin-24.wav bulletin-16.wav --preset link16 --seed 7 --quiet --json""",
    "pipe": """\
  # a 48 kHz float feed from the studio router to the 16-bit link encoder's stdin
  studio-feed | rtstage pipe --samplerate 48000 --channels 2 --in-format f32le --out-format s16le \\
      --preset link16 | link-encoder

  # a 24-bit capture requantized to 20 bits for the archive copy of the night shift
  rtstage pipe --samplerate 96000 --channels 2 --in-format s24le --out-format s24le --bits 20 \\
      < night-24.raw > night-20.raw""",
    "demo": """\
  # the offline demonstration at the link's rate: noise, weighting and modulation per dither
  rtstage demo --offline --samplerate 48000

  # the live demonstration on the monitoring interface, ten seconds per pass (monitor level down first)
  rtstage demo --device "monitor" --seconds 10 --out demo-pass""",
    "report": """\
  # the figures of last night's link render, as pictures
  rtstage report bulletin.json --plot bulletin-plots

  # the right channel of a live status file
  rtstage report link-status.json --plot link-plots --channel 2""",
    "measure": """\
  # a 16-bit transmitter feed recorded off air: bits in use, dither, peaks, loudness
  rtstage measure air-capture.wav

  # a finished programme against EBU R 128, with the figures and pictures kept
  rtstage measure evening-news.flac --loudness-target ebu-r128 --report news.json --plot news-plots

  # the station's own target, -24 LUFS +- 1 LU, true peak at most -2 dBTP; JSON on stdout
  rtstage measure promo.wav --loudness-target=-24:1:-2 --json""",
    "shaper": """\
  # the shipped shapers, their figures at the link's rate
  rtstage shaper list --samplerate 48000

  # a gentle 9-tap design for the 48 kHz link, saved as a preset
  rtstage shaper design --samplerate 48000 --taps 9 --max-noise-gain-db 6 --id link-soft9-48k --save link-soft9-48k.toml

  # the noise transfer function of the link's shaper, as a picture
  rtstage shaper plot gentle9-48k --png gentle9-48k.png""",
    "shaper list": """\
  # every shaper with its figures at the link's rate
  rtstage shaper list --samplerate 48000

  # the same as JSON for a script
  rtstage shaper list --samplerate 48000 --json""",
    "shaper design": """\
  # a gentle 9-tap design for the 48 kHz link (total noise gain at most 6 dB), saved as a preset
  rtstage shaper design --samplerate 48000 --taps 9 --max-noise-gain-db 6 --id link-soft9-48k --save link-soft9-48k.toml

  # a strong design for the 96 kHz archive master, minimising A-weighted noise
  rtstage shaper design --samplerate 96000 --taps 12 --weighting inv-a --id archive-a12-96k""",
    "shaper plot": """\
  # the link's shaper as a picture (same style as the report's shaper-ntf.png)
  rtstage shaper plot gentle9-48k --png gentle9-48k.png

  # a 44.1 kHz design read at 48 kHz: where its noise lands when the rate is wrong
  rtstage shaper plot thr9-44k1 --samplerate 48000 --png wrong-rate.png""",
    "send": """\
  # lower the link's word length to 14 bits during the test hour
  rtstage send --port 47231 set bits=14

  # ask the running link for its meters, JSON on stdout
  rtstage send --port 47231 '{"op": "meters"}'""",
    "run": """\
  # the 16-bit transmitter link, live on the studio interface, with a control socket
  rtstage run --device "studio" --preset link16 --control-port 47231

  # rehearse the link from the bulletin file, recording what goes to air (monitor level down first)
  rtstage run --source bulletin-24.wav --device "studio" --preset link16 --seed 7 --tap air.wav --duration 60

  # checked against EBU R 128 in the live display
  rtstage run --device "studio" --preset link16 --loudness-target ebu-r128""",
    "feed": """\
  # start the link's feed file from the commented example, then check it (no device is opened)
  rtstage feed example > link-a.toml
  rtstage feed check link-a.toml

  # the template unit, one instance per feed file in /etc/rtstage
  rtstage feed unit rtstage > rtstage@.service""",
    "feed check": """\
  # is the link's feed file valid, and what does it resolve to?
  rtstage feed check /etc/rtstage/link-a.toml

  # the same as JSON, for the station's configuration management
  rtstage feed check /etc/rtstage/link-a.toml --json""",
    "feed example": """\
  # a commented feed file to start the transmitter link's from
  rtstage feed example > /etc/rtstage/link-a.toml

  # read it on the terminal first
  rtstage feed example | less""",
    "feed unit": """\
  # the template unit for systemd, installed as rtstage@.service
  rtstage feed unit rtstage > /etc/systemd/system/rtstage@.service

  # feed files kept elsewhere, and rtstage run from a fixed virtual environment
  rtstage feed unit rtstage --feed-dir /srv/feeds --exec "/opt/rtstage/.venv/bin/rtstage" > rtstage@.service""",
    "devices": """\
  # which interface carries the link
  rtstage devices

  # the same as JSON, for the station's setup script
  rtstage devices --json""",
    "watch": """\
  # the link's meters from another terminal
  rtstage watch --port 47231

  # one minute of meter frames as JSON lines for the shift log
  rtstage watch --port 47231 --duration 60 --json --quiet > link-meters.jsonl""",
    "feed": """\
  # start the transmitter link's feed file from the commented example, then check it
  rtstage feed example > link-a.toml
  rtstage feed check link-a.toml

  # the systemd unit that runs every feed file of the station
  rtstage feed unit > rtstage@.service""",
    "feed check": """\
  # the transmitter link's feed file, resolved and validated without opening a device
  rtstage feed check link-a.toml

  # the same as JSON for the station's deployment script
  rtstage feed check link-a.toml --json""",
    "feed example": """\
  # a commented feed file for a 16-bit transmitter link, to edit
  rtstage feed example > link-a.toml

  # read it on screen first
  rtstage feed example""",
    "feed unit": """\
  # the template unit for the station's feeds (install as rtstage@.service)
  rtstage feed unit > rtstage@.service

  # the unit for the link's feed with the feed files kept elsewhere
  rtstage feed unit link-a --feed-dir /srv/feeds""",
}
"""Examples by command (``shaper design`` for sub-commands)."""


def add_examples(name, parser):
    """End ``parser``'s help with the examples of command ``name`` (raw, as written).

    The description is wrapped here, since a raw formatter keeps it as given.
    """
    text = EXAMPLES.get(name)
    if not text or parser.epilog:  # a command that writes its own worked example keeps it
        return
    if parser.description and "\n" not in parser.description:
        parser.description = textwrap.fill(parser.description, 79)
    parser.epilog = "examples:\n" + text + "\n"
    parser.formatter_class = argparse.RawDescriptionHelpFormatter


def add_all_examples(subparsers_action):
    """Add the examples to every command and sub-command registered on ``subparsers_action``."""
    for name, parser in subparsers_action.choices.items():
        add_examples(name, parser)
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                for sub, subparser in action.choices.items():
                    add_examples(f"{name} {sub}", subparser)
