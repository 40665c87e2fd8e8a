"""``rtstage run``: the live engine on an audio device, with its control layer around it."""

import json
import os
import sys

from ..errors import RtstageError
from ..log import log
from ..files.exits import add_overwrite_options
from .options import (add_control_arguments, add_engine_options, add_midi_arguments, midi_from_args, positive_float,
                      server_from_args, settings_from_args)
from .rtp import (NET_CAUTION, Announcements, add_rtp_arguments, check_outputs, is_deviceless, rtp_out_options,
                  run_deviceless)


def register(subparsers):
    """Add the ``run`` subcommand."""
    from ..live.supervisor import DEFAULT_BLOCKSIZE

    run = subparsers.add_parser(
        "run",
        help="run the engine live on an audio device",
        description="Requantize live: input device (or --source) in, integer words out to the output device. "
        "Caution: test tones and noise can be loud; start with the monitor level down, protect your hearing, "
        "and follow local codes and licensed practice for listening levels.",
    )
    dev = run.add_argument_group("device")
    dev.add_argument("--device", help="device for input and output: index or name substring (exact name first); "
                     "'none': no device, the engine clocked by rtstage or by an RTP source (docs/rtp.md)")
    dev.add_argument("--input-device", help="input device (index or name)")
    dev.add_argument("--output-device", help="output device (index or name)")
    dev.add_argument("--hostapi", help="host API to choose devices from (index or name substring)")
    dev.add_argument("--samplerate", type=int, help="sample rate in Hz (default: the source file's, else the device's)")
    dev.add_argument("--blocksize", type=int, default=DEFAULT_BLOCKSIZE,
                     help=f"frames per callback, fixed (default {DEFAULT_BLOCKSIZE})")
    dev.add_argument("--latency", type=positive_float, help="suggested device latency in seconds")
    dev.add_argument("--channels", type=int, help="channel count (default: the source file's, else 2)")
    dev.add_argument("--packed24", action="store_true",
                     help="send 17..24-bit words as packed 3-byte samples (PortAudio int24) instead of "
                     "left-justified in 32 bits, for devices that take that format")
    dev.add_argument("--callback", choices=("compiled", "python"), default="compiled",
                     help="callback mode; 'python' is a diagnostic fallback, never real-time safe (default compiled)")
    add_engine_options(run)
    io = run.add_argument_group("source, tap and status")
    io.add_argument("--source", help="input instead of the input device: a sound file, 'silence', "
                    "'tone[:freq_hz=F][,level_dbfs=L]', 'noise[:level_dbfs=L][,seed=S]', "
                    "or with --device none an RTP stream: 'rtp:HOST:PORT' or 'sdp:FILE'")
    io.add_argument("--loop", action="store_true", help="loop a file source instead of stopping at its end")
    io.add_argument("--tap", help="write exactly the words sent to the device into this file (gaps in TAP.gaps.json)")
    io.add_argument("--duration", type=positive_float, help="stop after this many seconds")
    io.add_argument("--status-file", help="write the final status JSON here instead of stderr")
    io.add_argument("--quiet", action="store_true",
                    help="no meter display (by default a live display on a terminal, one status line a second otherwise)")
    io.add_argument("--loudness-target", metavar="TARGET",
                    help="show pass/fail of the output's loudness: ebu-r128, or LUFS[:TOLERANCE_LU[:TRUE_PEAK_DBTP]], e.g. -24:1:-2")
    io.add_argument("--settle", type=float, default=1.0,
                    help="start-up seconds whose xruns are reported apart (default 1.0)")
    ctl = run.add_argument_group("control (docs/protocol.md)")
    add_control_arguments(ctl)
    ctl.add_argument("--control-rate-hz", type=positive_float, default=200.0,
                     help="requests per second each control client may send (default 200)")
    ctl.add_argument("--control-burst", type=positive_float, default=400.0,
                     help="requests a control client may send at once above that rate (default 400)")
    ctl.add_argument("--automation-log", metavar="FILE",
                     help="write every change the engine applied, at its sample index, to FILE "
                     "(re-render offline with: rtstage render --automation FILE)")
    add_midi_arguments(run.add_argument_group("MIDI control"))
    add_rtp_arguments(run)
    from ..service.runner import add_service_arguments

    add_overwrite_options(run)
    add_service_arguments(run)  # last: it defers the defaults a feed file may set
    run.set_defaults(handler=run_command)


