"""RTP as a second output of the live engine (with an audio device).

The PortAudio callback copies every block of output words into the tap ring
of :mod:`rtstage.live.shared` (lock-free, single producer); it never touches
a socket.  With ``--rtp-out``, :class:`LiveRtpOutput` is that ring's single
consumer: a compiled thread (:func:`_drain_send_loop`, no GIL) looks at the
ring every 100 µs, sends each complete packet's worth of words as soon as it is
there, and passes the same words on, through a second SPSC ring, to the tap
file writer.  The stream therefore follows the device's clock: its packets
leave in the rhythm of the callbacks (a 256-frame callback yields five 1 ms
packets at 48 kHz at once), and the RTP timestamps count the device's samples.
"""

import time

import numpy as np
from numba import njit

from ..log import log
from . import _native as N
from .netengine import C_DONE, C_LEN, C_SEND_ERRORS, C_SEND_QUIT, C_SENT, C_TAP_DROPPED, C_TAP_HEAD, C_TAP_TAIL, _TapThread
from .rtp import RtpOutConfig, open_sender_socket, pack_packet

_POLL_NS = 100_000


@njit(nogil=True, cache=True)
def _drain_send_loop(live_ctl, head, tail, live_ring, ctl, tap_ring, words, pkt, fd, sample_bytes, payload_type,
                     first_seq, ts_base, ssrc, ts):
    fpp = words.shape[0]
    nch = words.shape[1]
    k = 0
    while True:
        if N.ring_avail(live_ctl, head, tail) < fpp:
            if ctl[C_DONE] != 0 or ctl[C_SEND_QUIT] != 0:
                got = N.ring_read(live_ctl, head, tail, live_ring, words, fpp)
                if got == 0:
                    return
                for i in range(got, fpp):
                    for c in range(nch):
                        words[i, c] = 0
            else:
                N.sleep_for(N.CLOCK_MONOTONIC, _POLL_NS, ts)
                continue
        else:
            got = N.ring_read(live_ctl, head, tail, live_ring, words, fpp)
        length = pack_packet(pkt, words, 0, fpp, sample_bytes, k == 0, payload_type, (first_seq + k) & 0xFFFF,
                             (ts_base + k * fpp) & 0xFFFFFFFF, ssrc)
        if N.send_bytes(fd, pkt, length) < 0:
            ctl[C_SEND_ERRORS] += 1
        N.ring_write(ctl, C_TAP_HEAD, C_TAP_TAIL, C_TAP_DROPPED, tap_ring, words, got)
        k += 1
        ctl[C_SENT] = k
        if got < fpp:
            return


class LiveRtpOutput:
    """Consumer of a live engine's tap ring: RTP packets out, and the tap file (optional).

    Parameters
    ----------
    block : rtstage.live.shared.SharedBlock
        The live engine's shared arrays (the tap ring and its counters).
    head, tail : int
        Indices of the ring's head and tail counters in ``block.ctl``.
    options : dict
        :class:`~rtstage.net.rtp.RtpOutConfig` keyword arguments (destination, encoding, ...).
    samplerate, channels, bits : int
        The stream's format.
    tap : str or None
        Tap file; written from the words as they were sent.
    info : dict
        Extra data for the tap sidecar.
    """

    def __init__(self, block, head, tail, options, samplerate, channels, bits, tap=None, info=None):
        self.block = block
        self.head, self.tail = head, tail
        self.config = RtpOutConfig(samplerate=samplerate, channels=channels, bits=bits, **options)
        self.ctl = np.zeros(C_LEN, dtype=np.int64)
        dtype = block.ring.dtype
        self.tap_ring = np.zeros((block.ring.shape[0] if tap else 0, channels), dtype=dtype)
        self.words = np.zeros((self.config.frames, channels), dtype=dtype)
        self.pkt = np.zeros(self.config.packet_bytes, dtype=np.uint8)
        self._tap = _TapThread(tap, self.ctl, self.tap_ring, samplerate, bits, info or {}) if tap else None
        self._sock = open_sender_socket(self.config)
        self.origin_host = self._sock.getsockname()[0]
        self._thread = None
        self._warm()

    @property
    def gaps(self):
        return self._tap.gaps if self._tap is not None else []

    def _warm(self):
        ctl = np.zeros(C_LEN, dtype=np.int64)
        ctl[C_DONE] = 1
        live_ctl = np.zeros(max(self.head, self.tail) + 1, dtype=np.int64)
        _drain_send_loop(live_ctl, self.head, self.tail, self.block.ring[:0], ctl, self.tap_ring, self.words, self.pkt,
                         -1, self.config.sample_bytes, self.config.payload_type, 0, 0, 0, np.zeros(2, dtype=np.int64))

    def start(self, rt_priority=70):
        import threading

        cfg = self.config

        def body():
            N.try_realtime(rt_priority)
            N.set_timer_slack(1)
            _drain_send_loop(self.block.ctl, self.head, self.tail, self.block.ring, self.ctl, self.tap_ring,
                             self.words, self.pkt, self._sock.fileno(), cfg.sample_bytes, cfg.payload_type,
                             cfg.first_seq, cfg.ts_offset, cfg.ssrc, np.zeros(2, dtype=np.int64))

        if self._tap is not None:
            self._tap.start()
        self._thread = threading.Thread(target=body, name="rtstage-rtp-live", daemon=True)
        self._thread.start()
        log(f"RTP {cfg.encoding} to {cfg.host}:{cfg.port}, {cfg.frames} frames a packet, following the device's clock")
        return self

    def close(self):
        """Send what the ring still holds (the last packet padded with zero words), close the tap; returns its summary."""
        self.ctl[C_DONE] = 1
        if self._thread is not None:
            self._thread.join(5.0)
            if self._thread.is_alive():
                self.ctl[C_SEND_QUIT] = 1
                self._thread.join(1.0)
        summary = self._tap.close() if self._tap is not None else None
        self._sock.close()
        return summary

    def stats(self):
        return {**self.config.describe(), "direction": "out", "clocked_by": "device",
                "packets_sent": int(self.ctl[C_SENT]), "send_errors": int(self.ctl[C_SEND_ERRORS]),
                "tap_dropped_frames": int(self.ctl[C_TAP_DROPPED])}
