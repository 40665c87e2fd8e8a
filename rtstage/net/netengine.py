"""The engine without an audio device (``rtstage run --device none``): clocked by rtstage or by arrivals.

Two ways to clock the engine:

Paced (a file or generator source)
    A producer thread runs :func:`_produce_loop`, compiled, without the GIL:
    it sleeps to absolute deadlines on a clock (``CLOCK_MONOTONIC``, or
    ``CLOCK_TAI`` when asked), and at the deadline of packet k runs the
    engine's kernel (:func:`rtstage.kernel.process_block`, on the arrays of an
    :class:`rtstage.engine.Engine`) on that packet's frames and writes the
    words into SPSC rings (network, tap).  Deadline k lies
    :data:`PRODUCER_LEAD_S` (whole packets, at least one) before the packet's
    send time; times are ``ceil((s0 + j)·1e9 / rate)`` ns for sample j, computed
    from the packet count alone: a late wake-up never shifts later ones, so the
    sample count follows the clock for as long as it runs (no drift).
    A sender thread runs :func:`_send_loop`, also compiled and without the
    GIL: it sleeps to the clock time of the sample that follows packet k (the
    packet has then "happened", as it would have for a converter), takes the
    words from the ring, builds the RTP packet and sends it with ``send(2)``.
    Its deviation from that ideal time is recorded per packet.
Arrival-clocked (``--source rtp:`` or ``sdp:``)
    The receiver thread (:class:`rtstage.net.receiver.RtpReceiver`) hands
    each packet, in order after the jitter buffer, to the engine at once; the
    words go into the same rings and the sender sends each packet as soon as
    it is complete.

Both threads ask for SCHED_FIFO (granted to root or with an rtprio limit) and
a 1 ns timer slack.  The words are those of :meth:`Engine.process` by
construction: the same kernel on the same state arrays, sample index 0 at the
first frame, so ``rtstage render`` of the same input and settings gives the
same words.
"""

import json
import os
import threading
import time

import numpy as np
from numba import njit

from .. import kernel as K
from ..engine import Engine
from ..log import log
from ..errors import RtstageError
from ..live import shared as S
from ..live import timing as T
from ..live.sources import fill_generated
from ..live.surface import ControlSurface, applied_log
from . import _native as N
from .rtp import RtpOutConfig, open_sender_socket, pack_packet

# --- ctl layout (int64) -----------------------------------------------------------------
C_STOP = 0
"""Set by Python: the producer stops at its next deadline."""
C_DONE = 1
"""Set by the producer (or the receiver side) when no more words will come."""
C_FRAMES = 2
"""Frames produced."""
C_NET_HEAD, C_NET_TAIL, C_NET_DROPPED = 3, 4, 5
C_TAP_HEAD, C_TAP_TAIL, C_TAP_DROPPED = 6, 7, 8
C_SRC_POS = 9
C_WAKE_LATE_MAX = 10
"""Largest producer wake-up lateness, ns."""
C_SENT = 11
C_LATE = 12
"""Packets sent later than one packet time after their ideal time."""
C_DEV_MAX = 13
C_SEND_ERRORS = 14
C_WAITS = 15
"""Packets the sender had to wait for (ring not yet filled at its deadline)."""
C_SEND_QUIT = 16
"""Set by Python: the sender stops at once (after a stop timeout)."""
C_PRODUCED_PACKETS = 17
C_LEN = 24

MODE_GENERATOR = 0
MODE_FILE = 1
DEV_CAPACITY = 1 << 18
"""Send deviations kept (the last 262144 packets: 4.4 min at 1 ms)."""
DEFAULT_RT_PRIORITY = 70
MAX_BLOCK_FRAMES = 4096
"""Rows of the meter tap: the largest block metered (an input packet holds far fewer frames)."""
PRODUCER_LEAD_S = 0.0025
"""How far ahead of its send time a packet is computed (about; see ``prepare``): a producer woken late by
less than this never delays a send."""
PRODUCER_OFFSET = True
"""Keep the producer's deadlines half a packet off the sender's (two realtime threads waking together on a
2-core machine would queue one behind the other)."""
_WAIT_NS = 20_000
"""Sleep between looks at an empty ring (the sender waiting for words)."""


