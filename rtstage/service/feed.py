"""The feed file: one TOML file with everything a long-running feed needs.

A feed file replaces the long ``rtstage run`` command line of a feed that
runs for months (a 16-bit feed to a transmitter link, say): the device or
source, sample rate and block size, the engine settings or a preset, the tap
and the automation log with their rotation, the control paths (JSON socket,
MIDI, OSC), the metrics endpoint and the real-time wishes.  Options given on
the command line override the file, key by key.

Every key is checked when the file is read: an unknown section or key, a
value of the wrong type or out of range, stops with one line naming the
file, the key and the reason (``rtstage: feed FILE: audio.blocksize: must
be a positive integer, got 0``).  :data:`SCHEMA` is the list of keys;
``rtstage feed example`` prints a commented file with all of them.

Reload (SIGHUP)
---------------
The service re-reads the file on SIGHUP.  Changed ``[engine]`` values go
through the same control path as a socket or MIDI change: validated, applied
at a block boundary, logged with their sample index (and written to the
automation log), so the output has no gap and re-renders bit for bit.  A
changed key anywhere else (device, sample rate, tap, control ports ...)
cannot be applied to a running stream: it is refused with one line saying it
needs a restart, and the rest of the reload still applies.
"""

import math
import os
from dataclasses import dataclass, field

from .. import params
from ..errors import RtstageError
from ..files.tomlread import load_toml

# ----------------------------------------------------------------------------- value checks


def _int(lo=None, hi=None):
    def check(v):
        if isinstance(v, bool) or not isinstance(v, int):
            raise ValueError(f"must be an integer, got {v!r}")
        if lo is not None and v < lo or hi is not None and v > hi:
            rng = f"at least {lo}" if hi is None else f"from {lo} to {hi}"
            raise ValueError(f"must be an integer {rng}, got {v}")
        return v
    check.kind = "integer"
    return check


def _float(lo=None, lo_open=False):
    def check(v):
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise ValueError(f"must be a finite number, got {v!r}")
        if lo is not None and (v <= lo if lo_open else v < lo):
            raise ValueError(f"must be {'above' if lo_open else 'at least'} {lo:g}, got {v:g}")
        return float(v)
    check.kind = "number"
    return check


def _bool(v):
    if not isinstance(v, bool):
        raise ValueError(f"must be true or false, got {v!r}")
    return v


_bool.kind = "boolean"


def _str(v):
    if not isinstance(v, str) or not v:
        raise ValueError(f"must be a non-empty string, got {v!r}")
    return v


_str.kind = "string"


def _device(v):
    if isinstance(v, bool) or not isinstance(v, (str, int)):
        raise ValueError(f"must be a device index or a name substring, got {v!r}")
    return v


_device.kind = "index or name"


def _choice(*choices):
    def check(v):
        if v not in choices:
            raise ValueError(f"must be one of {', '.join(choices)}, got {v!r}")
        return v
    check.kind = "|".join(choices)
    return check


def _listen(v):
    if isinstance(v, bool) or not isinstance(v, (str, int)):
        raise ValueError(f"must be \"HOST:PORT\" or a port number, got {v!r}")
    return str(v)


_listen.kind = "HOST:PORT"


def _param(name):
    def check(v):
        try:
            return params.validate(name, v)
        except RtstageError as exc:
            raise ValueError(str(exc)) from None
    check.kind = params.PARAMS[name].kind
    return check


# ----------------------------------------------------------------------------- schema

DEVICE_SECTIONS = ("audio",)
"""Sections whose change needs a restart of the stream."""

