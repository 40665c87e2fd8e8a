"""RTP packets of linear PCM: the header (RFC 3550) and the L16/L24 payloads (RFC 3551, RFC 3190).

Packet layout
-------------
A 12-byte fixed header (RFC 3550 §5.1) and no CSRC, extension or padding::

    byte 0   V=2 (2 bits), P=0, X=0, CC=0        -> 0x80
    byte 1   M (1 bit), PT (7 bits)
    2..3     sequence number, big-endian, +1 per packet modulo 2^16
    4..7     timestamp, big-endian, +frames per packet modulo 2^32
    8..11    SSRC, big-endian, constant for the stream

then the payload: ``frames × channels`` samples, channels interleaved, each
sample a two's-complement big-endian word of 2 bytes (L16, RFC 3551 §4.5.11)
or 3 bytes (L24, RFC 3190 §4).  A word shorter than the encoding sits
left-justified, its unused low bits zero (a 16-bit word in L24 is the word
followed by a zero byte).

The SSRC, the first sequence number and the timestamp offset are random
(RFC 3550 §5.1: "the initial value of the sequence number SHOULD be random",
likewise the timestamp, and the SSRC is chosen randomly), drawn from the
operating system's generator (:mod:`secrets`).  The marker bit is set on the
first packet of the stream (RFC 3551 §4.1: the first packet after a silence
period; the first packet of a stream is one).

Packet times
------------
AES67-2018 §7.2 lists the packet times 0.125, 0.25, 0.333, 1 and 4 ms; 1 ms is
the one every AES67 device must support, and the default here.  "0.333 ms"
stands for exactly 1/3 ms (16 frames at 48 kHz).  A packet carries a whole
number of frames, so a packet time that does not give one at the sample rate
(1 ms at 44.1 kHz) is refused rather than rounded.

DSCP
----
AES67-2018 Annex B recommends the DiffServ class AF41 (DSCP 34) for media and
EF (DSCP 46) for the PTP clock's event messages; rtstage marks its media
AF41 by default and refuses EF, which belongs to the clock.

Public API
----------
RtpOutConfig
    Validated settings of one outgoing stream and its random identifiers.
frames_per_packet(ptime_ms, samplerate)
    Exact frames per packet, or an error.
pack_packet(...), pack_payload(...), unpack_payload(...), parse_header(...)
    Compiled and plain helpers the sender, the receiver and the tests share.
parse_hostport(text), open_sender_socket(config)
    Addresses and the sending socket with TOS/TTL/multicast options.

References
----------
.. [1] RFC 3550, "RTP: A Transport Protocol for Real-Time Applications", 2003.
.. [2] RFC 3551, "RTP Profile for Audio and Video Conferences with Minimal Control", 2003.
.. [3] RFC 3190, "RTP Payload Format for 12-bit DAT Audio and 20- and 24-bit Linear Sampled Audio", 2002.
.. [4] AES67-2018, "AES standard for audio applications of networks - High-performance
   streaming audio-over-IP interoperability", §7.2 (packet time), Annex B (DiffServ); the section
   numbers are from memory.
.. [5] RFC 2474, "Definition of the Differentiated Services Field", 1998 (DSCP in the TOS byte).
"""

import ipaddress
import secrets
import socket
import struct
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np
from numba import njit

from ..errors import RtstageError

RTP_VERSION = 2
HEADER_BYTES = 12
DEFAULT_PAYLOAD_TYPE = 96
"""First dynamic payload type (RFC 3551 §3: 96..127 are dynamic)."""
ENCODINGS = {"L16": 2, "L24": 3}
"""Encoding name -> bytes per sample."""
PTIMES_MS = {"0.125": Fraction(1, 8), "0.25": Fraction(1, 4), "0.333": Fraction(1, 3), "1": Fraction(1), "4": Fraction(4)}
"""AES67 packet times (text form -> exact milliseconds)."""
DEFAULT_PTIME_MS = "1"
DSCP_NAMES = {"CS0": 0, "CS1": 8, "AF11": 10, "AF21": 18, "AF31": 26, "CS4": 32, "AF41": 34, "AF42": 36, "AF43": 38,
              "CS5": 40, "EF": 46, "CS6": 48}
"""DiffServ code points by name (RFC 2474, RFC 2597, RFC 3246)."""
DEFAULT_DSCP = "AF41"
CLOCK_DSCP = 46
"""EF: AES67 keeps it for the clock's event messages; media may not use it."""
MAX_PAYLOAD_BYTES = 1440
"""Largest payload accepted: keeps a packet inside a 1500-byte Ethernet MTU with IP, UDP and RTP headers
(AES67 sets a 1440-byte payload limit; the figure is from memory of AES67-2018, not re-checked here)."""


