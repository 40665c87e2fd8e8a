"""Session announcements (SAP, RFC 2974) of an SDP description.

Packet (RFC 2974 §3)::

    byte 0   V=1 (3 bits) | A (address type: 0 IPv4, 1 IPv6) | R=0 | T (0 announce, 1 delete) | E=0 | C=0
    byte 1   authentication length = 0
    2..3     message identifier hash (16 bits; changes whenever the description changes)
    4..      originating source: the sender's address, 4 or 16 bytes
    then     payload type "application/sdp" and a NUL byte, then the SDP text

Announcements repeat; RFC 2974 §3.1 sets the interval from a bandwidth
limit (4000 bit/s by default) and the number of announcements, at least 300 s,
each one offset at random by up to a third of the interval.  rtstage takes
the interval as a setting (default 300 s) and sends a deletion (T=1) when the
stream stops.  The destination is the user's choice; rtstage has no default
group, and its tests aim at the loopback address only.

References
----------
.. [1] RFC 2974, "Session Announcement Protocol", 2000.
"""

import ipaddress
import random
import socket
import threading
import zlib

from ..log import log
from ..errors import RtstageError

SAP_PORT = 9875
"""The port of RFC 2974 §3."""
DEFAULT_INTERVAL_S = 300.0
PAYLOAD_TYPE = b"application/sdp\x00"


def message_hash(sdp_text):
    """A 16-bit message identifier hash of the description (never 0: RFC 2974 §5 treats 0 specially)."""
    h = zlib.crc32(sdp_text.encode("utf-8")) & 0xFFFF
    return h or 1


def build_sap_packet(sdp_text, origin_host, delete=False, msg_hash=None):
    """One SAP packet announcing (or deleting) ``sdp_text`` from ``origin_host``."""
    origin = ipaddress.ip_address(origin_host)
    a_bit = 1 if origin.version == 6 else 0
    first = (1 << 5) | (a_bit << 4) | ((1 if delete else 0) << 2)
    h = message_hash(sdp_text) if msg_hash is None else int(msg_hash) & 0xFFFF
    return bytes([first, 0, h >> 8, h & 0xFF]) + origin.packed + PAYLOAD_TYPE + sdp_text.encode("utf-8")


def parse_sap_target(text):
    """``(host, port)`` from ``HOST`` or ``HOST:PORT`` (``[IPV6]:PORT``); the port defaults to 9875."""
    from .rtp import parse_hostport

    text = str(text).strip()
    try:
        ipaddress.ip_address(text.strip("[]"))
        return text.strip("[]"), SAP_PORT
    except ValueError:
        return parse_hostport(text, "SAP address")


class SapAnnouncer:
    """A thread announcing one description to ``host:port`` every ``interval_s`` (± a third, at random).

    Parameters
    ----------
    host, port : str, int
        Destination of the announcements.
    sdp_text : str
        The description.
    origin_host : str
        The sender's address written into the packet.
    interval_s : float
        Mean interval between announcements.
    ttl : int or None
        Multicast TTL / hops for a multicast destination.
    """

    def __init__(self, host, port, sdp_text, origin_host, interval_s=DEFAULT_INTERVAL_S, ttl=None):
        self.host = host
        self.port = int(port)
        self.sdp_text = sdp_text
        self.origin_host = origin_host
        if not interval_s > 0:
            raise RtstageError(f"SAP interval must be positive, got {interval_s}")
        self.interval_s = float(interval_s)
        addr = ipaddress.ip_address(host)
        self._sock = socket.socket(socket.AF_INET6 if addr.version == 6 else socket.AF_INET, socket.SOCK_DGRAM)
        if addr.is_multicast and ttl is not None:
            if addr.version == 6:
                self._sock.setsockopt(socket.IPPROTO_IPV6, socket.IPV6_MULTICAST_HOPS, int(ttl))
            else:
                self._sock.setsockopt(socket.IPPROTO_IP, socket.IP_MULTICAST_TTL, int(ttl))
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="rtstage-sap", daemon=True)
        self.sent = 0

    def _send(self, delete=False):
        try:
            self._sock.sendto(build_sap_packet(self.sdp_text, self.origin_host, delete), (self.host, self.port))
            self.sent += 1
        except OSError as exc:
            log(f"warning: SAP announcement to {self.host}:{self.port} failed: {exc}")

    def _run(self):
        self._send()
        while not self._stop.wait(self.interval_s * random.uniform(2.0 / 3.0, 4.0 / 3.0)):
            self._send()

    def start(self):
        self._thread.start()
        return self

    def stop(self):
        """Stop announcing and send the deletion."""
        self._stop.set()
        self._thread.join(2.0)
        self._send(delete=True)
        self._sock.close()