@njit(nogil=True, cache=True)
def _produce_loop(ctl, clock_id, q0, r0, rate, fpp, mode, gen_kind, gen_freq, gen_amp, gen_seed, src, loop_src,
                  xbuf, ybuf, vq, genw, iparams, fparams, hist, counts, kclock, ramp, rng_words, rng_tag,
                  net_ring, tap_ring, ts, pctl, pending_ip, pending_fp, scratch_ip, scratch_fp, lead_frames,
                  meter_x, meter_w, yq):
    k = 0
    while ctl[C_STOP] == 0:
        deadline = N.sample_time_ns(q0, r0, rate, (k + 1) * fpp - lead_frames)
        N.sleep_until(clock_id, deadline, ts)
        late = N.now_ns(clock_id, ts) - deadline
        if late > ctl[C_WAKE_LATE_MAX]:
            ctl[C_WAKE_LATE_MAX] = late
        # New settings (control socket) at the block boundary, through the live engine's seqlock; the block's
        # start and end on CLOCK_MONOTONIC as the live callback stamps them (rtstage.live.handoff reads them).
        pctl[T.C_CB_START_FRAME] = kclock[K.CLK_FRAME]
        pctl[T.C_CB_START_NS] = N.now_ns(N.CLOCK_MONOTONIC, ts)
        S.take_params(pctl, pending_ip, pending_fp, scratch_ip, scratch_fp, iparams, fparams, kclock[K.CLK_FRAME])
        n = fpp
        if mode == MODE_FILE:
            pos = ctl[C_SRC_POS]
            total = src.shape[0]
            got = 0
            while got < n:
                if pos >= total:
                    if loop_src == 0:
                        break
                    pos = 0
                take = min(n - got, total - pos)
                for i in range(take):
                    for c in range(src.shape[1]):
                        xbuf[got + i, c] = src[pos + i, c]
                got += take
                pos += take
            ctl[C_SRC_POS] = pos
            n = got
        else:
            fill_generated(gen_kind, gen_freq, gen_amp, gen_seed, rate, ctl[C_FRAMES], xbuf, n, genw)
        if n > 0:
            K.process_block(xbuf, ybuf, vq, n, iparams, fparams, hist, counts, kclock, ramp, rng_words, rng_tag, yq)
            S.meter_ring_write(pctl, meter_x, meter_w, vq, yq, n)
            N.ring_write(ctl, C_NET_HEAD, C_NET_TAIL, C_NET_DROPPED, net_ring, ybuf, n)
            N.ring_write(ctl, C_TAP_HEAD, C_TAP_TAIL, C_TAP_DROPPED, tap_ring, ybuf, n)
            ctl[C_FRAMES] += n
            ctl[C_PRODUCED_PACKETS] += 1
        pctl[T.C_CB_DONE_NS] = N.now_ns(N.CLOCK_MONOTONIC, ts)
        if n < fpp:
            break
        k += 1
    N.fence()
    ctl[C_DONE] = 1


@njit(nogil=True, cache=True)
def _send_loop(ctl, clock_id, paced, q0, r0, rate, fpp, net_ring, words, pkt, fd, sample_bytes, payload_type,
               first_seq, ts_base, ssrc, devs, ptime_ns, ts):
    k = 0
    nch = words.shape[1]
    while ctl[C_SEND_QUIT] == 0:
        deadline = 0
        if paced:
            deadline = N.sample_time_ns(q0, r0, rate, (k + 1) * fpp)
            N.sleep_until(clock_id, deadline, ts)
        waited = False
        last = False
        while N.ring_avail(ctl, C_NET_HEAD, C_NET_TAIL) < fpp:
            if ctl[C_DONE] != 0 and N.ring_avail(ctl, C_NET_HEAD, C_NET_TAIL) < fpp:
                last = True
                break
            if ctl[C_SEND_QUIT] != 0:
                return
            waited = True
            N.sleep_for(clock_id, _WAIT_NS, ts)
        if waited:
            ctl[C_WAITS] += 1
        got = N.ring_read(ctl, C_NET_HEAD, C_NET_TAIL, net_ring, words, fpp)
        if got == 0:
            return
        for i in range(got, fpp):  # the last packet of a finished source: pad with digital zero words
            for c in range(nch):
                words[i, c] = 0
        length = pack_packet(pkt, words, 0, fpp, sample_bytes, k == 0, payload_type, (first_seq + k) & 0xFFFF,
                             (ts_base + k * fpp) & 0xFFFFFFFF, ssrc)
        sent_at = N.now_ns(clock_id, ts)
        if N.send_bytes(fd, pkt, length) < 0:
            ctl[C_SEND_ERRORS] += 1
        if paced:
            dev = sent_at - deadline
            devs[k % devs.shape[0]] = dev
            if dev > ptime_ns:
                ctl[C_LATE] += 1
            if dev > ctl[C_DEV_MAX]:
                ctl[C_DEV_MAX] = dev
        k += 1
        ctl[C_SENT] = k
        if last:
            return


