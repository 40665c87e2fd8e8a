"""``rtstage run`` as a service: feed file, sd_notify, metrics, OSC, signals, reload, rotation.

This module holds the glue between the command line and the pieces of
:mod:`rtstage.service`, so that the run command itself only calls a few
functions:

``add_service_arguments(parser)``
    ``--feed``, ``--metrics``, ``--metrics-listen-any``, ``--osc``,
    ``--osc-listen-any``, ``--tap-rotate-s``, ``--tap-rotate-mb``,
    ``--tap-keep``, ``--lock-memory``; and makes every option a feed can set
    default to "not given" (:func:`rtstage.service.feed.defer_defaults`).
``load_run_feed(args)``
    Read ``--feed`` (when given), fill the options the command line left
    unset, return the :class:`~rtstage.service.feed.Feed` (or None).
``configure_engine(engine, args)``
    Before :meth:`LiveEngine.prepare`: the rotating tap writer when asked.
``rotating_automation_log(engine, args, format_version)``
    The automation log in segments on the tap's grid (or None).
``ServiceWiring(engine, wiring, args, feed)``
    Around :meth:`LiveEngine.run` (``install_signals=False``): signals,
    sd_notify, metrics, SIGHUP reload, memory locking.

The OSC server is control, not service: the command line starts it beside
the socket and MIDI (``--osc`` is added here with the other service options).
The service layer never imports the control layer; it drives the
``controller`` and ``target`` objects the command line hands it.
"""

import ctypes
import os
import signal
import threading
import time
from functools import partial

from .. import params
from ..log import log
from ..errors import RtstageError
from . import feed as F


def add_service_arguments(parser):
    """Add the service options to the ``run`` parser (call last: it also defers the feed-settable defaults)."""
    g = parser.add_argument_group("service (docs/service.md)")
    g.add_argument("--feed", metavar="FEED.toml", help="read the feed's settings from this file; options given here "
                   "override it; SIGHUP re-reads it")
    g.add_argument("--metrics", metavar="HOST:PORT", help="serve Prometheus metrics over HTTP here (loopback only, "
                   "unless --metrics-listen-any)")
    g.add_argument("--metrics-listen-any", action="store_true",
                   help="allow a non-loopback metrics address (no authentication: a monitoring network only)")
    g.add_argument("--osc", metavar="HOST:PORT", help="OSC control over UDP here (loopback only, unless --osc-listen-any)")
    g.add_argument("--osc-listen-any", action="store_true",
                   help="allow a non-loopback OSC address (no authentication: a control network only)")
    g.add_argument("--tap-rotate-s", type=float, metavar="S", help="write the tap (and automation log) in segments of S seconds")
    g.add_argument("--tap-rotate-mb", type=float, metavar="MB", help="write the tap in segments of at most MB megabytes")
    g.add_argument("--tap-keep", type=int, metavar="N", help="keep only the newest N segments")
    g.add_argument("--lock-memory", action="store_true", help="lock the process' memory (mlockall) so it never swaps")
    F.defer_defaults(parser)


def load_run_feed(args):
    """Read ``--feed`` and fill unset options from it (then from the defaults); returns the Feed or None.

    Idempotent: a second call returns the feed of the first without resolving again (after the first,
    every option is set, and a second resolution would take them all for command-line options).
    """
    if hasattr(args, "_feed_origin"):
        return getattr(args, "_feed", None)
    feed = F.load_feed(args.feed) if getattr(args, "feed", None) else None
    args._feed = feed
    args._feed_origin = F.resolve_args(args, feed)
    if args.tap_rotate_s is not None or args.tap_rotate_mb is not None or args.tap_keep is not None:
        if not args.tap:
            raise RtstageError("tap rotation (--tap-rotate-s/--tap-rotate-mb/--tap-keep) needs --tap")
        for name in ("tap_rotate_s", "tap_rotate_mb"):
            value = getattr(args, name)
            if value is not None and not value > 0:
                raise RtstageError(f"--{name.replace('_', '-')} must be positive, got {value}")
        if args.tap_keep is not None and args.tap_keep < 1:
            raise RtstageError(f"--tap-keep must be at least 1, got {args.tap_keep}")
    from .metrics import parse_listen

    if args.metrics:
        parse_listen(args.metrics, args.metrics_listen_any, "--metrics")
    if args.osc:
        parse_listen(args.osc, args.osc_listen_any, "--osc")
    return feed


_EARLY_HUP = threading.Event()


def _early_hup(signum, frame):
    _EARLY_HUP.set()


def hold_reload_signal():
    """Until :class:`ServiceWiring` takes over, remember a SIGHUP instead of dying of it (start-up takes a while)."""
    signal.signal(signal.SIGHUP, _early_hup)


