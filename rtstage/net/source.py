"""Network sources for ``--source``: ``rtp:HOST:PORT`` and ``sdp:FILE``."""

from dataclasses import dataclass

from ..errors import RtstageError
from .receiver import DEFAULT_DEPTH_MS
from .rtp import ENCODINGS, parse_hostport


@dataclass(frozen=True)
class RtpSource:
    """An RTP L16/L24 input: where to listen and what the stream carries.

    Attributes
    ----------
    host, port : str, int
        Local address to receive on (a multicast group is joined).
    encoding : str
        ``L16`` or ``L24``.
    samplerate, channels : int
        The stream's format.
    payload_type : int or None
        Accept only this payload type (from the SDP); None accepts any.
    depth_ms : float
        Jitter-buffer depth in ms.
    idle_s : float or None
        End the run this long after the last packet (None: run until stopped).
    multicast_interface : str or None
        Interface for joining a multicast group.
    origin : str
        The spec as given.
    """

    host: str
    port: int
    encoding: str
    samplerate: int
    channels: int
    payload_type: int = None
    depth_ms: float = DEFAULT_DEPTH_MS
    idle_s: float = None
    multicast_interface: str = None
    origin: str = ""
    kind: str = "rtp"
    generated: bool = False

    def describe(self):
        return self.origin or f"rtp:{self.host}:{self.port}"


def is_net_source(text):
    """True for ``rtp:...`` and ``sdp:...`` specs."""
    return isinstance(text, str) and (text.startswith("rtp:") or text.startswith("sdp:"))


def parse_net_source(text, encoding=None, samplerate=None, channels=None, depth_ms=DEFAULT_DEPTH_MS, idle_s=None,
                     multicast_interface=None):
    """Parse ``rtp:HOST:PORT`` (needs ``encoding``, ``samplerate``, ``channels``) or ``sdp:FILE``.

    With ``sdp:``, the format comes from the description; options given as
    well must agree with it.
    """
    head, _, rest = text.partition(":")
    if head == "rtp":
        host, port = parse_hostport(rest, "--source rtp:", allow_any_port=True)
        missing = [name for name, v in (("--rtp-in-encoding", encoding), ("--samplerate", samplerate),
                                        ("--channels", channels)) if v is None]
        if missing:
            raise RtstageError(f"--source rtp: needs {', '.join(missing)} (or describe the stream with --source sdp:FILE)")
        enc = str(encoding).upper()
        if enc not in ENCODINGS:
            raise RtstageError(f"unknown RTP encoding {encoding!r} (known: {', '.join(ENCODINGS)})")
        return RtpSource(host, port, enc, int(samplerate), int(channels), None, float(depth_ms), idle_s,
                         multicast_interface, text)
    if head == "sdp":
        from .sdp import read_sdp_file

        s = read_sdp_file(rest)
        for name, given, found in (("--rtp-in-encoding", encoding and str(encoding).upper(), s.encoding),
                                   ("--samplerate", samplerate, s.samplerate), ("--channels", channels, s.channels)):
            if given is not None and given != found:
                raise RtstageError(f"{name} {given} disagrees with {rest}, which says {found}")
        return RtpSource(s.host, s.port, s.encoding, s.samplerate, s.channels, s.payload_type, float(depth_ms), idle_s,
                         multicast_interface, text)
    raise RtstageError(f"not a network source: {text!r}")