def parse_ptime_ms(value):
    """Exact packet time in ms from text or a number; only the AES67 values are accepted."""
    text = str(value).strip()
    for key, exact in PTIMES_MS.items():
        try:
            if text == key or float(text) == float(key):
                return exact
        except ValueError:
            break
    raise RtstageError(f"packet time {value!r} ms is not one AES67 lists ({', '.join(PTIMES_MS)} ms)")


def frames_per_packet(ptime_ms, samplerate):
    """Frames in one packet of ``ptime_ms`` at ``samplerate``.

    Raises
    ------
    RtstageError
        When the packet time does not hold a whole number of frames at the rate.
    """
    exact = parse_ptime_ms(ptime_ms) if not isinstance(ptime_ms, Fraction) else ptime_ms
    frames = exact * int(samplerate) / 1000
    if frames.denominator != 1 or frames < 1:
        raise RtstageError(f"a packet time of {float(exact):g} ms holds {float(frames):g} frames at {samplerate} Hz, "
                           "not a whole number; choose another packet time or sample rate")
    return int(frames)


def parse_dscp(value):
    """DSCP from a name (AF41, CS0, ...) or a number 0..63; EF is refused (AES67 keeps it for the clock)."""
    text = str(value).strip().upper()
    if text in DSCP_NAMES:
        dscp = DSCP_NAMES[text]
    else:
        try:
            dscp = int(text, 0)
        except ValueError:
            raise RtstageError(f"DSCP {value!r} is neither a name ({', '.join(DSCP_NAMES)}) nor a number 0..63") from None
    if not 0 <= dscp <= 63:
        raise RtstageError(f"DSCP must be 0..63, got {dscp}")
    if dscp == CLOCK_DSCP:
        raise RtstageError("DSCP EF (46) is kept for the PTP clock's messages (AES67 Annex B); mark media AF41 (34)")
    return dscp


def encoding_for_bits(bits, encoding=None):
    """The payload encoding for ``bits``-bit words: L16 up to 16 bits, else L24; an explicit one is checked."""
    if encoding is None:
        return "L16" if bits <= 16 else "L24"
    name = str(encoding).upper()
    if name not in ENCODINGS:
        raise RtstageError(f"unknown RTP encoding {encoding!r} (known: {', '.join(ENCODINGS)})")
    if bits > 8 * ENCODINGS[name]:
        raise RtstageError(f"{bits}-bit words do not fit {name}; use L24")
    return name


def parse_hostport(text, what="address", allow_any_port=False):
    """``(host, port)`` from ``HOST:PORT`` or ``[IPV6]:PORT``; the host must be a numeric IP address.

    ``allow_any_port`` accepts port 0 (a receiver then binds any free port and says which).
    """
    text = str(text).strip()
    if text.startswith("["):
        host, sep, rest = text[1:].partition("]")
        if not sep or not rest.startswith(":"):
            raise RtstageError(f"{what} {text!r}: expected [IPV6]:PORT")
        port_text = rest[1:]
    else:
        host, sep, port_text = text.rpartition(":")
        if not sep or ":" in host:
            raise RtstageError(f"{what} {text!r}: expected HOST:PORT (IPv6 as [ADDR]:PORT)")
    try:
        ipaddress.ip_address(host)
    except ValueError:
        raise RtstageError(f"{what} {text!r}: the host must be a numeric IP address") from None
    try:
        port = int(port_text)
    except ValueError:
        raise RtstageError(f"{what} {text!r}: port {port_text!r} is not a number") from None
    if not (0 if allow_any_port else 1) <= port <= 65535:
        raise RtstageError(f"{what} {text!r}: port must be 1..65535")
    return host, port


def is_multicast(host):
    """True for an IPv4 or IPv6 multicast address."""
    return ipaddress.ip_address(host).is_multicast


