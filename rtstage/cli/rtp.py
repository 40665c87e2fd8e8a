"""``rtstage run`` options and wiring for RTP: ``--rtp-out``, ``--source rtp:/sdp:``, ``--device none`` (docs/rtp.md)."""

import json
import os
import sys

from ..errors import RtstageError
from ..log import log
from .options import positive_float

NET_CAUTION = ("Caution: a stream sent onto a network reaches whatever listens there; send only to addresses the "
               "network's operators assign, and follow their rules and local codes.")


def add_rtp_arguments(parser):
    """Add the RTP output, input and deviceless-clock options to the ``run`` parser."""
    out = parser.add_argument_group("RTP output (docs/rtp.md)")
    out.add_argument("--rtp-out", metavar="HOST:PORT",
                     help="also send the words as RTP L16/L24 to this numeric address ([IPV6]:PORT for IPv6). "
                     + NET_CAUTION)
    out.add_argument("--rtp-encoding", choices=("L16", "L24"), help="payload (default L16 up to 16 bits, else L24)")
    out.add_argument("--rtp-ptime-ms", default="1", help="packet time: 0.125, 0.25, 0.333, 1 or 4 ms (default 1)")
    out.add_argument("--rtp-payload-type", type=int, default=96, help="dynamic payload type 96..127 (default 96)")
    out.add_argument("--rtp-dscp", default="AF41", help="DiffServ marking, name or 0..63 (default AF41; EF is the clock's)")
    out.add_argument("--rtp-ttl", type=int, help="multicast TTL, or unicast hop limit (default: the system's)")
    out.add_argument("--rtp-multicast-interface", metavar="ADDR",
                     help="interface for multicast: a local IPv4 address, or an IPv6 interface name or index")
    out.add_argument("--rtp-sdp", metavar="FILE", help="write the session description (RFC 4566) here")
    out.add_argument("--rtp-sap", metavar="HOST[:PORT]", help="announce the description with SAP (RFC 2974) there")
    out.add_argument("--rtp-sap-interval-s", type=positive_float, default=300.0,
                     help="mean interval between SAP announcements (default 300 s)")
    out.add_argument("--rtp-clock", choices=("local", "tai"), default="local",
                     help="with --device none: pace by CLOCK_MONOTONIC (local, default) or CLOCK_TAI")
    out.add_argument("--rtp-ts-refclk", metavar="SOURCE",
                     help="clock source to state in a=ts-refclk (RFC 7273), e.g. ptp=IEEE1588-2008:GMID:DOMAIN "
                     "when a PTP daemon disciplines CLOCK_TAI (default local)")
    out.add_argument("--rt-priority", type=int, default=70,
                     help="SCHED_FIFO priority of the clock and sender threads where granted (0: none; default 70)")
    inp = parser.add_argument_group("RTP input (--source rtp:HOST:PORT or sdp:FILE)")
    inp.add_argument("--rtp-in-encoding", choices=("L16", "L24"), help="payload of an rtp: source")
    inp.add_argument("--rtp-jitter-ms", type=float, default=5.0, help="jitter-buffer depth in ms (default 5)")
    inp.add_argument("--rtp-in-idle-s", type=positive_float,
                     help="end the run this long after the input stream's last packet")


def rtp_out_options(args):
    """Keyword arguments of :class:`rtstage.net.rtp.RtpOutConfig` from ``--rtp-*``, or None without ``--rtp-out``."""
    if not args.rtp_out:
        for name in ("rtp_sdp", "rtp_sap"):
            if getattr(args, name):
                raise RtstageError(f"--{name.replace('_', '-')} needs --rtp-out")
        return None
    from ..net.rtp import parse_hostport

    host, port = parse_hostport(args.rtp_out, "--rtp-out")
    return {"host": host, "port": port, "encoding": args.rtp_encoding, "ptime_ms": args.rtp_ptime_ms,
            "payload_type": args.rtp_payload_type, "dscp": args.rtp_dscp, "ttl": args.rtp_ttl,
            "multicast_interface": args.rtp_multicast_interface}


def is_deviceless(args):
    return args.device is not None and str(args.device).lower() == "none"


def check_outputs(args):
    """Refuse existing output files without --overwrite (the output policy checks the rest at start)."""
    for path, what in ((args.tap, "tap file"), (getattr(args, "rtp_sdp", None), "SDP file")):
        if path and os.path.exists(path) and not args.overwrite:
            raise RtstageError(f"{what} {path} exists; use --overwrite to replace it")


class Announcements:
    """Writes the SDP file and runs the SAP announcer for an output stream (both optional)."""

    def __init__(self, args, config, origin_host, clock="local", arrival_clocked=False, device_clocked=False):
        from ..net.sdp import build_sdp

        refclk = args.rtp_ts_refclk
        if clock == "tai" and refclk is None:
            log("note: the SDP says ts-refclk:local; if a PTP daemon disciplines CLOCK_TAI, state it with "
                "--rtp-ts-refclk ptp=IEEE1588-2008:GRANDMASTER:DOMAIN")
        self.text = build_sdp(config, origin_host, clock=clock, ts_refclk=refclk,
                              arrival_clocked=arrival_clocked or device_clocked)
        self.args = args
        self.sap = None

    def __enter__(self):
        args = self.args
        if args.rtp_sdp:
            plan = getattr(args, "output_plan", None)
            if plan is None:  # a caller that did not check the run's outputs first
                from ..files.policy import OutputPlan

                plan = OutputPlan("writing the session description", overwrite=getattr(args, "overwrite", False))
                plan.add_file(args.rtp_sdp, "--rtp-sdp")
            with plan:  # checked at start with the run's other outputs; written atomically
                with plan.open(args.rtp_sdp, "w") as f:
                    f.write(self.text)
            log(f"wrote the session description {args.rtp_sdp}")
        if args.rtp_sap:
            from ..net.sap import SapAnnouncer, parse_sap_target

            host, port = parse_sap_target(args.rtp_sap)
            origin = self.text.split("\r\n")[1].split()[-1]
            self.sap = SapAnnouncer(host, port, self.text, origin, interval_s=args.rtp_sap_interval_s,
                                    ttl=args.rtp_ttl).start()
            log(f"announcing the session with SAP to {host}:{port}")
        return self

    def __exit__(self, *exc):
        if self.sap is not None:
            self.sap.stop()
            self.sap = None