def settings_with_feed(settings, feed):
    """Engine settings with the feed's ``[engine]`` keys that have no option (monitor, mute, auto_mute ...)."""
    if feed is None:
        return settings
    extra = {k: v for k, v in feed.values.get("engine", {}).items() if k in F.ENGINE_ONLY_KEYS}
    return params.settings_with(settings, extra).resolved() if extra else settings


def rotation_wanted(args):
    """True when the tap is to be written in segments."""
    return bool(args.tap) and (args.tap_rotate_s is not None or args.tap_rotate_mb is not None)


def segment_frames(args, samplerate, channels, bits):
    """Frames per tap segment for these options."""
    from .rotate import segment_frames_for

    bytes_per_sample = 2 if bits <= 16 else 3
    return segment_frames_for(samplerate, channels, bytes_per_sample, args.tap_rotate_s, args.tap_rotate_mb)


def rotated_outputs(args):
    """The first files a rotating tap and log will write, ``[(path, what)]``, for the output policy's check.

    Fixes the run id of the segment names (``args.segment_run_id``) so that
    the files checked are the files written.  Empty without rotation.
    """
    if not rotation_wanted(args):
        return []
    from .rotate import new_run_id, segment_path

    if getattr(args, "segment_run_id", None) is None:
        args.segment_run_id = new_run_id()
    first = segment_path(args.tap, 0, args.segment_run_id)
    out = [(first, "--tap (first segment)"), (first + ".json", "--tap segment sidecar")]
    if args.automation_log:
        out.append((segment_path(args.automation_log, 0, args.segment_run_id), "--automation-log (first segment)"))
    return out


def configure_engine(engine, args):
    """Before ``engine.prepare()``: make the engine write its tap in segments when asked."""
    if not rotation_wanted(args):
        return
    from .rotate import BoundarySnapshots, RotatingTapWriter, new_run_id

    holder = {"run_id": getattr(args, "segment_run_id", None) or new_run_id()}

    def factory(path, block, samplerate, bits, info=None):
        frames = segment_frames(args, samplerate, block.channels, bits)
        snapshots = BoundarySnapshots(block, engine.blocksize, samplerate, frames)
        writer = RotatingTapWriter(path, block, samplerate, bits, info, segment_frames=frames, keep=args.tap_keep,
                                   run_id=holder["run_id"], snapshots=snapshots, log=lambda: holder.get("log"),
                                   on_segment=lambda start: holder.get("log") and holder["log"].advance(start))
        holder["writer"] = writer
        return writer

    engine.tap_writer = factory
    engine._rotation = holder


def rotating_automation_log(engine, args, format_version):
    """The automation log in segments on the tap's grid, when the tap rotates and a log is asked for; else None.

    ``format_version`` is the automation file format's version (the control
    layer's ``FORMAT_VERSION``, passed in: the service layer does not import
    the control layer).
    """
    if not args.automation_log or not rotation_wanted(args):
        return None
    from .rotate import RotatingAutomationLog

    values = params.defaults()
    values.update(params.values_from_settings(engine.settings))
    frames = segment_frames(args, engine.samplerate, engine.channels, engine.settings.bits)
    holder = getattr(engine, "_rotation", {})
    writer = RotatingAutomationLog(args.automation_log, engine.samplerate, frames, values, format_version,
                                   keep=args.tap_keep, run_id=holder.get("run_id"))
    holder["log"] = writer
    return writer


def lock_memory():
    """``mlockall(MCL_CURRENT | MCL_FUTURE)``; returns None on success, else the reason."""
    libc = ctypes.CDLL(None, use_errno=True)
    MCL_CURRENT, MCL_FUTURE = 1, 2
    if libc.mlockall(MCL_CURRENT | MCL_FUTURE) != 0:
        return os.strerror(ctypes.get_errno())
    return None