@dataclass
class RtpOutConfig:
    """One outgoing RTP stream.

    Parameters
    ----------
    host, port : str, int
        Destination (numeric address).
    samplerate, channels : int
        Stream format (the RTP clock rate is the sample rate, RFC 3551 §4.5.11).
    bits : int
        Word length of the engine; chooses the default encoding.
    encoding : str or None
        ``L16`` or ``L24``; None: L16 up to 16 bits, L24 above.
    ptime_ms : str or float
        Packet time, one of :data:`PTIMES_MS`.
    payload_type : int
        RTP payload type, 96..127 (dynamic).
    dscp : str or int
        DiffServ code point (default AF41); EF is refused.
    ttl : int or None
        Hops (IP_MULTICAST_TTL for a multicast destination, IP_TTL otherwise); None keeps the system default.
    multicast_interface : str or None
        Local interface address (IPv4) or interface name/index (IPv6) for a multicast destination.
    """

    host: str
    port: int
    samplerate: int
    channels: int
    bits: int
    encoding: str = None
    ptime_ms: object = DEFAULT_PTIME_MS
    payload_type: int = DEFAULT_PAYLOAD_TYPE
    dscp: object = DEFAULT_DSCP
    ttl: int = None
    multicast_interface: str = None
    ssrc: int = field(default_factory=lambda: secrets.randbits(32))
    first_seq: int = field(default_factory=lambda: secrets.randbits(16))
    ts_offset: int = field(default_factory=lambda: secrets.randbits(32))

    def __post_init__(self):
        ipaddress.ip_address(self.host)
        self.encoding = encoding_for_bits(self.bits, self.encoding)
        self.ptime = parse_ptime_ms(self.ptime_ms)
        self.frames = frames_per_packet(self.ptime, self.samplerate)
        if isinstance(self.payload_type, bool) or not 96 <= int(self.payload_type) <= 127:
            raise RtstageError(f"RTP payload type must be dynamic, 96..127 (RFC 3551 §3), got {self.payload_type}")
        self.payload_type = int(self.payload_type)
        self.dscp_value = parse_dscp(self.dscp)
        if self.ttl is not None and not 1 <= int(self.ttl) <= 255:
            raise RtstageError(f"TTL must be 1..255, got {self.ttl}")
        self.sample_bytes = ENCODINGS[self.encoding]
        self.payload_bytes = self.frames * self.channels * self.sample_bytes
        if self.payload_bytes > MAX_PAYLOAD_BYTES:
            raise RtstageError(f"{self.frames} frames of {self.channels} channels in {self.encoding} make a "
                               f"{self.payload_bytes}-byte payload, more than {MAX_PAYLOAD_BYTES} (AES67's limit); "
                               "choose a shorter packet time or fewer channels")

    @property
    def packet_bytes(self):
        return HEADER_BYTES + self.payload_bytes

    @property
    def ptime_text(self):
        """The packet time as SDP writes it (``a=ptime``), e.g. ``1``, ``0.333``."""
        for key, exact in PTIMES_MS.items():
            if exact == self.ptime:
                return key
        return f"{float(self.ptime):g}"

    @property
    def multicast(self):
        return is_multicast(self.host)

    def describe(self):
        """Plain data for status and logs."""
        return {"destination": f"{self.host}:{self.port}", "encoding": self.encoding, "samplerate": self.samplerate,
                "channels": self.channels, "ptime_ms": self.ptime_text, "frames_per_packet": self.frames,
                "payload_type": self.payload_type, "dscp": self.dscp_value, "ssrc": self.ssrc}


def socket_family(host):
    return socket.AF_INET6 if ipaddress.ip_address(host).version == 6 else socket.AF_INET


def apply_socket_options(sock, config):
    """Set DSCP (IP_TOS / IPV6_TCLASS), TTL/hops and the multicast interface on ``sock`` for ``config``.

    The DSCP fills the upper six bits of the TOS / traffic-class byte (RFC 2474 §3).
    """
    tos = config.dscp_value << 2
    v6 = sock.family == socket.AF_INET6
    if v6:
        sock.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_TCLASS, tos)
    else:
        sock.setsockopt(socket.IPPROTO_IP, socket.IP_TOS, tos)
    if config.multicast:
        set_multicast_options(sock, config.ttl, config.multicast_interface)
    elif config.ttl is not None:
        if v6:
            sock.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_UNICAST_HOPS, int(config.ttl))
        else:
            sock.setsockopt(socket.IPPROTO_IP, socket.IP_TTL, int(config.ttl))


def set_multicast_options(sock, ttl=None, interface=None):
    """Multicast TTL / hop limit and outgoing interface on ``sock``.

    ``interface`` is a local IPv4 address (``IP_MULTICAST_IF``), or for IPv6 an
    interface name or index (``IPV6_MULTICAST_IF``).
    """
    v6 = sock.family == socket.AF_INET6
    if ttl is not None:
        if v6:
            sock.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_MULTICAST_HOPS, int(ttl))
        else:
            sock.setsockopt(socket.IPPROTO_IP, socket.IP_MULTICAST_TTL, int(ttl))
    if interface:
        iface = str(interface)
        try:
            if v6:
                index = int(iface) if iface.isdigit() else socket.if_nametoindex(iface)
                sock.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_MULTICAST_IF, index)
            else:
                sock.setsockopt(socket.IPPROTO_IP, socket.IP_MULTICAST_IF, socket.inet_aton(iface))
        except (OSError, ValueError) as exc:
            raise RtstageError(f"multicast interface {iface!r}: {exc}") from None