def _shared_block(engine, max_frames, meter_frames, publish):
    """A :class:`rtstage.live.shared.SharedBlock` holding ``engine``'s kernel state, which the engine then runs on.

    The control layer (:class:`rtstage.control.live_target.LiveTarget`: seqlock,
    ``applied``, counters) and the meters (:class:`rtstage.live.meterthread.MeterThread`:
    the meter ring) then drive and read this engine exactly as they do a live one.
    ``publish`` is the engine's publish hook (the seqlock write into this block).
    """
    block = S.SharedBlock(engine.channels, engine.container_bits, max_frames, 0, 0, meter_frames)
    engine.use_memory(block.kernel, publish=lambda iparams, fparams: publish(block, iparams, fparams))
    block.pending_ip[:] = block.kernel.iparams
    block.pending_fp[:] = block.kernel.fparams
    return block


def _seqlock(block):
    return block.ctl, block.pending_ip, block.pending_fp, block.scratch_ip, block.scratch_fp


class _TapThread:
    """Drains the tap ring into a sound file (PCM_16 up to 16-bit words, else PCM_24) and writes the gaps sidecar.

    The file is a stream of the output policy (:class:`rtstage.files.policy.StreamOutput`),
    as the live engine's tap (:mod:`rtstage.live.tap`): written under a hidden
    temporary name while the run lasts, sealed onto ``path`` by :meth:`close`
    (or at once, with one warning line, when a write fails), never removed.
    """

    def __init__(self, path, ctl, ring, samplerate, bits, info):
        import soundfile as sf

        from ..files.policy import open_stream

        self.path = path
        self.ctl = ctl
        self.ring = ring
        self.info = info
        self.gaps = []
        self.frames = 0
        subtype = "PCM_16" if ring.dtype == np.int16 else "PCM_24"
        self.stream = open_stream(path, "tap")
        try:
            self._file = sf.SoundFile(self.stream.tmp, "w", int(samplerate), ring.shape[1], subtype, format="WAV")
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            self.stream.discard()
            raise RtstageError(f"cannot open tap file {path}: {exc}") from None
        self._chunk = np.zeros((8192, ring.shape[1]), dtype=ring.dtype)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="rtstage-net-tap", daemon=True)
        self.error = None
        self._reason = None
        self.frames_kept = None
        self.stream.finalize = self._finish_file

    def start(self):
        self._thread.start()
        return self

    def _drain(self):
        while True:
            n = N.ring_read(self.ctl, C_TAP_HEAD, C_TAP_TAIL, self.ring, self._chunk, self._chunk.shape[0])
            if n == 0:
                return
            self._file.write(self._chunk[:n])
            self.frames += n

    def _run(self):
        try:
            while not self._stop.wait(0.02):
                self._drain()
            self._drain()
        except Exception as exc:
            try:
                self._cut_short(exc)  # sealed (and said) before the error shows
            finally:
                self.error = exc

    def _cut_short(self, exc):
        """After a write error (on the tap thread): seal what was written, with one warning line."""
        import soundfile as sf

        from ..files.policy import failure_reason

        self._reason = failure_reason(self.path, self.stream.tmp, exc)
        try:
            self._file.close()
        except Exception:  # the header could not be finished; the words are still there
            pass
        try:
            self.frames_kept = int(sf.info(self.stream.tmp).frames)
        except Exception:
            self.frames_kept = int(self.frames)
        try:
            self.stream.seal(cut_short=f"{self._reason}; the tap stopped after {self.frames_kept} frames, "
                             "the run goes on")
        except RtstageError as err:
            self._reason = f"{self._reason}; {err}"

    def _finish_file(self):
        """Stop the thread and close the sound file (its header finalized); called before sealing."""
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join()
        self._file.close()

    def close(self):
        from ..files.policy import WriteFailed, write_whole_file

        self._finish_file()
        summary = {"path": self.path, "frames": int(self.frames), "dropped_frames": int(self.ctl[C_TAP_DROPPED]),
                   "gaps": list(self.gaps)}
        self.stream.seal()
        try:
            write_whole_file(self.path + ".gaps.json", json.dumps({**summary, **self.info}, indent=1))
        except WriteFailed:
            if self.error is None:
                raise
        if self.error is not None:
            raise WriteFailed(f"tap file {self.path}: write failed: {self._reason}; the {self.frames_kept} frames "
                              "written before are kept in it")
        return summary


