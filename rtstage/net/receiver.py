"""Receiving an RTP L16/L24 stream: jitter buffer, loss, reordering, duplicates, interarrival jitter.

:class:`JitterBuffer` puts packets back in sequence order.  It holds up to
``depth`` packets: a packet is released once a packet ``depth`` sequence
numbers later has arrived (or at the end of the stream), so a packet that
arrives out of order within that window takes its place.  Sequence numbers are
16-bit and wrap; each is extended to a 64-bit count by choosing the value
nearest the highest one seen (RFC 3550 Appendix A.1 keeps a cycle count for
the same purpose).

What each arrival counts as:

``reordered``
    it arrived after a packet with a higher sequence number, in time to be played;
``duplicate``
    its sequence number is already in the buffer, or was already played;
``late``
    its slot was already released (played as zeros): it is dropped;
``lost``
    a slot released with no packet: its frames are exact digital zero, and
    the gap is recorded with its sample index.

Interarrival jitter is RFC 3550 §6.4.1: with transit ``D = R - S`` (arrival
time R in timestamp units, RTP timestamp S), ``J += (|D(i-1,i)| - J)/16``
over packets in arrival order.

With rtstage's ``--device none``, the arrival of packets clocks the engine:
each released packet is handed to the engine at once.

References
----------
.. [1] RFC 3550, "RTP: A Transport Protocol for Real-Time Applications", 2003,
   §6.4.1 (interarrival jitter), Appendix A.1 (sequence number validity), A.8 (jitter).
"""

import ipaddress
import socket
import struct
import threading
import time

import numpy as np

from ..log import log
from ..errors import RtstageError
from .rtp import ENCODINGS, RTP_VERSION, parse_header, unpack_payload

DEFAULT_DEPTH_MS = 5.0
"""Default jitter-buffer depth (common practice for a LAN: a few packet times)."""
MAX_GAP_PACKETS = 3000
"""A jump larger than this (in packets) is a restart of the sender, not a loss: the buffer resynchronises."""
SSRC_SWITCH_S = 0.5
"""A packet from another SSRC takes over the input once the current source has been silent this long
(a sender that restarted draws a new SSRC, RFC 3550 §8.2); until then it is counted and ignored."""
_WINDOW = 4096
"""How many played sequence numbers are remembered to tell a duplicate from a late packet."""


SO_TIMESTAMPNS = getattr(socket, "SO_TIMESTAMPNS", 35)
"""Linux socket option (asm-generic/socket.h: 35); Python's socket module does not name it."""
_CMSG_BYTES = socket.CMSG_SPACE(16)
_TIMESPEC = struct.Struct("@qq")


def _arrival_s(ancillary, fallback_s):
    """Arrival time in seconds from an SCM_TIMESTAMPNS message (CLOCK_REALTIME), else ``fallback_s``.

    Jitter uses differences of arrival times only, so either clock serves.
    """
    for level, kind, data in ancillary:
        if level == socket.SOL_SOCKET and kind == SO_TIMESTAMPNS and len(data) >= 16:  # SCM_TIMESTAMPNS
            sec, nsec = _TIMESPEC.unpack_from(data)
            return sec + nsec * 1e-9
    return fallback_s


