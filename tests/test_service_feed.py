"""The feed file: strict checks naming file, key and reason; command-line overrides; ``rtstage feed``.

TOML is parsed by Python's ``tomllib`` (the TOML 1.0 reference parser in the
standard library); the example and the unit are checked by parsing them
back: the example with ``tomllib`` and our own checks, the unit with
``configparser`` (systemd unit files are INI-like key=value sections, as
systemd.syntax(7) describes; from memory).
"""

import configparser
import subprocess
import sys
import tomllib

import pytest

from rtstage.cli import build_parser
from rtstage.errors import RtstageError
from rtstage.service import feed as F
from rtstage.service.runner import load_run_feed, settings_with_feed

import os

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def write(tmp_path, text, name="link.toml"):
    path = tmp_path / name
    path.write_text(text)
    return str(path)


def run_args(argv):
    return build_parser().parse_args(["run", *argv])


@pytest.mark.parametrize("text, key, reason", [
    ("[audio]\nblocksize = 0\n", "audio.blocksize", "must be an integer at least 1"),
    ("[audio]\nblocksize = 256.0\n", "audio.blocksize", "must be an integer"),
    ("[audio]\nsamplerat = 48000\n", "audio.samplerat", "unknown key"),
    ("[sound]\nx = 1\n", "sound", "unknown section"),
    ("[engine]\nbits = 40\n", "engine.bits", "between 2 and 24"),
    ("[engine]\ndither = \"pink\"\n", "engine.dither", "unknown dither"),
    ("[engine]\nmute = 1\n", "engine.mute", "true or false"),
    ("[engine]\nshaper = \"lvw-me9\"\ndither = \"none\"\n", "engine", "shaper"),
    ("[tap]\nrotate_s = 60\n", "tap.path", "need a tap path"),
    ("[tap]\npath = \"t.wav\"\nkeep = 0\n", "tap.keep", "at least 1"),
    ("[control]\nport = 70000\n", "control.port", "from 0 to 65535"),
    ("[metrics]\nlisten = true\n", "metrics.listen", "HOST:PORT"),
    ("[audio]\nsource = \"tone:freq_hz=abc\"\n", "audio.source", ""),
    ("audio = 3\n", "audio", "must be a table"),
])
def test_bad_feed_names_file_key_reason(tmp_path, text, key, reason):
    path = write(tmp_path, text)
    with pytest.raises(RtstageError) as err:
        F.load_feed(path)
    message = str(err.value)
    assert message.startswith(f"feed {path}: {key}")
    assert reason in message
    assert "\n" not in message  # one line


def test_not_toml_and_missing(tmp_path):
    with pytest.raises(RtstageError, match="not valid TOML"):
        F.load_feed(write(tmp_path, "[audio\n"))
    with pytest.raises(RtstageError, match="no such file"):
        F.load_feed(str(tmp_path / "nothing.toml"))


def test_command_line_overrides_feed_even_with_default_value(tmp_path):
    path = write(tmp_path, "[audio]\nblocksize = 512\nsamplerate = 44100\n[engine]\nbits = 12\nauto_mute = true\n"
                           "[control]\nport = 0\n")
    args = run_args(["--feed", path, "--blocksize", "256"])  # 256 is also the default
    feed = load_run_feed(args)
    assert args.blocksize == 256 and args._feed_origin["blocksize"] == "command line"
    assert args.samplerate == 44100 and args._feed_origin["samplerate"] == "feed"
    assert args.bits == 12 and args.control_port == 0
    assert args.midi_api == "auto" and args._feed_origin["midi_api"] == "default"
    from rtstage.cli.options import settings_from_args

    settings = settings_with_feed(settings_from_args(args), feed)
    assert settings.bits == 12 and settings.auto_mute is True  # an [engine] key without an option


def test_defaults_without_feed():
    args = run_args([])
    assert load_run_feed(args) is None
    assert args.blocksize == 256 and args.control_port == 47231 and args.tap is None
    assert args.accept_unsafe_shaping is False


