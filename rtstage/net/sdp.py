"""Session descriptions (RFC 4566) of rtstage's RTP streams, and reading one back for ``--source sdp:FILE``.

What rtstage writes for an outgoing stream::

    v=0
    o=- <session id> <version> IN IP4 <sender address>
    s=rtstage <words> (<encoding>/<rate>/<channels>)
    c=IN IP4 <destination>[/<ttl> for IPv4 multicast, RFC 4566 §5.7]
    t=0 0
    a=recvonly
    m=audio <port> RTP/AVP <payload type>
    a=rtpmap:<payload type> L16|L24/<rate>/<channels>
    a=ptime:<packet time in ms>
    a=ts-refclk:<clock source>
    a=mediaclk:direct=<offset> | a=mediaclk:sender

The clock lines (RFC 7273) say which clock the RTP timestamps follow, and
nothing more than rtstage knows:

* paced by ``CLOCK_MONOTONIC`` (the default): ``a=ts-refclk:local`` (a clock
  traceable to nothing outside the host) and ``a=mediaclk:direct=<offset>``:
  the timestamp of the sample at clock time t is ``offset + t·rate``
  (modulo 2^32), t counted from the clock's epoch;
* paced by ``CLOCK_TAI``: the same ``direct`` relation on the system's TAI
  clock.  Whether that clock follows a PTP grandmaster depends on a PTP daemon
  rtstage does not control, so the clock source is ``local`` unless the user
  states it (``--rtp-ts-refclk ptp=IEEE1588-2008:<grandmaster id>:<domain>``);
* clocked by an arriving stream: ``a=mediaclk:sender`` (the timestamps count
  samples as they come, tied to no clock).

References
----------
.. [1] RFC 4566, "SDP: Session Description Protocol", 2006.
.. [2] RFC 7273, "RTP Clock Source Signalling", 2014, §4 (ts-refclk), §5 (mediaclk).
.. [3] RFC 3551 §4.5.11 and RFC 3190 §4 (the L16/L24 rtpmap: name/rate/channels).
"""

import ipaddress
import re
import secrets
import time
from dataclasses import dataclass

from ..errors import RtstageError
from .rtp import ENCODINGS, PTIMES_MS

_REFCLK = re.compile(r"^(local|private(:traceable)?|ntp=\S+|ptp=\S+|gps|gal|glonass)$")


def check_ts_refclk(text):
    """Check a clock source for ``a=ts-refclk`` against RFC 7273 §4.8's forms; returns it."""
    text = str(text).strip()
    if not _REFCLK.match(text):
        raise RtstageError(f"clock source {text!r} is not an RFC 7273 ts-refclk value "
                           "(local, private, ntp=SERVER, ptp=IEEE1588-2008:GMID:DOMAIN, gps, gal, glonass)")
    return text


def _addrtype(host):
    return "IP6" if ipaddress.ip_address(host).version == 6 else "IP4"


def build_sdp(config, origin_host, clock="local", ts_refclk=None, arrival_clocked=False, session_id=None,
              session_version=None, name=None):
    """The session description of an outgoing stream.

    Parameters
    ----------
    config : RtpOutConfig
        The stream (destination, format, payload type, packet time, TTL, timestamp offset).
    origin_host : str
        The sender's own address (``o=`` line).
    clock : {'local', 'tai'}
        The clock pacing the stream.
    ts_refclk : str or None
        The clock source as the user states it; default ``local``.
    arrival_clocked : bool
        The stream is clocked by an arriving stream (``a=mediaclk:sender``).

    Returns
    -------
    str
        SDP text, CRLF line ends (RFC 4566 §5).
    """
    session_id = session_id if session_id is not None else secrets.randbits(48)
    session_version = session_version if session_version is not None else int(time.time())
    refclk = check_ts_refclk(ts_refclk) if ts_refclk else "local"
    dest = config.host
    c_addr = dest
    if config.multicast and _addrtype(dest) == "IP4":
        c_addr = f"{dest}/{config.ttl if config.ttl is not None else 1}"
    title = name or f"rtstage {config.bits}-bit words ({config.encoding}/{config.samplerate}/{config.channels})"
    lines = [
        "v=0",
        f"o=- {session_id} {session_version} IN {_addrtype(origin_host)} {origin_host}",
        f"s={title}",
        f"c=IN {_addrtype(dest)} {c_addr}",
        "t=0 0",
        "a=recvonly",
        f"m=audio {config.port} RTP/AVP {config.payload_type}",
        f"a=rtpmap:{config.payload_type} {config.encoding}/{config.samplerate}/{config.channels}",
        f"a=ptime:{config.ptime_text}",
        f"a=ts-refclk:{refclk}",
        "a=mediaclk:sender" if arrival_clocked else f"a=mediaclk:direct={config.ts_offset}",
    ]
    return "\r\n".join(lines) + "\r\n"


