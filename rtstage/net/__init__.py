"""Network drivers: RTP output and input (L16/L24), SDP, SAP, and the engine clocked without a device.

Public API
----------
RtpOutConfig
    One outgoing stream's settings and random identifiers (:mod:`rtstage.net.rtp`).
build_sdp, parse_sdp
    Session descriptions (:mod:`rtstage.net.sdp`).
SapAnnouncer
    Session announcements (:mod:`rtstage.net.sap`).
RtpReceiver, JitterBuffer
    The input side (:mod:`rtstage.net.receiver`).
NetEngine
    ``rtstage run --device none`` (:mod:`rtstage.net.netengine`).

See docs/rtp.md.
"""