def test_metrics_refuses_non_loopback_without_option():
    # 192.0.2.0/24 is TEST-NET-1 (RFC 5737): parsed here, never sent to
    args = run_args(["--metrics", "192.0.2.1:9000"])
    with pytest.raises(RtstageError, match="not a loopback address"):
        load_run_feed(args)
    args = run_args(["--metrics", "192.0.2.1:9000", "--metrics-listen-any"])
    load_run_feed(args)
    args = run_args(["--osc", "[::1]:9000"])
    load_run_feed(args)


def test_restart_changes_lists_device_keys(tmp_path):
    a = F.load_feed(write(tmp_path, "[audio]\nblocksize = 256\n[engine]\nbits = 16\n", "a.toml"))
    b = F.load_feed(write(tmp_path, "[audio]\nblocksize = 512\n[engine]\nbits = 12\n", "b.toml"))
    assert F.restart_changes(a, b) == [("audio.blocksize", 256, 512)]


def _rtstage(*argv):
    env = dict(os.environ, PYTHONPATH=ROOT)
    return subprocess.run([sys.executable, "-m", "rtstage", *argv], capture_output=True, text=True, cwd=ROOT,
                          env=env, timeout=120)


def test_example_is_valid_and_check_prints_resolution(tmp_path):
    example = _rtstage("feed", "example")
    assert example.returncode == 0
    tomllib.loads(example.stdout)  # TOML 1.0 (tomllib)
    path = write(tmp_path, example.stdout)
    feed = F.load_feed(path)
    assert feed.name == "link-a"
    check = _rtstage("feed", "check", path, "--json")
    assert check.returncode == 0, check.stderr
    import json

    resolved = json.loads(check.stdout)
    assert resolved["options"]["audio.blocksize"] == {"value": 256, "from": "feed"}
    assert resolved["options"]["control.host"] == {"value": "127.0.0.1", "from": "default"}
    with open(os.path.join(ROOT, "presets", "link16.toml"), "rb") as f:
        preset_shaper = tomllib.load(f)["shaper"]
    # the preset's shaper (a family resolves to its design for the feed's 48 kHz)
    assert resolved["engine_settings"]["shaper"] in (preset_shaper, f"{preset_shaper}-48k")
    bad = _rtstage("feed", "check", write(tmp_path, "[audio]\nblocksize = -1\n", "bad.toml"))
    assert bad.returncode == 2 and bad.stderr.startswith("rtstage: feed ") and "audio.blocksize" in bad.stderr
    assert bad.stderr.count("\n") == 1


def test_unit_template_passes_systemd_analyze_verify(tmp_path):
    """systemd's own unit parser (``systemd-analyze verify``, package systemd) reads the unit without a complaint."""
    unit = _rtstage("feed", "unit", "rtstage").stdout
    (tmp_path / "rtstage@.service").write_text(unit)
    (tmp_path / "rtstage@link-a.service").symlink_to("rtstage@.service")
    ok = subprocess.run(["systemd-analyze", "verify", "--man=no", "rtstage@link-a.service"], cwd=tmp_path,
                        capture_output=True, text=True, timeout=60)
    assert ok.returncode == 0 and ok.stderr.strip() == "", ok.stderr
    # the check can fail: a misspelt key is reported
    (tmp_path / "typo@.service").write_text(unit.replace("WatchdogSec=", "WatchdogSecs="))
    (tmp_path / "typo@link-a.service").symlink_to("typo@.service")
    bad = subprocess.run(["systemd-analyze", "verify", "--man=no", "typo@link-a.service"], cwd=tmp_path,
                         capture_output=True, text=True, timeout=60)
    assert "Unknown key" in bad.stderr and "WatchdogSecs" in bad.stderr


def test_unit_template():
    unit = _rtstage("feed", "unit", "rtstage")
    assert unit.returncode == 0
    parser = configparser.ConfigParser(strict=False, interpolation=None)
    parser.optionxform = str
    parser.read_string(unit.stdout)
    service = parser["Service"]
    assert service["Type"] == "notify"
    assert service["Restart"] == "on-failure"
    assert int(service["WatchdogSec"]) > 0
    assert "LimitRTPRIO" in service and service["LimitMEMLOCK"] == "infinity"
    assert "--feed /etc/rtstage/%i.toml" in service["ExecStart"]
    # options that would break audio are not set (see the comment in the unit)
    for key in ("PrivateDevices", "MemoryDenyWriteExecute", "RestrictRealtime"):
        assert key not in service