def open_sender_socket(config):
    """A UDP socket connected to the stream's destination, with :func:`apply_socket_options` applied."""
    sock = socket.socket(socket_family(config.host), socket.SOCK_DGRAM)
    try:
        apply_socket_options(sock, config)
        sock.connect((config.host, config.port))
    except OSError as exc:
        sock.close()
        raise RtstageError(f"cannot open an RTP socket to {config.host}:{config.port}: {exc}") from None
    return sock


@njit(nogil=True, cache=True)
def word_shift(word_dtype_bits):
    """Left shift from a container word (16: int16, 32: left-justified int32) to a 32-bit left-justified value."""
    return 16 if word_dtype_bits == 16 else 0


@njit(nogil=True, cache=True)
def pack_packet(buf, words, start, nframes, sample_bytes, marker, payload_type, seq, timestamp, ssrc):
    """Write one RTP packet into ``buf`` (uint8) and return its length in bytes.

    ``words[start : start + nframes]`` (int16, or int32 with the word
    left-justified) become the payload; header fields as in the module notes.
    """
    buf[0] = 0x80
    buf[1] = (0x80 if marker else 0) | (payload_type & 0x7F)
    buf[2] = (seq >> 8) & 0xFF
    buf[3] = seq & 0xFF
    buf[4] = (timestamp >> 24) & 0xFF
    buf[5] = (timestamp >> 16) & 0xFF
    buf[6] = (timestamp >> 8) & 0xFF
    buf[7] = timestamp & 0xFF
    buf[8] = (ssrc >> 24) & 0xFF
    buf[9] = (ssrc >> 16) & 0xFF
    buf[10] = (ssrc >> 8) & 0xFF
    buf[11] = ssrc & 0xFF
    return HEADER_BYTES + pack_payload(buf, HEADER_BYTES, words, start, nframes, sample_bytes)


@njit(nogil=True, cache=True)
def pack_payload(buf, offset, words, start, nframes, sample_bytes):
    """Big-endian, interleaved, left-justified payload of ``nframes`` frames into ``buf[offset:]``; returns its length."""
    nch = words.shape[1]
    shift = 16 if words.itemsize == 2 else 0
    pos = offset
    for n in range(nframes):
        for c in range(nch):
            v = np.int64(words[start + n, c]) << shift  # 32-bit left-justified
            for b in range(sample_bytes):
                buf[pos] = (v >> (24 - 8 * b)) & 0xFF
                pos += 1
    return pos - offset


def unpack_payload(payload, encoding, channels):
    """Decode an L16/L24 payload to int32 words left-justified in 32 bits, shape (frames, channels).

    Dividing by 2^31 gives the full-scale value exactly.
    """
    nbytes = ENCODINGS[encoding]
    raw = np.frombuffer(bytes(payload), dtype=np.uint8)
    if raw.size % (nbytes * channels):
        raise RtstageError(f"{encoding} payload of {raw.size} bytes is not a whole number of {channels}-channel frames")
    raw = raw.reshape(-1, nbytes).astype(np.uint32)
    v = np.zeros(raw.shape[0], dtype=np.uint32)
    for b in range(nbytes):
        v |= raw[:, b] << np.uint32(24 - 8 * b)
    return v.view(np.int32).reshape(-1, channels)


HEADER = struct.Struct("!BBHII")


def parse_header(packet):
    """``(version, padding, extension, csrc_count, marker, payload_type, seq, timestamp, ssrc, payload_offset)``.

    Skips CSRCs and a header extension (RFC 3550 §5.1, §5.3.1); raises
    ValueError on a packet too short for what its header announces.
    """
    if len(packet) < HEADER_BYTES:
        raise ValueError("shorter than an RTP header")
    b0, b1, seq, timestamp, ssrc = HEADER.unpack_from(packet)
    version = b0 >> 6
    padding = (b0 >> 5) & 1
    extension = (b0 >> 4) & 1
    cc = b0 & 0x0F
    offset = HEADER_BYTES + 4 * cc
    if extension:
        if len(packet) < offset + 4:
            raise ValueError("header extension cut short")
        offset += 4 + 4 * struct.unpack_from("!H", packet, offset + 2)[0]
    if offset > len(packet):
        raise ValueError("header longer than the packet")
    return version, padding, extension, cc, b1 >> 7, b1 & 0x7F, seq, timestamp, ssrc, offset
