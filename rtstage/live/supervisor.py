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

Control surface (for the control and meter layers)
--------------------------------------------------
:meth:`LiveEngine.set_settings` publishes new settings through the seqlock
block and returns a sequence number; :meth:`LiveEngine.wait_applied` returns
the sample index at which they took effect; :meth:`LiveEngine.status` returns
a plain dict (counters, CPU load, uptime, settings, seed).
"""

import gc
import json
import os
import select
import signal
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import replace

import numpy as np

from .. import kernel as K
from ..engine import container_bits, encode_params
from ..log import log
from ..errors import RtstageError
from . import shared as S
from .sources import check_source, gen_params, load_source_file, parse_source
from .realtime import engine_realtime, start_notice, warm_meter_thread
from .tap import TapWriter
from .timing import check_port, port_status

DEFAULT_BLOCKSIZE = 256
"""Default frames per callback (a power of two)."""
DEFAULT_CHANNELS = 2
RETRY_DELAYS_S = (0.25, 0.5, 1.0, 2.0)
"""Reopen back-off; the last value repeats."""
POLL_S = 0.02
TAP_RING_S = 2.0
"""Capacity of the tap ring, in seconds of audio."""
METER_RING_S = 1.0
"""Capacity of the meter ring, in seconds of audio."""


class LiveEngine:
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
        self.stream = None
        self.tap = None
        self.restarts = 0
        self.gaps = []
        self.applied_log = []
        self.cpu_load = 0.0
        self.cpu_load_max = 0.0
        self.state = "new"
        self._start_time = None
        self._logged_seq = 0
        self._windows = []
        self._stop_event = threading.Event()
        self._last_frames = -1
        self._last_progress = None
        self._prepared = False
        self.worker = None
        self.worker_load_thread = bool(worker_load_thread)
        self._shm_path = None
        self.rtp_out_options = dict(rtp_out) if rtp_out else None
        self.net_out = None

    # --- prepare --------------------------------------------------------------------
    def prepare(self):
        """Size, compile, warm and open everything but the stream (see the module notes)."""
        src = self.source_spec
        data = None
        if src is not None and src.kind == "file":
            data, file_rate = load_source_file(src.path)
            if self.samplerate is not None and int(self.samplerate) != file_rate:
                raise RtstageError(f"source file {src.path} is at {file_rate} Hz, not {self.samplerate} Hz; "
                                   "rtstage does not resample")
            self.samplerate = file_rate
            if self.channels is not None and int(self.channels) != data.shape[1]:
                raise RtstageError(f"source file {src.path} has {data.shape[1]} channels, not {self.channels}")
            self.channels = data.shape[1]
            if data.shape[0] == 0:
                raise RtstageError(f"source file {src.path} is empty")
        self._choose_devices()
        if self.samplerate is None:
            self.samplerate = int(self._probe["default_samplerate"])
        self.samplerate = int(self.samplerate)
        self.channels = int(self.channels or DEFAULT_CHANNELS)
        if src is not None and src.generated:
            check_source(src, self.samplerate)
        self.settings = self.settings.resolved(self.samplerate)
        self.out_bits = 16 if container_bits(self.settings.bits) == 16 else 32
        if self.packed24 and (self.out_bits != 32 or self.callback_mode != "compiled"):
            raise RtstageError("packed 24-bit output needs a 17..24-bit word and the compiled callback")
        ring_frames = max(int(TAP_RING_S * self.samplerate), 4 * self.blocksize) if self.tap_path or self.rtp_out_options else 0
        src_frames = 0 if data is None else data.shape[0]
        meter_frames = max(int(self.meter_ring_s * self.samplerate), 8 * self.blocksize) if self.meter_ring_s > 0 else 0
        geometry = (self.channels, self.out_bits, self.blocksize, ring_frames, src_frames, meter_frames)
        nbytes = S._layout(*geometry)[2]
        shm_dir = "/dev/shm" if os.path.isdir("/dev/shm") else None
        fd, self._shm_path = tempfile.mkstemp(prefix="rtstage-live-", dir=shm_dir)
        os.ftruncate(fd, nbytes)
        import mmap

        self._memory = mmap.mmap(fd, nbytes)
        os.close(fd)
        self.block = S.SharedBlock(*geometry, buffer=self._memory)
        if data is not None:
            self.block.source[:] = data
        self._configure(self.block)
        kst = self.block.kernel
        encode_params(self.settings, self.samplerate, self.out_shift, kst.iparams, kst.fparams)
        kst.reset(0)
        self._new_ip = np.zeros(K.IP_LEN, dtype=np.int64)
        self._new_fp = np.zeros(K.FP_LEN, dtype=np.float64)
        self._warm()
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
    def out_shift(self):
        """Left shift from the word to its container."""
        return (16 if self.out_bits == 16 else 32) - self.settings.bits

    def _configure(self, block):
        ctl = block.ctl
        ctl[S.C_SAMPLERATE] = self.samplerate
        src = self.source_spec
        if src is None:
            ctl[S.C_IN_MODE] = S.IN_DEVICE
        elif src.kind == "file":
            ctl[S.C_IN_MODE] = S.IN_FILE
            ctl[S.C_SRC_LOOP] = 1 if self.loop else 0
        else:
            ctl[S.C_IN_MODE] = S.IN_GENERATOR
            kind, freq_hz, amplitude, seed_bits = gen_params(src, self.samplerate)
            ctl[S.C_GEN_KIND] = kind
            ctl[S.C_GEN_SEED] = seed_bits
            block.gen_fp[0] = freq_hz
            block.gen_fp[1] = amplitude

    def _worker_command(self, *args):
        return [sys.executable, "-m", "rtstage.live.worker", *args]

    def _choose_devices(self):
        """Resolve the device specs in a probe process (PortAudio never runs in this process)."""
        req = self.requested
        cmd = self._worker_command("probe", "--duplex", "1" if self.source_spec is None else "0")
        for key in ("device", "input_device", "output_device", "hostapi"):
            if req[key] is not None:
                cmd += ["--" + key.replace("_", "-"), str(req[key])]
        result = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, timeout=60)
        try:
            reply = json.loads(result.stdout.strip().splitlines()[-1])
        except (IndexError, ValueError):
            raise RtstageError(f"cannot list audio devices: {result.stderr.strip()[-300:]}") from None
        if not reply["ok"]:
            raise RtstageError(reply["error"])
        self._probe = reply
        self.output_name, self.input_name, self.hostapi_name = reply["output_name"], reply["input_name"], reply["hostapi_name"]
        for warning in reply["warnings"]:
            log(f"warning: {warning}; output words may be changed before they reach the hardware")
        if reply["note"]:
            log(f"note: {reply['note']}")

    def _warm(self):
        """Compile (or load from the cache) the callback and run the Python-side helpers once with the real types."""
        from .cfunc import build_callback

        build_callback()
        scratch = S.SharedBlock(self.channels, self.out_bits, self.blocksize, 4 * self.blocksize)
        S.publish_params(scratch.ctl, scratch.pending_ip, scratch.pending_fp, self._new_ip, self._new_fp)
        S.applied(scratch.ctl)
        S.ring_read(scratch.ctl, scratch.ring, np.zeros((8, self.channels), dtype=scratch.out_dtype))

    # --- run ------------------------------------------------------------------------
    def _open(self, timeout_s=60.0):
        """Start a stream worker and wait until its stream runs; raises RtstageError when it cannot open."""
        cmd = self._worker_command(
            "stream", "--shm", self._shm_path, "--geometry", ",".join(str(v) for v in self.block.geometry),
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
        proc = subprocess.Popen(cmd, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
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
        self._windows.append({"start": now, "at_start": self._flags(), "at_settle": None})
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
        self._start_meters()
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

    def _flags(self):
        return {name: self.block.counter(idx) for name, idx in S.FLAG_COUNTERS}

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
        window = self._windows[-1] if self._windows else None
        if window is not None and window["at_settle"] is None and now - window["start"] >= self.settle_s:
            window["at_settle"] = self._flags()
        self._port_events = check_port(self, getattr(self, "_port_events", 0))  # missing/repeated periods
        if self.finished:
            return False
        stream_alive = self.worker is not None and self.worker.poll() is None
        frames = self.block.counter(S.C_FRAMES)
        if frames != self._last_frames:
            self._last_frames = frames
            self._last_progress = now
            load = self.block.counter(S.C_CPU_LOAD_PPM) * 1e-6
            self.cpu_load = load
            if window is not None and window["at_settle"] is not None:
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
            frame = int(self.block.kernel.clock[K.CLK_FRAME])
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

    def _log_applied(self):
        seq, frame = S.applied(self.block.ctl)
        if seq != self._logged_seq and seq != 0:
            self._logged_seq = seq
            self.applied_log.append({"seq": int(seq), "frame": int(frame)})
            del self.applied_log[:-1000]  # bounded for long runs; the automation log keeps every change
            log(f"settings #{seq // 2} took effect at sample {frame}")

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
            self._port_events = check_port(self, getattr(self, "_port_events", 0))
        self.state = "stopped"
        tap_summary = self.tap.close() if self.tap is not None else None
        self.tap = None
        if self.net_out is not None:
            tap_summary = self.net_out.close()
        meter_final = self._stop_meters()
        status = self.status()
        if tap_summary is not None:
            status["tap"] = tap_summary
        if meter_final is not None:
            status["meters"] = meter_final
        self._final_tap = tap_summary
        gc.unfreeze()
        if self._shm_path is not None:
            try:
                os.unlink(self._shm_path)
            except OSError:
                pass
            self._shm_path = None
        return status

    # --- control surface ------------------------------------------------------------
    def set_settings(self, settings):
        """Publish new settings; they take effect at the next block boundary.

        The seed is kept from the start, and the word length may not change
        the output container.  Gain changes ramp over
        :data:`rtstage.engine.GAIN_RAMP_SECONDS`.

        Returns
        -------
        int
            Sequence number to pass to :meth:`wait_applied`.
        """
        settings = replace(settings, seed=self.settings.seed).resolved(self.samplerate)
        if (16 if container_bits(settings.bits) == 16 else 32) != self.out_bits:
            raise RtstageError(f"bits={settings.bits} does not fit this stream's {self.out_bits}-bit output")
        out_shift = (16 if self.out_bits == 16 else 32) - settings.bits
        encode_params(settings, self.samplerate, out_shift, self._new_ip, self._new_fp)
        seq = S.publish_params(self.block.ctl, self.block.pending_ip, self.block.pending_fp, self._new_ip, self._new_fp)
        self.settings = settings
        return int(seq)

    def wait_applied(self, seq, timeout_s=2.0):
        """Sample index at which settings ``seq`` took effect, or None after ``timeout_s``."""
        deadline = time.monotonic() + timeout_s
        while True:
            applied_seq, frame = S.applied(self.block.ctl)
            if applied_seq >= seq:
                self._log_applied()
                return int(frame)
            if time.monotonic() >= deadline:
                return None
            time.sleep(0.001)

    def status(self):
        """Plain-data status: counters, CPU load, uptime, settings, seed (safe to call from any thread)."""
        b = self.block
        flags = self._flags() if b is not None else {}
        after = dict(flags)
        for w in self._windows:
            end = w["at_settle"] if w["at_settle"] is not None else flags
            for name in after:
                after[name] -= end[name] - w["at_start"][name]
        uptime = 0.0 if self._start_time is None else time.monotonic() - self._start_time
        result = {
            "state": self.state,
            "uptime_s": round(uptime, 3),
            "samplerate": self.samplerate,
            "blocksize": self.blocksize,
            "channels": self.channels,
            "callback": self.callback_mode,
            "device": {"output": getattr(self, "output_name", None), "input": getattr(self, "input_name", None),
                       "hostapi": getattr(self, "hostapi_name", None)},
            "source": self.source_spec.describe() if self.source_spec else "input",
            "settings": self.settings.to_dict() if hasattr(self.settings, "to_dict") else None,
            "seed": getattr(self.settings, "seed", None),
            "blocks": b.counter(S.C_CALLBACKS) if b else 0,
            "frames": b.counter(S.C_FRAMES) if b else 0,
            "engine_frame": int(b.kernel.clock[K.CLK_FRAME]) if b else 0,
            "xruns": flags,
            "xruns_after_settle": after,
            "settle_s": self.settle_s,
            "cpu_load": round(self.cpu_load, 6),
            "cpu_load_max": round(self.cpu_load_max, 6),
            "restarts": self.restarts,
            "discontinuities": len(self.gaps),
            "gaps": list(self.gaps),
            "source_done": bool(b.counter(S.C_SRC_DONE)) if b else False,
            "source_loops": b.counter(S.C_LOOPS) if b else 0,
            "tap_frames": b.counter(S.C_RING_HEAD) if b else 0,
            "tap_dropped_frames": b.counter(S.C_RING_DROPPED) if b else 0,
            "clipped": b.kernel.counts[:, K.CNT_CLIPPED].tolist() if b else [],
            "nonfinite": b.kernel.counts[:, K.CNT_NONFINITE].tolist() if b else [],
        "auto_muted": (b.kernel.counts[:, K.CNT_AM_MUTED] != 0).tolist() if b else [],
        "auto_muted_frames": b.kernel.counts[:, K.CNT_AM_FRAMES].tolist() if b else [],
            "settings_applied": list(self.applied_log),
            "realtime": engine_realtime(self),
            "port": port_status(b.ctl, self.samplerate, self.blocksize, getattr(self, "port_late", None)) if b else {},
        }
        if self.net_out is not None:
            result["streams"] = {"rtp_out": self.net_out.stats()}
        return result

    # --- meters (rtstage.live.meterthread) --------------------------------------------
    def _start_meters(self):
        """Start the meter thread on the meter ring (once; it carries on across stream restarts)."""
        if getattr(self, "meter_thread", None) is not None or self.block.counter(S.C_METER_ON) == 0:
            return
        from ..meters import MeterBank
        from .meterthread import MeterThread

        shaper = self.settings.shaper
        # Compile (or load from the cache) every meter kernel now, with the real types: compiling
        # them in the meter thread's first update would hold the GIL for seconds while audio runs,
        # starving the control and MIDI threads.
        s = self.settings
        width = 16 if self.block.out_dtype == np.int16 else 32
        warm = MeterBank(self.channels, self.samplerate, s.bits, shaper.coefs, s.dither, s.dither_scale,
                         out_shift=width - s.bits, shaper_id=shaper.id)
        frames = 4096
        warm.update(np.zeros((frames, self.channels)), np.zeros((frames, self.channels), dtype=self.block.out_dtype))
        warm.report()
        self._meter_shapers = {tuple(shaper.coefs): shaper.id}
        warm_meter_thread(self.block, self.samplerate, MeterThread,  # the ring read and snapshot path too
                          loudness_target=getattr(self, "loudness_target", None))
        self.meter_thread = MeterThread(self.block, self.samplerate, shaper_name=self._meter_shaper_name,
                                        loudness_target=getattr(self, "loudness_target", None)).start()

    def _meter_shaper_name(self, coefs):
        shaper = self.settings.shaper
        if hasattr(shaper, "coefs"):
            self._meter_shapers.setdefault(tuple(shaper.coefs), shaper.id)
        return self._meter_shapers.get(tuple(coefs))

    def _stop_meters(self):
        """Stop the meter thread after a last drain; returns :meth:`meters` (None without meters)."""
        thread = getattr(self, "meter_thread", None)
        if thread is None:
            return None
        thread.stop()
        if thread.error is not None:
            log(f"meter thread failed: {thread.error}")
        return self.meters()

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
        thread = getattr(self, "meter_thread", None)
        snap = thread.latest() if thread is not None else None
        status = self.status()
        if snap is None:
            snap = {"frame": 0, "peak_dbfs": [None] * (self.channels or 0), "rms_dbfs": [None] * (self.channels or 0),
                    "clipped": status["clipped"], "nonfinite": status["nonfinite"]}
        out = dict(snap)
        out.update({
            "state": status["state"],
            "xruns": status["xruns"]["flagged_callbacks"],
            "xruns_after_settle": status["xruns_after_settle"]["flagged_callbacks"],
            "cpu_load": status["cpu_load"],
            "cpu_load_max": status["cpu_load_max"],
            "restarts": status["restarts"],
            "auto_muted": status["auto_muted"],
        })
        if "streams" in status:
            out["streams"] = status["streams"]
        return out
