"""MIDI ports through python-rtmidi: choosing the API, matching port names.

Part of :mod:`rtstage.control.midi` (its notes describe the map format and the modes).
"""

import re

from ...errors import RtstageError
from ...log import log as _log


API_NAMES = ("jack", "alsa", "coremidi", "winmm")
"""MIDI APIs by name, in the order ``auto`` tries them."""


_CLIENT_NUMBERS = re.compile(r"(\s+\d+:\d+$)|(^\d+:\s*)")


def port_base_name(name):
    """A port name without ALSA client:port numbers (``"Desk:Desk MIDI 1 20:0"`` → ``"Desk:Desk MIDI 1"``)."""
    return _CLIENT_NUMBERS.sub("", name).strip()


def match_port(names, wanted):
    """Index of the first port whose name (without client numbers) contains ``wanted``, case-insensitive; or None."""
    wanted = wanted.lower()
    for i, name in enumerate(names):
        if wanted in port_base_name(name).lower():
            return i
    return None


def _rtmidi():
    try:
        import rtmidi
    except ImportError:
        raise RtstageError("MIDI needs python-rtmidi (pip install python-rtmidi)") from None
    return rtmidi


def api_constants():
    """``{name: rtmidi API constant}`` for the APIs of :data:`API_NAMES`."""
    rtmidi = _rtmidi()
    return {"jack": rtmidi.API_UNIX_JACK, "alsa": rtmidi.API_LINUX_ALSA,
            "coremidi": rtmidi.API_MACOSX_CORE, "winmm": rtmidi.API_WINDOWS_MM}


def open_api(api="auto", client_name="rtstage"):
    """Open MIDI input and output clients on ``api`` or, for ``auto``, the first that works.

    Returns
    -------
    (str, rtmidi.MidiIn, rtmidi.MidiOut)
        The API's name and the two clients (no port open yet).

    Raises
    ------
    RtstageError
        Unknown API, not compiled in, or none could be opened (with each reason).
    """
    rtmidi = _rtmidi()
    constants = api_constants()
    compiled = set(rtmidi.get_compiled_api())
    if api == "auto":
        names = [n for n in API_NAMES if constants[n] in compiled]
    elif api in constants:
        if constants[api] not in compiled:
            have = ", ".join(n for n in API_NAMES if constants[n] in compiled) or "none"
            raise RtstageError(f"MIDI API {api} is not compiled into python-rtmidi (have: {have})")
        names = [api]
    else:
        raise RtstageError(f"unknown MIDI API {api!r} (known: auto, {', '.join(API_NAMES)})")
    reasons = []
    for name in names:
        try:
            midi_in = rtmidi.MidiIn(constants[name], name=client_name)
            midi_out = rtmidi.MidiOut(constants[name], name=client_name)
            midi_in.get_ports()
            midi_out.get_ports()
            return name, midi_in, midi_out
        except Exception as exc:  # rtmidi raises SystemError or its own errors per backend
            reasons.append(f"{name}: {exc}")
            if api == "auto":
                _log(f"midi: {name} unavailable ({exc}); trying the next API")
    raise RtstageError("no MIDI API could be opened (" + "; ".join(reasons or ["none compiled in"]) + ")")
