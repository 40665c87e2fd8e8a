"""The live engine: prepare, run and supervise one PortAudio stream.

:class:`LiveEngine` follows the three phases of a real-time processor.

Prepare (:meth:`LiveEngine.prepare`)
    Resolve the source, sample rate and channels; choose the devices; size
    every shared array (:class:`~rtstage.live.shared.SharedBlock`); encode the
    settings; compile (or load from the cache) and warm the callback with the
    real types on a scratch block; open the tap.
Run (:meth:`LiveEngine.start`, :meth:`LiveEngine.poll`, :meth:`LiveEngine.run`)
    Open and start the stream, then freeze the garbage collector.  The
    callback runs machine code only.  The Python side polls: it logs each
    parameter change with the sample index at which it took effect, tracks
    PortAudio's CPU load, and supervises the stream.
Release (:meth:`LiveEngine.stop`)
    Stop the stream, drain and close the tap, return the final status.

Supervision
-----------
The stream has failed when PortAudio reports it inactive although the source
has not ended, or when the frame counter has not advanced for ``stall_s``
seconds.  The engine then says so on stderr, closes the stream, reinitialises
PortAudio, and retries opening the *same* devices by exact name and host API
after 0.25, 0.5, 1 and then every 2 s, until it succeeds or is stopped.  The
kernel state, the dither clock and the source position carry on from where
they stopped, so a file source resumes at the frame after the last one sent;
the tap records each gap (:mod:`rtstage.live.tap`).

Where the parts live
--------------------
This module holds the supervision (start, poll, recover, run, stop).  The
preparation steps are in :mod:`rtstage.live.prepare`; the control surface
(:meth:`LiveEngine.set_settings`, :meth:`LiveEngine.wait_applied`,
:meth:`LiveEngine.last_applied`) in :mod:`rtstage.live.surface`; the status
report and the status-flag windows in :mod:`rtstage.live.status`; the meter
thread's start, stop and snapshot in :mod:`rtstage.live.metering`.  The
settings, the container rule and the kernel counters belong to
``LiveEngine.engine``, an :class:`rtstage.engine.Engine` whose state lives in
the shared block.
"""

import gc
import json
import os
import select
import signal
import subprocess
import threading
import time

from ..engine import Engine
from ..errors import RtstageError
from ..log import log
from . import prepare as P
from . import shared as S
from .metering import LiveMeters, meter_snapshot
from .realtime import start_notice
from .sources import check_source, parse_source
from .status import FlagWindows, live_status, read_flags
from .surface import ControlSurface, applied_log
from .tap import TapWriter
from .timing import check_port

DEFAULT_BLOCKSIZE = 256
"""Default frames per callback (a power of two)."""
DEFAULT_CHANNELS = 2
RETRY_DELAYS_S = (0.25, 0.5, 1.0, 2.0)
"""Reopen back-off; the last value repeats."""
POLL_S = 0.02
TAP_RING_S = P.TAP_RING_S
METER_RING_S = P.METER_RING_S