@dataclass(frozen=True)
class SdpStream:
    """The first audio stream of a session description."""

    host: str
    port: int
    payload_type: int
    encoding: str
    samplerate: int
    channels: int
    ptime_ms: str = None
    ttl: int = None
    ts_refclk: str = None
    mediaclk: str = None
    session_name: str = None


def parse_sdp(text):
    """Read the first L16/L24 audio stream of an SDP text.

    Media-level ``c=`` overrides the session-level one (RFC 4566 §5.7).

    Raises
    ------
    RtstageError
        When there is no audio stream, no connection address, or its payload
        type is not mapped to L16 or L24 by an ``a=rtpmap`` line.
    """
    session = {"c": None, "a": [], "s": None}
    media = None
    for raw in str(text).replace("\r\n", "\n").split("\n"):
        line = raw.strip()
        if len(line) < 2 or line[1] != "=":
            continue
        key, value = line[0], line[2:]
        if key == "m":
            if media is not None and media["kind"] == "audio":
                break
            parts = value.split()
            if len(parts) < 4:
                raise RtstageError(f"SDP: malformed m= line {line!r}")
            media = {"kind": parts[0], "port": parts[1], "proto": parts[2], "fmts": parts[3:], "c": None, "a": []}
            continue
        target = media if media is not None else session
        if key == "c":
            target["c"] = value
        elif key == "a":
            target["a"].append(value)
        elif key == "s" and media is None:
            session["s"] = value
    if media is None or media["kind"] != "audio":
        raise RtstageError("SDP: no audio stream (m=audio)")
    conn = media["c"] or session["c"]
    if not conn:
        raise RtstageError("SDP: no connection address (c=)")
    parts = conn.split()
    if len(parts) != 3 or parts[0] != "IN":
        raise RtstageError(f"SDP: malformed c= line {conn!r}")
    addr, _, ttl = parts[2].partition("/")
    try:
        ipaddress.ip_address(addr)
    except ValueError:
        raise RtstageError(f"SDP: connection address {addr!r} is not a numeric IP address") from None
    try:
        port = int(media["port"].split("/")[0])
    except ValueError:
        raise RtstageError(f"SDP: port {media['port']!r} is not a number") from None
    attrs = media["a"] + session["a"]
    rtpmap = {}
    values = {}
    for a in attrs:
        name, _, val = a.partition(":")
        if name == "rtpmap":
            pt, _, enc = val.partition(" ")
            rtpmap.setdefault(pt.strip(), enc.strip())
        else:
            values.setdefault(name, val.strip())
    for fmt in media["fmts"]:
        enc = rtpmap.get(fmt)
        if not enc:
            continue
        fields = enc.split("/")
        if fields[0].upper() not in ENCODINGS:
            continue
        try:
            rate = int(fields[1])
            channels = int(fields[2]) if len(fields) > 2 else 1
        except (IndexError, ValueError):
            raise RtstageError(f"SDP: malformed rtpmap {enc!r}") from None
        ptime = values.get("ptime")
        if ptime is not None and ptime not in PTIMES_MS:
            try:
                ptime = next(k for k in PTIMES_MS if float(k) == float(ptime))
            except (StopIteration, ValueError):
                pass
        return SdpStream(host=addr, port=port, payload_type=int(fmt), encoding=fields[0].upper(), samplerate=rate,
                         channels=channels, ptime_ms=ptime, ttl=int(ttl) if ttl.isdigit() else None,
                         ts_refclk=values.get("ts-refclk"), mediaclk=values.get("mediaclk"),
                         session_name=session["s"])
    raise RtstageError("SDP: the audio stream has no L16 or L24 payload type (a=rtpmap)")


def read_sdp_file(path):
    """:func:`parse_sdp` of a file."""
    try:
        with open(path, encoding="utf-8") as f:
            return parse_sdp(f.read())
    except OSError as exc:
        raise RtstageError(f"cannot read SDP file {path}: {exc.strerror or exc}") from None