def run_command(args):
    """Handler of ``rtstage run``."""
    from ..live.supervisor import LiveEngine
    from ..log import use_journal
    from ..net.source import is_net_source
    from ..service.runner import (ServiceWiring, configure_engine, hold_reload_signal, load_run_feed,
                                  settings_with_feed)

    in_journal = use_journal()
    hold_reload_signal()
    feed = load_run_feed(args)  # first: it resolves the options a feed may set (until then they are unset)
    if args.source is None and args.loop:
        raise RtstageError("--loop needs a --source file")
    if args.blocksize < 1 or args.blocksize > 1 << 16:
        raise RtstageError(f"blocksize must be between 1 and 65536 frames, got {args.blocksize}")
    if not 0 <= args.control_port < 65536:
        raise RtstageError(f"--control-port must be 0 (off) or 1..65535, got {args.control_port}")
    settings = settings_with_feed(settings_from_args(args), feed)
    args.output_plan = check_run_outputs(args)
    if is_deviceless(args):
        return run_deviceless(args, settings, ControlWiring)
    if args.source and is_net_source(args.source):
        raise RtstageError("an rtp: or sdp: source needs --device none (its arrival clocks the engine; "
                           "rtstage does not adapt a stream's clock to a device's)")
    rtp_out = rtp_out_options(args)
    check_outputs(args)
    if rtp_out is not None:
        log(NET_CAUTION)
    if args.source is None and args.loop:
        raise RtstageError("--loop needs a --source file")
    engine = LiveEngine(
        settings, device=args.device, input_device=args.input_device, output_device=args.output_device,
        hostapi=args.hostapi, samplerate=args.samplerate, blocksize=args.blocksize, channels=args.channels,
        latency=args.latency, source=args.source, loop=args.loop, tap=args.tap, callback=args.callback,
        settle_s=args.settle, rtp_out=rtp_out,
    )
    configure_engine(engine, args)
    engine.packed24 = bool(getattr(args, "packed24", False))
    if args.loudness_target:
        from ..meters.loudness import parse_target

        engine.loudness_target = parse_target(args.loudness_target)  # read when the meter thread starts
    if args.callback == "python":
        log("warning: --callback python runs Python in the audio thread (diagnosis only); expect dropouts")
    engine.prepare()
    from ..render import shaper_warnings

    for message in shaper_warnings(engine.settings, engine.samplerate):
        log(f"warning: {message}")
    announce = None
    if engine.net_out is not None:
        announce = Announcements(args, engine.net_out.config, engine.net_out.origin_host, device_clocked=True)
    try:
        with ControlWiring(engine, args) as wiring, ServiceWiring(engine, wiring, args, feed) as service:
            from ..live.display import LiveDisplay

            if announce is not None:
                announce.__enter__()
            # in the journal, STATUS= carries the status line: no line a second
            display = LiveDisplay(engine, refresh_hz=10, quiet=args.quiet or in_journal).start()
            try:
                status = engine.run(duration_s=args.duration, install_signals=False)
            finally:
                display.stop()
    finally:
        if engine.state != "stopped":
            engine.stop()
        if announce is not None:
            announce.__exit__(None, None, None)
    status.update(wiring.summary())
    status.update(service.summary())
    _headroom_warning(status.get("meters"))
    text = json.dumps(status)
    if args.status_file:
        write_status_file(args, text)
    else:
        print(text, file=sys.stderr, flush=True)
    return 0


def check_run_outputs(args):
    """Check every output of ``rtstage run`` with the output policy before any device opens.

    Refuses (one line, exit status 2) an output that is or resolves to an
    input (the source file, preset, shaper, feed file) or another output, an
    existing file without ``--overwrite``, a folder, a missing or read-only
    folder; a source file that is truncated or holds no frames.  Returns the
    checked plan (the status file is written through it).
    """
    from ..files.policy import OutputPlan
    from ..live.sources import parse_source
    from ..live.tap import sidecar_path
    from .options import input_files_of

    source_file = None
    if args.source is not None and ":" not in args.source.split("/")[0] and parse_source(args.source).kind == "file":
        from ..render import open_input

        source_file = args.source
        open_input(source_file)[0].close()
    inputs = [source_file, getattr(args, "feed", None), *input_files_of(args)]
    from ..service.runner import rotated_outputs

    plan = OutputPlan("running the live engine", inputs=inputs, overwrite=args.overwrite)
    segments = rotated_outputs(args)  # with rotation the tap and log are written as segments instead
    plain = [] if segments else [(args.tap, "--tap"), (args.tap and sidecar_path(args.tap), "--tap gaps sidecar"),
                                 (args.automation_log, "--automation-log")]
    for path, what in (*plain, *segments, (args.status_file, "--status-file"),
                       (getattr(args, "rtp_sdp", None), "--rtp-sdp")):
        if path:
            plan.add_file(path, what)
    plan.check()
    plan.finish()  # the checks are done; the status file is written through the plan at the end
    return plan