SCHEMA = {
    "feed": {
        "name": (_str, None, "name of the feed (labels metrics and status; default: the file name)"),
    },
    "audio": {
        "device": (_device, "device", "device for input and output: index or name substring"),
        "input_device": (_device, "input_device", "input device (index or name)"),
        "output_device": (_device, "output_device", "output device (index or name)"),
        "hostapi": (_device, "hostapi", "host API to choose devices from"),
        "source": (_str, "source", "input instead of the input device: a sound file, 'silence', 'tone:...', 'noise:...'"),
        "loop": (_bool, "loop", "loop a file source"),
        "samplerate": (_int(1), "samplerate", "sample rate in Hz"),
        "blocksize": (_int(1), "blocksize", "frames per callback"),
        "channels": (_int(1), "channels", "channel count"),
        "latency_s": (_float(0.0, lo_open=True), "latency", "suggested device latency in seconds"),
        "callback": (_choice("compiled", "python"), "callback", "callback mode (python: diagnosis only)"),
        "settle_s": (_float(0.0), "settle", "start-up seconds whose flagged callbacks are reported apart"),
    },
    "engine": {
        "preset": (_str, "preset", "engine preset id or path; the keys below override it"),
        "accept_unsafe_shaping": (_bool, "accept_unsafe_shaping",
                                  "accept settings theory marks unsafe (warned on every use; Lipshitz, Wannamaker & "
                                  "Vanderkooy, JAES 2004)"),
        **{name: (_str if name == "shaper" else _param(name),  # a shaper family resolves by rate, as on the command line
                  name if name in ("bits", "dither", "shaper", "seed", "gain_db", "dither_scale") else None,
                  params.PARAMS[name].description) for name in params.ENGINE_FIELDS},
    },
    "meters": {
        "loudness_target": (_str, "loudness_target", "loudness target the output is checked against: ebu-r128, "
                            "or LUFS[:TOLERANCE_LU[:TRUE_PEAK_DBTP]]"),
    },
    "tap": {
        "path": (_str, "tap", "tap file (with rotation: the first segment's name pattern, see docs/service.md)"),
        "rotate_s": (_float(0.0, lo_open=True), "tap_rotate_s", "start a new segment after this many seconds of audio"),
        "rotate_mb": (_float(0.0, lo_open=True), "tap_rotate_mb", "start a new segment after this many megabytes"),
        "keep": (_int(1), "tap_keep", "keep only the newest N segments (retention)"),
    },
    "automation_log": {
        "path": (_str, "automation_log", "automation log (rotates with the tap's segments)"),
    },
    "control": {
        "port": (_int(0, 65535), "control_port", "TCP port of the JSON control socket (0: off)"),
        "host": (_str, "control_host", "address of the control socket"),
        "token_file": (_str, "control_token_file", "file holding the control token"),
        "preset_dir": (_str, "control_preset_dir", "directory of parameter presets"),
        "rate_hz": (_float(0.0, lo_open=True), "control_rate_hz", "requests per second per client"),
        "burst": (_float(0.0, lo_open=True), "control_burst", "request burst per client"),
    },
    "midi": {
        "api": (_choice("auto", "jack", "alsa", "coremidi", "winmm"), "midi_api", "MIDI API"),
        "in": (_str, "midi_in", "MIDI input port (name substring)"),
        "out": (_str, "midi_out", "MIDI output port for feedback"),
        "map": (_str, "midi_map", "controller map"),
        "virtual": (_bool, "midi_virtual", "open virtual ports"),
    },
    "osc": {
        "listen": (_listen, "osc", "OSC over UDP on HOST:PORT (loopback unless listen_any)"),
        "listen_any": (_bool, "osc_listen_any", "allow a non-loopback OSC address"),
    },
    "metrics": {
        "listen": (_listen, "metrics", "Prometheus metrics over HTTP on HOST:PORT (loopback unless listen_any)"),
        "listen_any": (_bool, "metrics_listen_any", "allow a non-loopback metrics address"),
    },
    "realtime": {
        "lock_memory": (_bool, "lock_memory", "lock the process' memory (mlockall) so audio pages never swap"),
    },
}
"""Section -> key -> (checker, ``rtstage run`` option destination or None, description)."""

ENGINE_ONLY_KEYS = tuple(k for k, (_, dest, _) in SCHEMA["engine"].items() if dest is None)
"""``[engine]`` keys that have no command-line option (set from the feed only)."""


@dataclass
class Feed:
    """A checked feed file.

    Attributes
    ----------
    path : str
        The file.
    values : dict
        Section -> key -> checked value (only the keys the file sets).
    """

    path: str
    values: dict = field(default_factory=dict)

    @property
    def name(self):
        """The feed's name (``feed.name``, else the file name without extension)."""
        return self.values.get("feed", {}).get("name") or os.path.splitext(os.path.basename(self.path))[0]

    def dests(self):
        """``rtstage run`` option destination -> value, for every key that has an option."""
        out = {}
        for section, keys in self.values.items():
            for key, value in keys.items():
                dest = SCHEMA[section][key][1]
                if dest is not None:
                    out[dest] = value
        return out

    def engine_values(self):
        """The ``[engine]`` parameter values the file sets (preset and accept_unsafe_shaping aside)."""
        return {k: v for k, v in self.values.get("engine", {}).items() if k in params.PARAMS}

    def flat(self):
        """``section.key`` -> value."""
        return {f"{s}.{k}": v for s, keys in self.values.items() for k, v in keys.items()}


def load_feed(path):
    """Read and check a feed file.

    Raises
    ------
    RtstageError
        ``feed PATH: KEY: reason`` for the first problem found.
    """
    return check_feed(load_toml(path, f"feed {path}"), path)