class LiveEngine(ControlSurface):
    """A live requantizer on one PortAudio stream.

    Parameters
    ----------
    settings : EngineSettings
        Engine settings; a missing seed is drawn at :meth:`prepare`.
    device : int or str or None
        Device for both directions (index or name substring).
    input_device, output_device : int or str or None
        Separate devices; override ``device``.
    hostapi : int or str or None
        Host API to choose devices from.
    samplerate : int or None
        Sample rate in Hz; default: the file source's, else the output device's.
    blocksize : int
        Frames per callback, fixed (default 256).
    channels : int or None
        Channel count; default: the file source's, else 2.
    latency : float or None
        Suggested latency in seconds.
    source : str or None
        ``--source`` spec (:mod:`rtstage.live.sources`); None takes the input device.
    loop : bool
        Loop a file source instead of stopping at its end.
    tap : str or None
        Tap file path.
    tap_write_paths : (str, str) or None
        Where the tap audio and its gaps sidecar are actually written (the
        output policy's temporary files, renamed by the caller); None writes
        ``tap`` and its sidecar directly.
    callback : {'compiled', 'python'}
        Callback mode; ``python`` is for diagnosis only.
    settle_s : float
        Start-up time after each stream start whose status flags are reported
        apart (``xruns_after_settle`` excludes them).
    stall_s : float or None
        Time without progress that counts as a stalled stream; default
        max(0.5 s, 32 blocks).
    worker_load_thread : bool
        Benchmark only: run a busy pure-Python thread inside the stream
        worker, beside the callback.
    rtp_out : dict or None
        A second output: the words as RTP (:class:`rtstage.net.liveout.LiveRtpOutput`,
        options of :class:`rtstage.net.rtp.RtpOutConfig`), fed from the tap ring, never
        sent from the callback.
    """

    packed24 = False
    """Send 17..24-bit words as packed three-byte samples (PortAudio int24; :mod:`rtstage.live.packing`); set
    before :meth:`prepare`."""

    meter_ring_s = METER_RING_S
    """Meter ring capacity in seconds; set to 0 before :meth:`prepare` to run without meters."""
    tap_writer = TapWriter
    """Factory of the tap writer, ``(path, block, samplerate, bits, info)``; set before :meth:`prepare`
    (the service layer puts its rotating writer here)."""
    loudness_target = None
    """Delivery loudness target (:class:`rtstage.meters.loudness.LoudnessTarget`) the meter snapshots are
    checked against; set before :meth:`start`."""

    def __init__(self, settings, device=None, input_device=None, output_device=None, hostapi=None, samplerate=None,
                 blocksize=DEFAULT_BLOCKSIZE, channels=None, latency=None, source=None, loop=False, tap=None,
                 callback="compiled", settle_s=1.0, stall_s=None, worker_load_thread=False, rtp_out=None,
                 tap_write_paths=None):
        self.requested = dict(device=device, input_device=input_device, output_device=output_device, hostapi=hostapi)
        self.settings = settings
        self.samplerate = samplerate
        self.blocksize = int(blocksize)
        if self.blocksize < 1:
            raise RtstageError(f"blocksize must be a positive number of frames, got {blocksize}")
        self.channels = channels
        self.latency = latency
        self.source_spec = parse_source(source) if source else None
        self.loop = bool(loop)
        self.tap_path = tap
        self.tap_write_paths = tap_write_paths
        self.callback_mode = callback
        self.settle_s = float(settle_s)
        self.stall_s = stall_s
        self.block = None
        self.engine = None
        """The :class:`~rtstage.engine.Engine` (from :meth:`prepare`): settings, container, counters."""
        self.stream = None
        self.tap = None
        self.restarts = 0
        self.gaps = []
        self.applied_log = applied_log()
        self.cpu_load = 0.0
        self.cpu_load_max = 0.0
        self.state = "new"
        self._start_time = None
        self._logged_seq = 0
        self.flag_windows = FlagWindows(self.settle_s)
        self.live_meters = None
        self._stop_event = threading.Event()
        self._last_frames = -1
        self._last_progress = None
        self._prepared = False
        self.worker = None
        self.worker_load_thread = bool(worker_load_thread)
        self._shm_fd = None
        self.rtp_out_options = dict(rtp_out) if rtp_out else None
        self.net_out = None
        self._port_events = 0

    # --- prepare --------------------------------------------------------------------
    def prepare(self):
        """Size, compile, warm and open everything but the stream (see the module notes)."""
        src = self.source_spec
        data = None
        if src is not None and src.kind == "file":
            data, self.samplerate, self.channels = P.load_file_source(src, self.samplerate, self.channels)
        probe = P.probe_devices(self.requested, duplex=src is None)
        self.output_name, self.input_name, self.hostapi_name = probe["output_name"], probe["input_name"], probe["hostapi_name"]
        if self.samplerate is None:
            self.samplerate = int(probe["default_samplerate"])
        self.samplerate = int(self.samplerate)
        self.channels = int(self.channels or DEFAULT_CHANNELS)
        if src is not None and src.generated:
            check_source(src, self.samplerate)
        # The one engine object model: settings resolved, validated and encoded here, once; its state moves
        # into the shared block below, and later changes go out through the seqlock (set_settings).
        self.engine = Engine(self.settings, self.channels, self.samplerate, exact_format=True)
        self.settings = self.engine.settings
        if self.packed24 and (self.engine.container_bits != 32 or self.callback_mode != "compiled"):
            raise RtstageError("packed 24-bit output needs a 17..24-bit word and the compiled callback")
        # The tap ring feeds the tap file and the RTP output alike.
        geometry = P.geometry(self.channels, self.engine.container_bits, self.blocksize, self.samplerate,
                              self.tap_path or self.rtp_out_options, 0 if data is None else data.shape[0],
                              self.meter_ring_s)
        self.block, self._memory, self._shm_fd = P.shared_block(geometry)
        if data is not None:
            self.block.source[:] = data
        P.configure_input(self.block, self.samplerate, src, self.loop)
        self.engine.use_memory(self.block.kernel, publish=self._publish_params)
        P.warm(self.channels, self.engine.container_bits, self.blocksize)
        self.live_meters = LiveMeters(self.block, self.engine, self.samplerate)
        info = {"settings": self.settings.to_dict(), "samplerate": self.samplerate,
                "source": src.describe() if src else "input"}
        if self.rtp_out_options:
            from ..net.liveout import LiveRtpOutput  # the ring's consumer: RTP packets, then the tap file

            self.net_out = LiveRtpOutput(self.block, S.C_RING_HEAD, S.C_RING_TAIL, self.rtp_out_options,
                                         self.samplerate, self.channels, self.settings.bits, tap=self.tap_path, info=info)
        elif self.tap_path:
            extra = {"write_paths": self.tap_write_paths} if self.tap_write_paths else {}
            self.tap = self.tap_writer(self.tap_path, self.block, self.samplerate, self.settings.bits, info, **extra)
        self._prepared = True
        return self

    @property
    def container_bits(self):
        """Width of the output words: 16 (int16) or 32 (left-justified int32)."""
        return self.engine.container_bits

    @property
    def out_shift(self):
        """Left shift from the word to its container."""
        return self.engine.out_shift

    # --- run ------------------------------------------------------------------------
    def _open(self, timeout_s=60.0):
        """Start a stream worker and wait until its stream runs; raises RtstageError when it cannot open."""
        cmd = P.worker_command(
            "stream", "--shm-fd", str(self._shm_fd), "--geometry", ",".join(str(v) for v in self.block.geometry),
            "--samplerate", str(self.samplerate), "--blocksize", str(self.blocksize),
            "--output-name", self.output_name, "--hostapi-name", self.hostapi_name, "--callback", self.callback_mode)
        if self.input_name:
            cmd += ["--input-name", self.input_name]
        if self.latency is not None:
            cmd += ["--latency", str(self.latency)]
        if self.worker_load_thread:
            cmd += ["--load-thread"]
        if self.packed24:
            cmd += ["--packed24"]
        proc = subprocess.Popen(cmd, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, pass_fds=(self._shm_fd,))
        deadline = time.monotonic() + timeout_s
        line = ""
        while time.monotonic() < deadline and not self._stop_event.is_set():
            ready, _, _ = select.select([proc.stdout], [], [], 0.05)
            if ready:
                line = proc.stdout.readline()
                break
            if proc.poll() is not None:
                break
        try:
            reply = json.loads(line) if line else {"ok": False, "error": "the stream worker did not start"}
        except ValueError:
            reply = {"ok": False, "error": f"unexpected reply from the stream worker: {line[:200]!r}"}
        if not reply["ok"]:
            self._kill_worker(proc)
            raise RtstageError(f"cannot open the audio stream on '{self.output_name}' ({self.hostapi_name}): "
                               f"{reply['error']}")
        self.worker = proc
        self._worker_reply = reply  # carries the worker's realtime report (rtstage.live.realtime)
        now = time.monotonic()
        self.flag_windows.opened(now, read_flags(self.block))
        self._last_progress = now
        self._last_frames = self.block.counter(S.C_FRAMES)

    @staticmethod
    def _kill_worker(proc):
        if proc is None:
            return
        if proc.poll() is None:
            proc.kill()
        proc.wait()
        for f in (proc.stdin, proc.stdout):
            try:
                f.close()
            except Exception:
                pass

    def start(self):
        """Open and start the stream (after :meth:`prepare`), then freeze the garbage collector."""
        if not self._prepared:
            self.prepare()
        if self.tap is not None:
            self.tap.start()
        if self.net_out is not None:
            self.net_out.start()
        self.live_meters.start(loudness_target=self.loudness_target)
        self._open()
        self._start_time = time.monotonic()
        self.state = "running"
        log(f"running: {self.output_name} ({self.hostapi_name}), {self.samplerate} Hz, {self.channels} ch, "
            f"{self.blocksize}-frame blocks, {self.settings.bits}-bit {self.settings.dither} dither, "
            f"shaper {self.settings.shaper_id}, seed {self.settings.seed}")
        start_notice(self)
        gc.collect()
        gc.freeze()
        return self

    @property
    def finished(self):
        """True once a (non-looping) file source has been played to its end."""
        return self.block is not None and self.block.counter(S.C_SRC_DONE) != 0

    def poll(self):
        """One supervision step: log applied settings, track CPU load and progress, recover a failed stream.

        Returns False when the engine has nothing more to play (source ended).
        """
        self._log_applied()
        now = time.monotonic()
        self.flag_windows.tick(now, self.block)
        self._port_events = check_port(self, self._port_events)  # missing/repeated periods
        if self.finished:
            return False
        stream_alive = self.worker is not None and self.worker.poll() is None
        frames = self.block.counter(S.C_FRAMES)
        if frames != self._last_frames:
            self._last_frames = frames
            self._last_progress = now
            load = self.block.counter(S.C_CPU_LOAD_PPM) * 1e-6
            self.cpu_load = load
            if self.flag_windows.settled:
                self.cpu_load_max = max(self.cpu_load_max, load)
        stall_s = self.stall_s if self.stall_s is not None else max(0.5, 32 * self.blocksize / self.samplerate)
        if stream_alive and now - self._last_progress <= stall_s:
            return True
        if self.finished:
            return False
        reason = "stream stopped by the audio system" if not stream_alive else f"no progress for {now - self._last_progress:.2f} s"
        self._recover(reason)
        return not self.finished

    def _recover(self, reason):
        lost_at = self._last_progress
        log(f"audio stream failed on '{self.output_name}' ({self.hostapi_name}): {reason}; reopening")
        self._kill_worker(self.worker)
        self.worker = None
        attempt = 0
        while not self._stop_event.is_set():
            delay = RETRY_DELAYS_S[min(attempt, len(RETRY_DELAYS_S) - 1)]
            if self._stop_event.wait(delay):
                break
            attempt += 1
            try:
                self._open()
            except RtstageError as exc:
                log(f"retry {attempt}: {exc}")
                continue
            gap_s = time.monotonic() - lost_at
            frame = self.engine.frame
            gap = {"tap_frame": self.block.counter(S.C_RING_HEAD), "engine_frame": frame, "gap_s": round(gap_s, 6),
                   "reason": reason}
            self.gaps.append(gap)
            if self.tap is not None:
                self.tap.gaps.append(gap)
            if self.net_out is not None:
                self.net_out.gaps.append(gap)
            self.restarts += 1
            log(f"resumed on '{self.output_name}' after {gap_s:.2f} s (attempt {attempt}); "
                f"discontinuity at sample {frame} recorded")
            return

    def run(self, duration_s=None, install_signals=True):
        """Start (if needed), supervise until the source ends, ``duration_s`` passes or SIGINT/SIGTERM; then stop.

        Returns
        -------
        dict
            The final :meth:`status`.
        """
        previous = {}
        if install_signals:
            for sig in (signal.SIGINT, signal.SIGTERM):
                previous[sig] = signal.signal(sig, self._on_signal)
        try:
            if self.state != "running":
                self.start()
            while not self._stop_event.is_set():
                if duration_s is not None and time.monotonic() - self._start_time >= duration_s:
                    break
                if not self.poll():
                    self._drain_complete()
                    break
                self._stop_event.wait(POLL_S)
        finally:
            result = self.stop()
            for sig, handler in previous.items():
                signal.signal(sig, handler)
        return result

    def _drain_complete(self):
        """Wait (briefly) for the worker to play out after the callback returned paComplete."""
        if self.worker is not None:
            try:
                self.worker.wait(2.0)
            except subprocess.TimeoutExpired:
                pass

    def _on_signal(self, signum, frame):
        self._stop_event.set()

    def request_stop(self):
        """Ask :meth:`run` to stop (thread-safe)."""
        self._stop_event.set()

    def stop(self):
        """Stop the stream, close the tap; returns the final status."""
        self._stop_event.set()
        if self.worker is not None:
            try:
                if self.worker.poll() is None:
                    self.worker.stdin.write("stop\n")
                    self.worker.stdin.flush()
                self.worker.wait(5.0)
            except (OSError, subprocess.TimeoutExpired, ValueError):
                pass
            self._kill_worker(self.worker)
            self.worker = None
        if self.state == "running":
            self._log_applied()
            self._port_events = check_port(self, self._port_events)
        self.state = "stopped"
        tap_summary = self.tap.close() if self.tap is not None else None
        self.tap = None
        if self.net_out is not None:
            tap_summary = self.net_out.close()
        meter_final = self.meters() if self.live_meters is not None and self.live_meters.stop() else None
        status = self.status()
        if tap_summary is not None:
            status["tap"] = tap_summary
        if meter_final is not None:
            status["meters"] = meter_final
        self._final_tap = tap_summary
        gc.unfreeze()
        if self._shm_fd is not None:
            os.close(self._shm_fd)
            self._shm_fd = None
        return status

    # --- status and meters (rtstage.live.status, rtstage.live.metering) ---------------------
    def status(self):
        """Plain-data status: counters, CPU load, uptime, settings, seed (safe to call from any thread)."""
        return live_status(self)

    def meters(self):
        """The latest meter snapshot with engine health (safe to call from any thread).

        Returns
        -------
        dict or None
            The fields of :meth:`rtstage.meters.MeterBank.report` (since the
            last change of word length, dither or shaper), ``frame``,
            ``peak_dbfs``, ``rms_dbfs``, ``clipped``, ``nonfinite`` (see
            :mod:`rtstage.live.meterthread`), and engine health: ``xruns``
            (callbacks with a status flag set), ``xruns_after_settle``,
            ``cpu_load``, ``cpu_load_max``, ``restarts``, and ``auto_muted``
            (per channel).  Before the first
            snapshot, or without meters, only ``frame`` (0), ``peak_dbfs``,
            ``rms_dbfs`` (None), ``clipped``, ``nonfinite`` and the health.
        """
        snap = self.live_meters.latest() if self.live_meters is not None else None
        return meter_snapshot(snap, self.status(), self.channels)

    @property
    def meter_thread(self):
        """The running :class:`~rtstage.live.meterthread.MeterThread`, or None (without meters, or not started)."""
        return self.live_meters.thread if self.live_meters is not None else None