class JitterBuffer:
    """Reorders packets by extended sequence number; see the module notes.

    Parameters
    ----------
    depth_packets : int
        Packets held back for reordering (0: release in arrival order at once).
    """

    def __init__(self, depth_packets):
        self.depth = max(0, int(depth_packets))
        self.next_ext = None
        self.highest = None
        self.pending = {}
        self._played = set()
        self._played_order = []
        self.counts = {"received": 0, "lost": 0, "late": 0, "reordered": 0, "duplicated": 0, "resyncs": 0}

    def extend(self, seq):
        """64-bit sequence count of the 16-bit ``seq``, nearest the highest one seen."""
        if self.highest is None:
            return int(seq)
        delta = (int(seq) - self.highest) & 0xFFFF
        return self.highest + delta if delta < 0x8000 else self.highest - (0x10000 - delta)

    def push(self, seq, item):
        """Accept one packet; returns the list of ``(ext_seq, item or None)`` now released in order."""
        ext = self.extend(seq)
        if self.highest is None:
            self.next_ext = ext
            self.highest = ext
        out = []
        if ext < self.next_ext:
            if ext in self._played:
                self.counts["duplicated"] += 1
            elif self.next_ext - ext > MAX_GAP_PACKETS:
                out = self._resync(ext, item)
            else:
                self.counts["late"] += 1
            return out
        if ext in self.pending:
            self.counts["duplicated"] += 1
            return out
        if ext - self.next_ext > MAX_GAP_PACKETS:
            return self._resync(ext, item)
        self.counts["received"] += 1
        if ext < self.highest:
            self.counts["reordered"] += 1
        self.pending[ext] = item
        self.highest = max(self.highest, ext)
        while self.highest - self.next_ext >= self.depth:
            out.append(self._release())
        return out

    def _release(self):
        ext = self.next_ext
        item = self.pending.pop(ext, None)
        if item is None:
            self.counts["lost"] += 1
        else:
            self._played.add(ext)
            self._played_order.append(ext)
            if len(self._played_order) > 2 * _WINDOW:
                for old in self._played_order[:_WINDOW]:
                    self._played.discard(old)
                del self._played_order[:_WINDOW]
        self.next_ext = ext + 1
        return ext, item

    def _resync(self, ext, item):
        """The sender jumped (restarted): play what is held, then start over at ``ext``."""
        out = self.flush()
        self.counts["resyncs"] += 1
        self.counts["received"] += 1
        self.next_ext = ext
        self.highest = ext
        self.pending[ext] = item
        while self.highest - self.next_ext >= self.depth:
            out.append(self._release())
        return out

    def restart(self):
        """Release everything held, then forget the sequence numbering (a new source starts its own)."""
        out = self.flush()
        self.next_ext = None
        self.highest = None
        self.pending = {}
        self._played = set()
        self._played_order = []
        return out

    def flush(self):
        """Release everything held, in order, gaps between held packets counted lost."""
        out = []
        if self.highest is None:
            return out
        while self.next_ext <= self.highest:
            out.append(self._release())
        return out


class JitterEstimator:
    """RFC 3550 §6.4.1 interarrival jitter, in timestamp units."""

    def __init__(self, samplerate):
        self.samplerate = int(samplerate)
        self.jitter = 0.0
        self._transit = None

    def update(self, arrival_s, rtp_timestamp):
        """Feed one packet (arrival time in seconds, its RTP timestamp)."""
        arrival = arrival_s * self.samplerate
        transit = arrival - rtp_timestamp
        if self._transit is not None:
            d = transit - self._transit
            # RTP timestamps wrap modulo 2^32: take the difference nearest zero.
            d = (d + 2**31) % 2**32 - 2**31
            self.jitter += (abs(d) - self.jitter) / 16.0
        self._transit = transit

    @property
    def jitter_ms(self):
        return 1000.0 * self.jitter / self.samplerate