def check_feed(data, path="<feed>"):
    """Check parsed TOML ``data`` against :data:`SCHEMA`; returns a :class:`Feed`."""
    values = {}
    for section, keys in data.items():
        if section not in SCHEMA:
            raise RtstageError(f"feed {path}: {section}: unknown section (sections: {', '.join(SCHEMA)})")
        if not isinstance(keys, dict):
            raise RtstageError(f"feed {path}: {section}: must be a table ([{section}])")
        out = values.setdefault(section, {})
        for key, value in keys.items():
            spec = SCHEMA[section].get(key)
            if spec is None:
                raise RtstageError(f"feed {path}: {section}.{key}: unknown key (keys of [{section}]: "
                                   f"{', '.join(SCHEMA[section])})")
            try:
                out[key] = spec[0](value)
            except ValueError as exc:
                raise RtstageError(f"feed {path}: {section}.{key}: {exc}") from None
    feed = Feed(path, values)
    _check_combinations(feed)
    return feed


def _check_combinations(feed):
    v = feed.values
    eng = v.get("engine", {})
    if eng:
        from ..presets import settings_from

        try:
            settings = settings_from(eng.get("preset"), **{k: eng.get(k) for k in
                                                          ("bits", "dither", "shaper", "seed", "gain_db", "dither_scale")},
                                     accept_unsafe=eng.get("accept_unsafe_shaping") or None)
            params.settings_with(settings, {k: eng[k] for k in ENGINE_ONLY_KEYS if k in eng}).validate()
        except RtstageError as exc:
            text = str(exc)
            key = next((k for k in SCHEMA["engine"] if k in eng and k in text), None)
            raise RtstageError(f"feed {feed.path}: engine{'.' + key if key else ''}: {text}") from None
    tap = v.get("tap", {})
    if ("rotate_s" in tap or "rotate_mb" in tap or "keep" in tap) and "path" not in tap:
        raise RtstageError(f"feed {feed.path}: tap.path: rotation and retention need a tap path")
    if "source" in v.get("audio", {}):
        from ..live.sources import parse_source

        try:
            parse_source(v["audio"]["source"])
        except RtstageError as exc:
            raise RtstageError(f"feed {feed.path}: audio.source: {exc}") from None


# ----------------------------------------------------------------------------- command-line overrides


class _Unset:
    """Default of an option a feed may set: "not given on the command line"."""

    def __repr__(self):
        return "<not given>"


UNSET = _Unset()


def defer_defaults(parser):
    """Make every option a feed can set default to :data:`UNSET`; returns the real defaults by destination.

    After parsing, :func:`resolve_args` fills each unset option from the feed,
    else from the real default: so an option given on the command line
    overrides the feed, even when it repeats the default value.
    """
    dests = {dest for keys in SCHEMA.values() for (_, dest, _) in keys.values() if dest}
    defaults = {}
    for action in parser._actions:
        if action.dest in dests:
            defaults[action.dest] = action.default
            action.default = UNSET
    parser.set_defaults(_feed_defaults=defaults)
    return defaults


def resolve_args(args, feed=None):
    """Fill options left unset from ``feed`` (a :class:`Feed` or None), then from their defaults.

    Returns
    -------
    dict
        Destination -> ``"command line"``, ``"feed"`` or ``"default"``: where
        each value came from (printed by ``rtstage feed check``).
    """
    defaults = getattr(args, "_feed_defaults", {})
    from_feed = feed.dests() if feed is not None else {}
    origin = {}
    for dest, default in defaults.items():
        value = getattr(args, dest, UNSET)
        if value is not UNSET:
            origin[dest] = "command line"
        elif dest in from_feed:
            setattr(args, dest, from_feed[dest])
            origin[dest] = "feed"
        else:
            setattr(args, dest, default)
            origin[dest] = "default"
    return origin


def restart_changes(old, new):
    """Keys outside ``[engine]`` whose value differs between two feeds: ``[(key, old, new)]``."""
    a, b = old.flat(), new.flat()
    out = []
    for key in sorted(set(a) | set(b)):
        if key.startswith("engine.") or key.startswith("feed."):
            continue
        if a.get(key) != b.get(key):
            out.append((key, a.get(key), b.get(key)))
    return out


# ----------------------------------------------------------------------------- example and unit