def write_status_file(args, text):
    """Write the final status through the output policy (atomic; checked at start)."""
    plan = args.output_plan
    with plan:
        plan.write_text(args.status_file, text + "\n")


def _headroom_warning(meters):
    """Warn when the programme's peak left the shaped error less headroom than it needs (from the final meters)."""
    if not meters or not meters.get("channels"):
        return
    hot = [c + 1 for c, ch in enumerate(meters["channels"]) if ch.get("headroom_exceeded")]
    if hot:
        limit = meters.get("peak_limit_dbfs")
        where = "no level is safe at this word length" if limit is None else f"keep peaks at or below {limit:.2f} dBFS"
        log(f"warning: channel(s) {', '.join(map(str, hot))} peaked above what shaper '{meters.get('shaper')}' "
            f"with {meters.get('dither')} dither leaves room for ({where}); expect clipped samples")


class ControlWiring:
    """The control layer around a prepared :class:`~rtstage.live.supervisor.LiveEngine`, for ``rtstage run``.

    Parameters
    ----------
    engine : LiveEngine
        Prepared engine (sample rate and container known).
    args : argparse.Namespace
        ``rtstage run`` options: ``--control-*``, ``--midi-*``, ``--osc*``, ``--automation-log``
        (with ``--tap-rotate-*``: the log rotates with the tap).

    Notes
    -----
    On entry: opens the automation log, starts the
    :class:`~rtstage.control.live_target.LiveTarget` housekeeping thread, the
    socket server (unless ``--control-port 0``), MIDI and OSC (when asked).
    On exit, after the engine stopped: OSC, MIDI, then the server, then the
    target (which records what the last blocks applied), then the log.
    """

    def __init__(self, engine, args):
        self.engine = engine
        self.args = args
        self.writer = None
        self.target = None
        self.controller = None
        self.server = None
        self.midi = None
        self.osc = None
        self.osc_status = None

    def __enter__(self):
        from ..control import DEFAULT_CONTROL_PORT
        from ..control.automation import FORMAT_VERSION, AutomationWriter
        from ..control.live_target import LiveTarget
        from ..control.protocol import Controller, PresetStore
        from ..service.runner import rotating_automation_log

        args = self.args
        try:
            if args.automation_log:
                self.writer = rotating_automation_log(self.engine, args, FORMAT_VERSION)
                if self.writer is None:  # a stream of the run's output plan: sealed into place when it closes
                    plan = getattr(args, "output_plan", None)
                    stream = plan.stream(args.automation_log) if plan is not None else None
                    self.writer = AutomationWriter(args.automation_log, self.engine.samplerate, stream=stream)
            self.target = LiveTarget(self.engine, automation_log=self.writer).start()
            presets = PresetStore(args.control_preset_dir) if args.control_preset_dir else None
            controller = self.controller = Controller(self.target, presets)
            self.server = server_from_args(args, controller)
            if self.server is not None:
                self.server.rate_hz = float(args.control_rate_hz)
                self.server.burst = float(args.control_burst)
                try:
                    self.server.start()
                except RtstageError as err:
                    if args.control_port != DEFAULT_CONTROL_PORT:
                        raise
                    log(f"warning: control socket off: {err} (choose a port with --control-port)")
                    self.server = None
            self.midi = midi_from_args(args, controller)
            if self.midi is not None:
                self.midi.start()
            if args.osc:
                from ..control.osc import OscControl
                from ..service.metrics import parse_listen

                host, port = parse_listen(args.osc, args.osc_listen_any, "--osc")
                self.osc = OscControl(controller, host, port).start()
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def __exit__(self, *exc):
        if self.osc is not None:
            self.osc_status = self.osc.status()
        for part, stop in ((self.osc, "stop"), (self.midi, "stop"), (self.server, "stop"), (self.target, "stop"),
                           (self.writer, "close")):
            if part is not None:
                try:
                    getattr(part, stop)()
                except Exception as err:  # one failing part must not keep the others running
                    log(f"warning: stopping {type(part).__name__}: {err}")
        self.osc = self.midi = self.server = None

    def summary(self):
        """Status fields of the control layer (for the final status)."""
        out = {}
        if self.target is not None:
            out["control_changes_applied"] = getattr(self.target, "applied_count", len(self.target.applied))
        if self.args.automation_log:
            out["automation_log"] = self.args.automation_log
        if self.osc_status is not None:
            out["osc"] = self.osc_status
        return out