class NetEngine(ControlSurface):
    """An engine with no audio device: paced by a clock, or by the arrival of an RTP stream.

    Parameters
    ----------
    settings : EngineSettings
        Engine settings (a missing seed is drawn).
    source : SourceSpec or RtpSource
        A generated or file source (paced), or an RTP input (arrival-clocked).
    samplerate, channels : int or None
        Required for a generator; taken from a file or an RTP source.
    rtp_out : dict or None
        Keyword arguments of :class:`rtstage.net.rtp.RtpOutConfig` other than the format
        (``host``, ``port``, ``encoding``, ``ptime_ms``, ``payload_type``, ``dscp``, ``ttl``,
        ``multicast_interface``).
    tap : str or None
        File receiving exactly the words sent (WAV).
    clock : {'local', 'tai'}
        Pacing clock: ``CLOCK_MONOTONIC`` (free-running) or ``CLOCK_TAI``.
    rt_priority : int
        SCHED_FIFO priority of the producer and sender threads (0: none).
    loop : bool
        Loop a file source.
    block_ms : float
        Producer block without an RTP output (tap only), in ms.
    """

    def __init__(self, settings, source, samplerate=None, channels=None, rtp_out=None, tap=None, clock="local",
                 rt_priority=DEFAULT_RT_PRIORITY, loop=False, block_ms=1.0, meters=True):
        self.settings = settings
        self.source = source
        self.samplerate = samplerate
        self.channels = channels
        self.rtp_out_options = dict(rtp_out) if rtp_out else None
        self.tap_path = tap
        if clock not in ("local", "tai"):
            raise RtstageError(f"unknown clock {clock!r} (local or tai)")
        self.clock = clock
        self.clock_id = N.CLOCK_TAI if clock == "tai" else N.CLOCK_MONOTONIC
        self.rt_priority = int(rt_priority)
        self.loop = bool(loop)
        self.block_ms = float(block_ms)
        self.meters_on = bool(meters)
        self.meter_thread = None
        self.state = "new"
        self.block = None
        self.out = None
        self.receiver = None
        self.realtime = {}
        self._threads = []
        self._tap = None
        self._sock = None
        self._start_time = None
        self._stop_event = threading.Event()
        self._logged_seq = 0
        self.applied_log = applied_log()

    @property
    def clock_name(self):
        return "CLOCK_TAI" if self.clock == "tai" else "CLOCK_MONOTONIC"

    @property
    def arrival_clocked(self):
        return getattr(self.source, "kind", None) == "rtp"

    # --- prepare -------------------------------------------------------------------------
    def prepare(self):
        from ..live.sources import check_source, load_source_file

        src = self.source
        self._src = np.zeros((0, 1), dtype=np.float64)
        if self.arrival_clocked:
            self.samplerate, self.channels = src.samplerate, src.channels
        elif src.kind == "file":
            data, rate = load_source_file(src.path)
            if self.samplerate is not None and int(self.samplerate) != rate:
                raise RtstageError(f"source file {src.path} is at {rate} Hz, not {self.samplerate} Hz; rtstage does not resample")
            if self.channels is not None and int(self.channels) != data.shape[1]:
                raise RtstageError(f"source file {src.path} has {data.shape[1]} channels, not {self.channels}")
            if data.shape[0] == 0:
                raise RtstageError(f"source file {src.path} is empty")
            self.samplerate, self.channels = rate, data.shape[1]
            self._src = np.ascontiguousarray(data)
        else:
            if self.samplerate is None:
                raise RtstageError("--device none with a generated source needs --samplerate")
            self.channels = int(self.channels or 2)
            check_source(src, int(self.samplerate))
        self.samplerate = int(self.samplerate)
        self.channels = int(self.channels)
        self.engine = Engine(self.settings, self.channels, self.samplerate, exact_format=True)
        self.settings = self.engine.settings
        rate = self.samplerate
        if self.rtp_out_options is not None:
            self.out = RtpOutConfig(samplerate=rate, channels=self.channels, bits=self.settings.bits,
                                    **self.rtp_out_options)
            self.fpp = self.out.frames
        else:
            self.out = None
            self.fpp = max(1, int(round(self.block_ms * rate / 1000.0)))
        self.blocksize = self.fpp
        """Frames per block of the clocked thread (the control layer's block period)."""
        meter_frames = max(rate, 8 * MAX_BLOCK_FRAMES) if self.meters_on else 0
        self.block = _shared_block(self.engine, max(self.fpp, MAX_BLOCK_FRAMES), meter_frames, S.publish_into)
        nch = self.channels
        dtype = self.engine.dtype
        self.ctl = np.zeros(C_LEN, dtype=np.int64)
        ring_rows = max(rate, 64 * self.fpp)
        self.net_ring = np.zeros((ring_rows if self.out is not None else 0, nch), dtype=dtype)
        self.tap_ring = np.zeros((2 * ring_rows if self.tap_path else 0, nch), dtype=dtype)
        # The producer runs about PRODUCER_LEAD_S ahead of the sender, half a packet off the send grid, so the
        # two clocked threads never wake at the same instant.
        lead_packets = max(1, -(-int(round(PRODUCER_LEAD_S * rate)) // self.fpp))
        self.lead_frames = lead_packets * self.fpp - (self.fpp // 2 if PRODUCER_OFFSET else 0)
        self.xbuf = np.zeros((self.fpp, nch), dtype=np.float64)
        self.ybuf = np.zeros((self.fpp, nch), dtype=dtype)
        self.vq = self.block.vq
        self.genw = np.zeros((nch, 4), dtype=np.uint64)
        self.devs = np.zeros(DEV_CAPACITY, dtype=np.int64)
        for arr in (self.net_ring, self.tap_ring, self.devs):
            arr.fill(1)  # touch every page now: no page fault on the clocked threads' first writes
            arr.fill(0)
        self._warm()
        self._warm_meters()
        if self.tap_path:
            info = {"settings": self.settings.to_dict(), "samplerate": rate, "source": self.source.describe()}
            self._tap = _TapThread(self.tap_path, self.ctl, self.tap_ring, rate, self.settings.bits, info)
        if self.out is not None:
            self._sock = open_sender_socket(self.out)
        self.state = "prepared"
        return self

    def _gen_params(self):
        from ..live.sources import gen_params

        if getattr(self.source, "generated", False):
            return gen_params(self.source, self.samplerate)
        return 0, 0.0, 0.0, 0

    def _warm(self):
        """Compile (or load from numba's cache) both loops with the real types, on scratch arrays."""
        ctl = np.zeros(C_LEN, dtype=np.int64)
        ctl[C_STOP] = 1  # the producer returns before its first deadline
        ts = np.zeros(2, dtype=np.int64)
        st = K.KernelState(self.channels)
        kind, freq_hz, amp, seed = self._gen_params()
        mode = MODE_FILE if getattr(self.source, "kind", None) == "file" else MODE_GENERATOR
        _produce_loop(ctl, self.clock_id, 0, 0, self.samplerate, self.fpp, mode, kind, freq_hz, amp, seed, self._src,
                      0, self.xbuf, self.ybuf, self.vq, self.genw, *st.arrays(), self.net_ring, self.tap_ring, ts,
                      *_seqlock(self.block), self.fpp, self.block.meter_x, self.block.meter_words,
                      self.block.requantized)
        S.publish_params(np.zeros(S.C_LEN, dtype=np.int64), self.block.pending_ip.copy(), self.block.pending_fp.copy(),
                         self.block.pending_ip, self.block.pending_fp)
        # The kernel itself, once on silence, on a scratch state.
        K.process_block(self.xbuf, self.ybuf, self.vq, self.fpp, *st.arrays(), self.block.requantized)
        if self.out is not None:
            ctl[C_SEND_QUIT] = 1
            _send_loop(ctl, self.clock_id, True, 0, 0, self.samplerate, self.out.frames, self.net_ring, self.ybuf,
                       np.zeros(self.out.packet_bytes, dtype=np.uint8), -1, self.out.sample_bytes,
                       self.out.payload_type, 0, 0, 0, self.devs, 1, ts)
        N.ring_write(ctl, C_TAP_HEAD, C_TAP_TAIL, C_TAP_DROPPED, self.tap_ring, self.ybuf, 0)
        N.ring_read(ctl, C_TAP_HEAD, C_TAP_TAIL, self.tap_ring, self.ybuf, 0)

    # --- run -----------------------------------------------------------------------------
    def _thread(self, name, target):
        def body():
            self.realtime[name] = N.try_realtime(self.rt_priority)
            N.set_timer_slack(1)
            target()

        t = threading.Thread(target=body, name=f"rtstage-{name}", daemon=True)
        self._threads.append(t)
        return t

    def start(self):
        """Start the threads: sender first, then the producer (paced) or the receiver (arrival-clocked)."""
        if self.state == "new":
            self.prepare()
        if self.state != "prepared":
            raise RtstageError(f"the engine cannot start from state {self.state!r}")
        if self._tap is not None:
            self._tap.start()
        self._start_meters()
        rate = self.samplerate
        # The first packet's first sample lies 10 ms ahead: time for the threads to reach their loops.
        start_sample = (N.clock_now_ns(self.clock_id) + 10_000_000) * rate // N.NS_PER_S + 1
        self.start_sample = start_sample
        q0, r0 = divmod(start_sample * N.NS_PER_S, rate)
        self._q0r0 = (q0, r0)
        self._start_time = time.monotonic()
        self.state = "running"
        if self.out is not None:
            out = self.out
            # RTP timestamp of clock sample s: ts_offset + s (mod 2^32); the SDP states ts_offset (a=mediaclk:direct).
            ts_base = (out.ts_offset + (0 if self.arrival_clocked else start_sample)) & 0xFFFFFFFF
            self.ts_base = ts_base
            pkt = np.zeros(out.packet_bytes, dtype=np.uint8)
            words = np.zeros((out.frames, self.channels), dtype=self.engine.dtype)
            paced = not self.arrival_clocked
            fd = self._sock.fileno()

            def send():
                _send_loop(self.ctl, self.clock_id, paced, q0, r0, rate, out.frames, self.net_ring, words, pkt, fd,
                           out.sample_bytes, out.payload_type, out.first_seq, ts_base, out.ssrc, self.devs,
                           int(out.ptime * 1_000_000), np.zeros(2, dtype=np.int64))

            self._thread("rtp-send", send).start()
        if self.arrival_clocked:
            self._start_receiver()
        else:
            st = self.engine.state
            kind, freq_hz, amp, seed = self._gen_params()
            mode = MODE_FILE if self.source.kind == "file" else MODE_GENERATOR

            def produce():
                _produce_loop(self.ctl, self.clock_id, q0, r0, rate, self.fpp, mode, kind, freq_hz, amp, seed, self._src,
                              1 if self.loop else 0, self.xbuf, self.ybuf, self.vq, self.genw, *st.arrays(),
                              self.net_ring, self.tap_ring, np.zeros(2, dtype=np.int64), *_seqlock(self.block),
                              self.lead_frames, self.block.meter_x, self.block.meter_words, self.block.requantized)

            self._thread("engine-clock", produce).start()
        log(f"running without a device: {rate} Hz, {self.channels} ch, {self.settings.bits}-bit "
            f"{self.settings.dither} dither, shaper {self.settings.shaper_id}, seed {self.settings.seed}; "
            + ("clocked by the arriving stream" if self.arrival_clocked else f"clocked by {self.clock_name}")
            + (f"; RTP {self.out.encoding} to {self.out.host}:{self.out.port}" if self.out else ""))
        return self

    def _start_receiver(self):
        from .receiver import RtpReceiver

        src = self.source

        def on_block(x, gap):
            n = x.shape[0]
            pctl = self.block.ctl
            pctl[T.C_CB_START_FRAME] = self.engine.frame
            pctl[T.C_CB_START_NS] = time.monotonic_ns()
            S.take_params(*_seqlock(self.block), *self.engine.state.arrays()[:2], self.engine.frame)
            if self._in_y.shape[0] < n:
                self._in_y = np.zeros((n, self.channels), dtype=self.engine.dtype)
            y = self._in_y[:n]
            b = self.block
            if n <= b.vq.shape[0]:
                self.engine.process(x, out=y, quantizer_in=b.vq, requantized=b.requantized)
                S.meter_ring_write(pctl, b.meter_x, b.meter_words, b.vq, b.requantized, n)
            else:  # a packet larger than the meter tap: processed, not metered
                self.engine.process(x, out=y)
            N.ring_write(self.ctl, C_NET_HEAD, C_NET_TAIL, C_NET_DROPPED, self.net_ring, y, n)
            N.ring_write(self.ctl, C_TAP_HEAD, C_TAP_TAIL, C_TAP_DROPPED, self.tap_ring, y, n)
            self.ctl[C_FRAMES] += n
            pctl[T.C_CB_DONE_NS] = time.monotonic_ns()

        self._in_y = np.zeros((4096, self.channels), dtype=self.engine.dtype)
        self.receiver = RtpReceiver(src.host, src.port, src.encoding, src.samplerate, src.channels, on_block,
                                    payload_type=src.payload_type, depth_ms=src.depth_ms, idle_s=src.idle_s,
                                    multicast_interface=src.multicast_interface)
        self.receiver.open()
        log(f"receiving RTP {src.encoding} on {src.host}:{self.receiver.port}")
        self.realtime["rtp-in"] = False  # a Python thread (it takes the GIL): normal scheduling
        self.receiver.start()

    @property
    def finished(self):
        if self.arrival_clocked:
            return self.receiver is not None and self.receiver.done.is_set()
        return self.ctl[C_DONE] != 0

    def run(self, duration_s=None, install_signals=True):
        """Start, wait for the source's end, ``duration_s`` or SIGINT/SIGTERM, stop; returns the final status."""
        import signal

        previous = {}
        if install_signals:
            for sig in (signal.SIGINT, signal.SIGTERM):
                previous[sig] = signal.signal(sig, lambda *a: self._stop_event.set())
        try:
            if self.state != "running":
                self.start()
            while not self._stop_event.is_set() and not self.finished:
                if duration_s is not None and time.monotonic() - self._start_time >= duration_s:
                    break
                self._stop_event.wait(0.02)
        finally:
            status = self.stop()
            for sig, handler in previous.items():
                signal.signal(sig, handler)
        return status

    def request_stop(self):
        self._stop_event.set()

    def stop(self):
        """Stop the clock (or the receiver), let the sender send what is left, close the tap; returns the status."""
        if self.state != "running":
            return self.status()
        self.ctl[C_STOP] = 1
        if self.receiver is not None:
            self.receiver.stop()
            self.ctl[C_DONE] = 1
        deadline = time.monotonic() + 5.0
        for t in self._threads:
            t.join(max(0.0, deadline - time.monotonic()))
        if any(t.is_alive() for t in self._threads):
            self.ctl[C_SEND_QUIT] = 1
            for t in self._threads:
                t.join(1.0)
        self.state = "stopped"
        status = self.status()
        if self.meter_thread is not None:
            self.meter_thread.stop()
            if self.meter_thread.error is not None:
                log(f"meter thread failed: {self.meter_thread.error}")
            status["meters"] = self.meters()
        if self._tap is not None:
            if self.receiver is not None:  # the tap starts at sample 0 with the stream: tap frame = engine frame
                self._tap.gaps = [{"tap_frame": g["engine_frame"], **g} for g in self.receiver.gaps]
            status["tap"] = self._tap.close()
            self._tap = None
        if self._sock is not None:
            self._sock.close()
            self._sock = None
        return status

    # --- control surface: rtstage.live.surface.ControlSurface (set_settings, wait_applied, ...) ---------

    def meters(self):
        """The latest meter snapshot (levels, noise, true peak, loudness) with the per-stream figures."""
        thread = self.meter_thread
        snap = thread.latest() if thread is not None else None
        status = self.status()
        nch = self.channels or 0
        if snap is None:
            snap = {"frame": 0, "peak_dbfs": [None] * nch, "rms_dbfs": [None] * nch, "clipped": status["clipped"],
                    "nonfinite": status["nonfinite"], "levels_available": thread is not None}
        out = dict(snap)
        out.update({"state": status["state"], "auto_muted": status["auto_muted"], "streams": status["streams"]})
        return out

    def _warm_meters(self):
        """Compile (or load from the cache) every meter kernel before anything runs, as the live engine does."""
        if not self.meters_on:
            return
        from ..live.meterthread import MeterThread
        from ..live.realtime import warm_meter_thread
        from ..meters import MeterBank

        s = self.settings
        shaper = s.shaper
        width = 16 if self.engine.dtype == np.int16 else 32
        warm = MeterBank(self.channels, self.samplerate, s.bits, shaper.coefs, s.dither, s.dither_scale,
                         out_shift=width - s.bits, shaper_id=shaper.id)
        warm.update(np.zeros((4096, self.channels)), np.zeros((4096, self.channels), dtype=self.engine.dtype))
        warm.report()
        warm_meter_thread(self.block, self.samplerate, MeterThread)

    def _start_meters(self):
        """Start the meter thread on the meter ring."""
        if not self.meters_on or self.meter_thread is not None:
            return
        from ..live.meterthread import MeterThread

        shaper = self.settings.shaper
        names = {tuple(shaper.coefs): shaper.id}

        def shaper_name(coefs):
            current = self.settings.shaper
            if hasattr(current, "coefs"):
                names.setdefault(tuple(current.coefs), current.id)
            return names.get(tuple(coefs))

        self.meter_thread = MeterThread(self.block, self.samplerate, shaper_name=shaper_name).start()

    # --- figures -------------------------------------------------------------------------
    def send_deviations_ns(self):
        """Send-time deviations from the ideal schedule of the last packets (ns, oldest first)."""
        sent = int(self.ctl[C_SENT])
        cap = self.devs.shape[0]
        if sent <= cap:
            return self.devs[:sent].copy()
        i = sent % cap
        return np.concatenate([self.devs[i:], self.devs[:i]])

    def status(self):
        """Plain-data status with per-stream figures."""
        ctl = self.ctl if hasattr(self, "ctl") else np.zeros(C_LEN, dtype=np.int64)
        uptime = 0.0 if self._start_time is None else time.monotonic() - self._start_time
        engine = getattr(self, "engine", None)
        result = {
            "state": self.state,
            "device": None,
            "clocked_by": ("arrivals" if self.arrival_clocked else self.clock_name),
            "uptime_s": round(uptime, 3),
            "samplerate": self.samplerate,
            "channels": self.channels,
            "source": self.source.describe(),
            "settings": self.settings.to_dict() if hasattr(self.settings, "to_dict") else None,
            "seed": getattr(self.settings, "seed", None),
            "engine_frame": engine.frame if engine is not None else 0,
            "frames": int(ctl[C_FRAMES]),
            "realtime": dict(self.realtime),
            "wake_late_max_ms": round(int(ctl[C_WAKE_LATE_MAX]) / 1e6, 6),
            "clipped": engine.clipped.tolist() if engine is not None else [],
            "auto_muted": engine.auto_muted.tolist() if engine is not None else [],
            "nonfinite": engine.nonfinite.tolist() if engine is not None else [],
            "streams": {},
        }
        if self.out is not None:
            devs = self.send_deviations_ns() if not self.arrival_clocked else np.zeros(0, dtype=np.int64)
            fig = {**self.out.describe(), "direction": "out", "packets_sent": int(ctl[C_SENT]),
                   "send_errors": int(ctl[C_SEND_ERRORS]), "ring_dropped_frames": int(ctl[C_NET_DROPPED]),
                   "sender_waits": int(ctl[C_WAITS])}
            if devs.size:
                fig.update({
                    "send_deviation_ms": {"p50": round(float(np.percentile(devs, 50)) / 1e6, 6),
                                          "p99": round(float(np.percentile(devs, 99)) / 1e6, 6),
                                          "max": round(int(ctl[C_DEV_MAX]) / 1e6, 6)},
                    "late_packets": int(ctl[C_LATE]),
                })
            result["streams"]["rtp_out"] = fig
        if self.receiver is not None:
            result["streams"]["rtp_in"] = {"direction": "in", **self.receiver.stats()}
            result["gaps"] = list(self.receiver.gaps)
        return result