EXAMPLE = '''\
# rtstage feed file (TOML).  Check it with:  rtstage feed check THIS.toml
# Run it with:  rtstage run --feed THIS.toml   (command-line options override it)
# Scenario: a 24-bit studio programme to a 16-bit transmitter link.

[feed]
name = "link-a"                  # labels the metrics and the status line

[audio]
device = "dummy"                 # index or name substring (rtstage devices lists them)
# input_device = "..."           # separate devices, if needed
# output_device = "..."
# hostapi = "JACK Audio Connection Kit"
# source = "tone:freq_hz=997,level_dbfs=-20"   # a generated or file source instead of the input
samplerate = 48000
blocksize = 256                  # frames per callback
channels = 2
# latency_s = 0.01
# settle_s = 1.0

[engine]
preset = "link16"                # presets/link16.toml; the keys below override it
# bits = 16
# dither = "tpdf"
# shaper = "gentle9"             # a family: the design for the feed's rate
# gain_db = 0.0
# seed = 12345                   # fixed seed: taps re-render from the source alone
# auto_mute = true               # mute a channel whose input is exact digital zero
# auto_mute_hold_s = 2.0

[meters]
loudness_target = "ebu-r128"     # pass/fail of the output's loudness (status, metrics)

[tap]
path = "/var/lib/rtstage/link-a/tap.wav"   # the exact words sent to the device
rotate_s = 3600                  # one segment an hour (or rotate_mb = 500)
keep = 168                       # keep a week of hourly segments

[automation_log]
path = "/var/lib/rtstage/link-a/automation.jsonl"   # rotates with the tap

[control]
port = 47231                     # JSON socket on loopback (0: off)
# host = "127.0.0.1"
# token_file = "/etc/rtstage/link-a.token"

# [midi]
# in = "desk knobs"
# out = "desk lights"

[osc]
listen = "127.0.0.1:47232"       # OSC over UDP; another address needs listen_any = true

[metrics]
listen = "127.0.0.1:9823"        # Prometheus scrape endpoint; loopback unless listen_any = true

[realtime]
lock_memory = true               # needs LimitMEMLOCK=infinity in the unit
'''


def unit_text(name="rtstage", python=None, feed_dir="/etc/rtstage"):
    """The template unit ``rtstage@.service`` (one instance per feed file ``%i.toml``).

    Parameters
    ----------
    name : str
        Name of the unit (for the comment lines).
    python : str or None
        Command that runs rtstage (default: ``<this interpreter> -m rtstage``).
    feed_dir : str
        Directory of the feed files.
    """
    import sys

    command = python or f"{sys.executable} -m rtstage"
    docs = os.path.join(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))), "docs",
                        "service.md")
    return f'''\
# {name}@.service: one rtstage feed per instance; the instance name is the feed file's.
# Install:  rtstage feed unit {name} > /etc/systemd/system/{name}@.service
#           systemctl daemon-reload && systemctl enable --now {name}@link-a
# (reads {feed_dir}/link-a.toml; see docs/service.md)
[Unit]
Description=rtstage feed %i
Documentation=file://{docs}
After=sound.target network.target
StartLimitIntervalSec=300
StartLimitBurst=10

[Service]
Type=notify
NotifyAccess=main
# a system user of its own, in the audio group (useradd --system --groups audio rtstage)
User=rtstage
SupplementaryGroups=audio
ExecStart={command} run --feed {feed_dir}/%i.toml --quiet
ExecReload=/bin/kill -HUP $MAINPID
Restart=on-failure
RestartSec=2
WatchdogSec=10
TimeoutStartSec=120
TimeoutStopSec=20
KillSignal=SIGTERM
# Real-time scheduling and locked memory for the audio path
LimitRTPRIO=95
LimitMEMLOCK=infinity
Nice=-5
# Hardening that leaves audio working
NoNewPrivileges=yes
ProtectSystem=strict
ProtectHome=read-only
ReadWritePaths=/var/lib/rtstage
StateDirectory=rtstage
# the compiled callback and kernels are cached here (the program's own tree is read-only)
CacheDirectory=rtstage
Environment=XDG_CACHE_HOME=/var/cache/rtstage NUMBA_CACHE_DIR=/var/cache/rtstage/numba
PrivateTmp=no
ProtectKernelTunables=yes
ProtectKernelModules=yes
ProtectControlGroups=yes
ProtectClock=yes
ProtectHostname=yes
RestrictNamespaces=yes
RestrictSUIDSGID=yes
LockPersonality=yes
SystemCallArchitectures=native
RestrictAddressFamilies=AF_UNIX AF_INET AF_INET6 AF_NETLINK
# Not set, because they break audio: PrivateDevices= (hides /dev/snd),
# MemoryDenyWriteExecute= (numba compiles machine code at run time),
# RestrictRealtime= (forbids SCHED_FIFO), PrivateTmp= (JACK's socket is in /dev/shm and /tmp),
# DynamicUser= (no access to the audio group's devices).

[Install]
WantedBy=multi-user.target
'''