class RtpReceiver:
    """A thread receiving one L16/L24 stream on a UDP port and handing out blocks in order.

    Parameters
    ----------
    host, port : str, int
        Local address to bind (numeric; a multicast group is joined on ``multicast_interface``).
    encoding : str
        ``L16`` or ``L24``.
    samplerate, channels : int
        The stream's format (from the options or the SDP).
    on_block : callable
        ``on_block(x, gap)`` with ``x`` float64 (frames, channels) in full-scale
        units, exactly ``word / 2^(bits-1)``; ``gap`` is None, or a dict for a
        lost packet (then ``x`` is zeros).  Called on the receiver thread, in order.
    payload_type : int or None
        Accept only this payload type (None: any).
    depth_ms : float
        Jitter-buffer depth in ms; converted to packets with the stream's packet size.
    idle_s : float or None
        Once the stream has begun, end it after this long without a packet.
    """

    def __init__(self, host, port, encoding, samplerate, channels, on_block, payload_type=None,
                 depth_ms=DEFAULT_DEPTH_MS, idle_s=None, multicast_interface=None):
        self.host = host
        self.port = int(port)
        self.encoding = str(encoding).upper()
        if self.encoding not in ENCODINGS:
            raise RtstageError(f"unknown RTP encoding {encoding!r} (known: {', '.join(ENCODINGS)})")
        self.samplerate = int(samplerate)
        self.channels = int(channels)
        self.on_block = on_block
        self.payload_type = payload_type
        if not depth_ms >= 0:
            raise RtstageError(f"jitter-buffer depth must be >= 0 ms, got {depth_ms}")
        self.depth_ms = float(depth_ms)
        self.idle_s = idle_s
        self.multicast_interface = multicast_interface
        self.buffer = None
        self.jitter = JitterEstimator(self.samplerate)
        self.ssrc = None
        self.frames_per_packet = None
        self.frames_out = 0
        self.gaps = []
        self.other = {"bad_version": 0, "wrong_payload_type": 0, "foreign_ssrc": 0, "malformed": 0}
        self.source_changes = 0
        self._last_arrival = None
        self.done = threading.Event()
        self.started = threading.Event()
        self._stop = threading.Event()
        self._sock = None
        self._thread = None
        self.error = None

    def open(self):
        """Bind the socket (before the sender starts)."""
        addr = ipaddress.ip_address(self.host)
        family = socket.AF_INET6 if addr.version == 6 else socket.AF_INET
        sock = socket.socket(family, socket.SOCK_DGRAM)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4 << 20)
            if addr.is_multicast:
                sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
                sock.bind(("" if family == socket.AF_INET else "::", self.port))
                if family == socket.AF_INET:
                    iface = socket.inet_aton(self.multicast_interface or "0.0.0.0")
                    sock.setsockopt(socket.IPPROTO_IP, socket.IP_ADD_MEMBERSHIP, addr.packed + iface)
                else:
                    index = socket.if_nametoindex(self.multicast_interface) if self.multicast_interface else 0
                    sock.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_JOIN_GROUP, addr.packed + struct.pack("@I", index))
            else:
                sock.bind((self.host, self.port))
        except OSError as exc:
            sock.close()
            raise RtstageError(f"cannot receive RTP on {self.host}:{self.port}: {exc}") from None
        sock.settimeout(0.05)
        try:  # the kernel's arrival time of each datagram, for the jitter estimate (Python's wake-up adds none)
            sock.setsockopt(socket.SOL_SOCKET, SO_TIMESTAMPNS, 1)
            self._kernel_stamps = True
        except (AttributeError, OSError):
            self._kernel_stamps = False
        self._sock = sock
        self.port = sock.getsockname()[1]
        return self

    def start(self):
        if self._sock is None:
            self.open()
        self._thread = threading.Thread(target=self._run, name="rtstage-rtp-in", daemon=True)
        self._thread.start()
        return self

    def _run(self):
        last = None
        try:
            while not self._stop.is_set():
                try:
                    data, ancillary, _, _ = self._sock.recvmsg(65536, _CMSG_BYTES)
                except socket.timeout:
                    if last is not None and self.idle_s is not None and time.monotonic() - last >= self.idle_s:
                        break
                    continue
                last = time.monotonic()
                self._packet(data, _arrival_s(ancillary, last))
            self._deliver(self.buffer.flush() if self.buffer is not None else [])
        except Exception as exc:  # reported by stop() and the status; never silently
            self.error = exc
        finally:
            self.done.set()

    def _packet(self, data, arrival_s):
        try:
            version, padding, _, _, _, pt, seq, timestamp, ssrc, offset = parse_header(data)
        except ValueError:
            self.other["malformed"] += 1
            return
        if version != RTP_VERSION:
            self.other["bad_version"] += 1
            return
        if self.payload_type is not None and pt != self.payload_type:
            self.other["wrong_payload_type"] += 1
            return
        if self.ssrc is None:
            self.ssrc = ssrc
        elif ssrc != self.ssrc:
            if self._last_arrival is None or arrival_s - self._last_arrival < SSRC_SWITCH_S:
                self.other["foreign_ssrc"] += 1
                return
            self._switch_source(ssrc)
        self._last_arrival = arrival_s
        end = len(data)
        if padding:
            end -= data[-1]
        try:
            words = unpack_payload(data[offset:end], self.encoding, self.channels)
        except RtstageError:
            self.other["malformed"] += 1
            return
        if self.buffer is None:
            self.frames_per_packet = words.shape[0]
            ptime_ms = 1000.0 * self.frames_per_packet / self.samplerate
            depth = int(np.ceil(self.depth_ms / ptime_ms - 1e-9)) if self.depth_ms > 0 else 0
            self.buffer = JitterBuffer(depth)
            self.started.set()
        before = self.buffer.counts["duplicated"]
        released = self.buffer.push(seq, (seq, words))
        if self.buffer.counts["duplicated"] == before:
            self.jitter.update(arrival_s, timestamp)
        self._deliver(released)

    def _switch_source(self, ssrc):
        """The old source fell silent and another one speaks: play out what is held, then follow the new one."""
        if self.buffer is not None:
            self._deliver(self.buffer.restart())
        self.gaps.append({"engine_frame": int(self.frames_out), "frames": 0, "seq": None,
                          "reason": f"source changed: SSRC {self.ssrc:#010x} -> {ssrc:#010x}"})
        log(f"RTP input: SSRC {self.ssrc:#010x} fell silent, following {ssrc:#010x} from sample {self.frames_out}")
        self.ssrc = ssrc
        self.source_changes += 1
        self.jitter = JitterEstimator(self.samplerate)

    def _deliver(self, released):
        for ext, item in released:
            if item is None:
                frames = self.frames_per_packet
                gap = {"engine_frame": int(self.frames_out), "frames": int(frames), "seq": int(ext & 0xFFFF),
                       "reason": "lost packet (zeros)"}
                self.gaps.append(gap)
                x = np.zeros((frames, self.channels), dtype=np.float64)
            else:
                gap = None
                x = item[1] * (2.0**-31)
            self.on_block(x, gap)
            self.frames_out += x.shape[0]

    def stop(self, timeout_s=5.0):
        """Stop receiving, play out what the buffer holds, close the socket."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
        if self._sock is not None:
            self._sock.close()
            self._sock = None
        if self.error is not None:
            log(f"RTP receiver failed: {self.error}")

    def stats(self):
        """Per-stream figures (plain data)."""
        counts = dict(self.buffer.counts) if self.buffer is not None else dict(JitterBuffer(0).counts)
        return {
            "address": f"{self.host}:{self.port}",
            "encoding": self.encoding,
            "ssrc": self.ssrc,
            "frames_per_packet": self.frames_per_packet,
            "depth_ms": self.depth_ms,
            "depth_packets": self.buffer.depth if self.buffer is not None else None,
            "packets_received": counts["received"],
            "lost": counts["lost"],
            "late": counts["late"],
            "reordered": counts["reordered"],
            "duplicated": counts["duplicated"],
            "resyncs": counts["resyncs"],
            "source_changes": self.source_changes,
            "jitter_ts": round(self.jitter.jitter, 3),
            "jitter_ms": round(self.jitter.jitter_ms, 6),
            "frames_out": int(self.frames_out),
            "gaps": list(self.gaps),
            "ignored": dict(self.other),
            "error": None if self.error is None else str(self.error),
        }