def run_deviceless(args, settings, control_wiring):
    """``rtstage run --device none``: the engine clocked by rtstage (or by an RTP source); RTP and tap out.

    ``control_wiring`` is the ``run`` command's control layer (socket, MIDI,
    automation log), which drives this engine as it drives a live one.
    """
    from ..net.netengine import NetEngine
    from ..net.source import is_net_source, parse_net_source

    if args.source is None:
        raise RtstageError("--device none needs --source (a file, a generator, rtp:HOST:PORT or sdp:FILE)")
    unsupported = [opt for opt, dest in (("--metrics", "metrics"), ("--tap-rotate-s", "tap_rotate_s"),
                                         ("--tap-rotate-mb", "tap_rotate_mb"))
                   if getattr(args, dest, None) not in (None, False)]
    if unsupported:
        raise RtstageError(f"{', '.join(unsupported)} not available with --device none yet")
    if getattr(args, "feed", None):
        log("note: with --device none the feed file is read once; SIGHUP does not reload it")
    if getattr(args, "lock_memory", False):
        from ..service.runner import lock_memory

        reason = lock_memory()
        log(f"warning: memory not locked: {reason}" if reason else "memory locked (mlockall)")
    opts = rtp_out_options(args)
    if opts is None and not args.tap:
        raise RtstageError("--device none needs an output: --rtp-out and/or --tap")
    if is_net_source(args.source):
        source = parse_net_source(args.source, args.rtp_in_encoding, args.samplerate, args.channels,
                                  depth_ms=args.rtp_jitter_ms, idle_s=args.rtp_in_idle_s,
                                  multicast_interface=args.rtp_multicast_interface)
    else:
        from ..live.sources import parse_source

        source = parse_source(args.source)
    check_outputs(args)
    if args.automation_log and os.path.exists(args.automation_log) and not args.overwrite:
        raise RtstageError(f"automation log {args.automation_log} exists; use --overwrite to replace it")
    if opts is not None:
        log(NET_CAUTION)
    engine = NetEngine(settings, source, samplerate=args.samplerate, channels=args.channels, rtp_out=opts,
                       tap=args.tap, clock=args.rtp_clock, rt_priority=args.rt_priority, loop=args.loop)
    engine.prepare()
    announce = None
    if engine.out is not None:
        origin = engine._sock.getsockname()[0]
        announce = Announcements(args, engine.out, origin, clock=args.rtp_clock,
                                 arrival_clocked=engine.arrival_clocked)
    if announce is not None:
        announce.__enter__()
    line = None if args.quiet else StatusLine(engine).start()
    try:
        with control_wiring(engine, args) as wiring:
            try:
                status = engine.run(duration_s=args.duration)
            finally:
                if line is not None:
                    line.stop()
    finally:
        if engine.state != "stopped":
            engine.stop()
        if announce is not None:
            announce.__exit__(None, None, None)
    status.update(wiring.summary())
    write_status(args, status)
    return 0


def stream_summary(status):
    """One line of per-stream figures from a status dict."""
    parts = [f"frame {status.get('engine_frame', 0)}"]
    out = status.get("streams", {}).get("rtp_out")
    if out:
        text = f"out {out['packets_sent']} pkts"
        dev = out.get("send_deviation_ms")
        if dev:
            text += f", send dev p50 {dev['p50']:.3f} p99 {dev['p99']:.3f} max {dev['max']:.3f} ms, late {out['late_packets']}"
        parts.append(text)
    inp = status.get("streams", {}).get("rtp_in")
    if inp:
        parts.append(f"in {inp['packets_received']} pkts, lost {inp['lost']}, late {inp['late']}, reordered "
                     f"{inp['reordered']}, duplicated {inp['duplicated']}, jitter {inp['jitter_ms']:.3f} ms")
    return "; ".join(parts)


class StatusLine:
    """One status line a second on stderr while the deviceless engine runs (``--quiet`` turns it off)."""

    def __init__(self, engine, interval_s=1.0):
        import threading

        self.engine = engine
        self.interval_s = interval_s
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="rtstage-status-line", daemon=True)

    def start(self):
        self._thread.start()
        return self

    def _run(self):
        while not self._stop.wait(self.interval_s):
            log(stream_summary(self.engine.status()))

    def stop(self):
        self._stop.set()
        self._thread.join()


def write_status(args, status):
    """The final status: to ``--status-file`` through the output policy (atomic), else one line on stderr."""
    text = json.dumps(status)
    if args.status_file:
        from .run import write_status_file

        if getattr(args, "output_plan", None) is None:  # a caller that did not check the run's outputs first
            from ..files.policy import OutputPlan

            args.output_plan = OutputPlan("writing the status file", overwrite=getattr(args, "overwrite", False))
            args.output_plan.add_file(args.status_file, "--status-file")
        write_status_file(args, text)
    else:
        print(text, file=sys.stderr, flush=True)