class ServiceWiring:
    """Signals, sd_notify, metrics and feed reload around a running :class:`LiveEngine`.

    Parameters
    ----------
    engine : LiveEngine
        Prepared engine; run it with ``install_signals=False`` inside this context.
    wiring : object
        The control wiring, with ``controller`` and ``target`` attributes.
    args : argparse.Namespace
        Resolved ``rtstage run`` options.
    feed : Feed or None
        The feed read at start (for reloads).
    """

    def __init__(self, engine, wiring, args, feed=None):
        from .notify import Notifier, watchdog_interval_s

        self.engine = engine
        self.wiring = wiring
        self.args = args
        self.feed = feed
        self.feed_name = feed.name if feed is not None else "rtstage"
        self.notifier = Notifier()
        self.watchdog_s = watchdog_interval_s()
        self.heartbeat = None
        self.metrics = None
        self.reloads = 0
        self.stop_reason = None
        self._previous = {}
        self._reload_wanted = threading.Event()
        self._stop = threading.Event()
        self._reload_thread = None
        self._stopping_sent = False
        self._realtime_checked = False

    # -- lifecycle ----------------------------------------------------------------------------
    def __enter__(self):
        from .notify import ServiceHeartbeat

        try:
            if self.args.lock_memory:
                reason = lock_memory()
                if reason:
                    log(f"warning: cannot lock memory ({reason}); set LimitMEMLOCK=infinity in the unit")
                else:
                    log("memory locked (mlockall)")
            if self.args.metrics:
                from .metrics import MetricsServer, parse_listen

                host, port = parse_listen(self.args.metrics, self.args.metrics_listen_any, "--metrics")
                self.metrics = MetricsServer(self.snapshot, host, port).start()
                log(f"metrics: serving {self.metrics.url}")
            for sig, handler in ((signal.SIGTERM, self._on_stop_signal), (signal.SIGINT, self._on_stop_signal),
                                 (signal.SIGHUP, self._on_hup)):
                self._previous[sig] = signal.signal(sig, handler)
            if _EARLY_HUP.is_set():
                _EARLY_HUP.clear()
                self._reload_wanted.set()
            self._reload_thread = threading.Thread(target=self._reload_loop, name="rtstage-reload", daemon=True)
            self._reload_thread.start()
            self.heartbeat = ServiceHeartbeat(
                self.notifier, progress=self._frames, running=lambda: self.engine.state == "running",
                status_line=self.status_line, watchdog_s=self.watchdog_s).start()
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def __exit__(self, *exc):
        self.send_stopping()
        self._stop.set()
        self._reload_wanted.set()
        if self.heartbeat is not None:
            self.heartbeat.stop()
        if self._reload_thread is not None:
            self._reload_thread.join(10.0)
        for part in (self.metrics,):
            if part is not None:
                try:
                    part.stop()
                except Exception as err:
                    log(f"warning: stopping {type(part).__name__}: {err}")
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)
        self._previous = {}
        self.notifier.close()

    def send_stopping(self):
        """``STOPPING=1`` once."""
        if not self._stopping_sent:
            self._stopping_sent = True
            self.notifier.stopping(f"stopping: {self.stop_reason or 'end of run'}")

    # -- signals ------------------------------------------------------------------------------
    def _on_stop_signal(self, signum, frame):
        self.stop_reason = signal.Signals(signum).name
        self.send_stopping()
        self.engine.request_stop()

    def _on_hup(self, signum, frame):
        self._reload_wanted.set()

    # -- status -------------------------------------------------------------------------------
    def _frames(self):
        from ..live import shared as S

        return self.engine.block.counter(S.C_FRAMES)

    def status_line(self):
        """One line for ``STATUS=``."""
        st = self.engine.status()
        flagged = st["xruns_after_settle"].get("flagged_callbacks", 0)
        s = self.engine.settings
        return (f"{self.feed_name}: {st['state']}, sample {st['engine_frame']}, {s.bits}-bit {s.dither} "
                f"{s.shaper_id}, cpu {100 * st['cpu_load']:.1f}%, flagged {flagged}, restarts {st['restarts']}"
                + (f", reloads {self.reloads}" if self.reloads else ""))

    def snapshot(self):
        """The metrics snapshot (see :func:`rtstage.service.metrics.empty_snapshot`)."""
        from ..live import shared as S
        from .metrics import thread_scheduling

        eng = self.engine
        st = eng.status()
        meters = eng.meters() if getattr(eng, "meter_thread", None) is not None else None
        report_channels = (meters or {}).get("channels") or []
        channels = []
        for c in range(st["channels"] or 0):
            rep = report_channels[c] if c < len(report_channels) else {}
            channels.append({
                "added_noise_dbfs": rep.get("added_noise_dbfs"),
                "noise_modulation_db": rep.get("noise_modulation_db"),
                "sample_peak_dbfs": rep.get("sample_peak_dbfs"),
                "true_peak_dbtp": rep.get("true_peak_dbtp"),
                "clipped": st["clipped"][c],
                "replaced": st["nonfinite"][c],
                "auto_muted": st["auto_muted"][c],
                "auto_muted_frames": st["auto_muted_frames"][c],
            })
        threads = thread_scheduling(os.getpid(), "engine")
        worker = getattr(eng, "worker", None)
        if worker is not None and worker.poll() is None:
            threads += thread_scheduling(worker.pid, "stream")
        target = getattr(self.wiring, "target", None)
        s = eng.settings
        hb = self.heartbeat
        return {
            "feed": self.feed_name,
            "running": st["state"] == "running",
            "ready": bool(hb and hb.ready_sent),
            "uptime_s": st["uptime_s"],
            "samplerate": st["samplerate"], "blocksize": st["blocksize"], "bits": s.bits, "dither": s.dither,
            "shaper": s.shaper_id, "seed": s.seed, "device": st["device"]["output"], "source": st["source"],
            "frames": st["frames"], "callbacks": st["blocks"], "engine_frame": st["engine_frame"],
            "flagged": {k: v for k, v in st["xruns"].items()},
            "restarts": st["restarts"], "gaps": st["discontinuities"],
            "gap_s": sum(g["gap_s"] for g in st["gaps"]),
            "cpu_load": st["cpu_load"], "cpu_load_max": st["cpu_load_max"],
            "control_changes": getattr(target, "applied_count", len(target.applied)) if target is not None else 0,
            "reloads": self.reloads,
            "tap_dropped_frames": st["tap_dropped_frames"],
            "meter_dropped_frames": eng.block.counter(S.C_MRING_DROPPED),
            "watchdog_pings": hb.pings if hb else 0, "watchdog_missed": hb.missed if hb else 0,
            "meter_frames": (meters or {}).get("frames"),
            "loudness": (meters or {}).get("loudness"),
            "channels": channels,
            "threads": threads,
        }

    def summary(self):
        """Fields for the final status."""
        out = {"feed": self.feed_name, "reloads": self.reloads}
        if self.heartbeat is not None:
            out["notify"] = {"ready": self.heartbeat.ready_sent, "watchdog_pings": self.heartbeat.pings,
                             "watchdog_missed": self.heartbeat.missed, "sent": self.notifier.sent}
        if self.metrics is not None:
            out["metrics"] = self.metrics.url
        return out

    # -- reload -------------------------------------------------------------------------------
    def _reload_loop(self):
        while not self._stop.is_set():
            if not self._reload_wanted.wait(0.5):
                self._check_realtime()
                continue
            if self._stop.is_set():
                return
            self._reload_wanted.clear()
            self.notifier.reloading()
            try:
                self.reload()
            except RtstageError as exc:
                log(f"feed reload refused: {exc}")
            except Exception as exc:  # a reload must never take the feed down
                log(f"feed reload failed: {type(exc).__name__}: {exc}")
            self.notifier.ready(self.status_line())

    def _check_realtime(self):
        """Once audio flows: say so when no thread of the stream process got real-time scheduling."""
        if self._realtime_checked or self.heartbeat is None or not self.heartbeat.ready_sent:
            return
        self._realtime_checked = True
        from .metrics import thread_scheduling

        worker = getattr(self.engine, "worker", None)
        if worker is None or worker.poll() is not None:
            return
        threads = thread_scheduling(worker.pid, "stream")
        if threads and not any(t["policy"] in ("fifo", "rr") for t in threads):
            log("warning: no thread of the stream process got real-time scheduling; expect dropouts under load "
                "(run the audio server with real-time priority; LimitRTPRIO= in the unit)")

    def reload(self):
        """Re-read the feed file and apply what can be applied to a running stream (see :mod:`.feed`)."""
        self.reloads += 1
        if self.feed is None:
            log("feed reload: no --feed file; nothing to re-read")
            return
        new = F.load_feed(self.feed.path)
        for key, old_value, new_value in F.restart_changes(self.feed, new):
            log(f"feed reload: {key} changed ({old_value!r} -> {new_value!r}): needs a restart; not applied")
        origin = getattr(self.args, "_feed_origin", {})
        engine_new = self._engine_values(new, origin)
        current = self.wiring.target.get()
        changes = {k: v for k, v in engine_new.items() if k != "seed" and current.get(k) != v}
        if "seed" in engine_new and engine_new["seed"] is not None and engine_new["seed"] != current.get("seed"):
            log("feed reload: engine.seed changed: takes effect at the next start; not applied")
        if changes:
            values, frame = self.wiring.controller.change(changes, source="feed")
            log(f"feed reload: applied {values} at sample {frame}")
        else:
            log("feed reload: no engine change")
        self.feed = new

    def _engine_values(self, feed, origin):
        """Engine parameter values the reloaded feed asks for (command-line options still win)."""
        from ..presets import load_preset

        eng = feed.values.get("engine", {})
        values = {}
        if eng.get("preset"):
            values.update(load_preset(eng["preset"]))
        values.update({k: v for k, v in eng.items() if k in params.PARAMS})
        for name in list(values):
            if origin.get(name) == "command line":
                values[name] = getattr(self.args, name)
        out = {}
        for name, value in values.items():
            if name == "shaper" and value is not None:
                from ..settings import EngineSettings

                # a family (a preset's "gentle9") becomes the design for this stream's rate, as at the start
                value = EngineSettings(shaper=value).resolved(self.engine.samplerate).shaper_id
            if name in params.PARAMS and value is not None:
                out[name] = params.validate(name, value)
        return out
