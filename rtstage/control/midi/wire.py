"""Bytes on the MIDI wire: the running-status stream parser, message decoding, relative encodings.

Part of :mod:`rtstage.control.midi` (its notes describe the map format and the modes).
"""


NOTE_OFF = 0x80
NOTE_ON = 0x90
POLY_PRESSURE = 0xA0
CONTROL_CHANGE = 0xB0
PROGRAM_CHANGE = 0xC0
CHANNEL_PRESSURE = 0xD0
PITCH_BEND = 0xE0
SYSEX_START = 0xF0
SYSEX_END = 0xF7
REALTIME_FIRST = 0xF8
"""0xF8..0xFF: clock, start, continue, stop, active sensing, reset (single bytes)."""

_DATA_BYTES = {NOTE_OFF: 2, NOTE_ON: 2, POLY_PRESSURE: 2, CONTROL_CHANGE: 2, PROGRAM_CHANGE: 1,
               CHANNEL_PRESSURE: 1, PITCH_BEND: 2}
_SYSTEM_COMMON_DATA = {0xF1: 1, 0xF2: 2, 0xF3: 1, 0xF6: 0}


class MidiStreamParser:
    """Split a MIDI byte stream into channel messages.

    Handles running status, drops SysEx and system common messages, lets
    real-time bytes pass anywhere without disturbing a message, and discards
    stray data bytes and messages cut short by a new status byte.

    Yields ``(status, data)`` tuples of channel messages with all data bytes.
    """

    def __init__(self):
        self._status = None
        self._data = []
        self._need = 0
        self._in_sysex = False
        self._skip = 0

    def feed(self, data):
        """Parse ``data`` (iterable of ints or bytes); returns the complete channel messages."""
        out = []
        for byte in data:
            byte = int(byte)
            if not 0 <= byte <= 0xFF:
                self._status = None
                continue
            if byte >= REALTIME_FIRST:
                continue
            if byte & 0x80:
                self._in_sysex = byte == SYSEX_START
                self._data = []
                if byte == SYSEX_END or self._in_sysex:
                    self._status = None
                    continue
                if byte >= 0xF0:
                    self._status = None
                    self._skip = _SYSTEM_COMMON_DATA.get(byte, 0)
                    continue
                self._status = byte
                self._need = _DATA_BYTES[byte & 0xF0]
                self._skip = 0
                continue
            if self._in_sysex:
                continue
            if self._skip:
                self._skip -= 1
                continue
            if self._status is None:
                continue
            self._data.append(byte)
            if len(self._data) == self._need:
                out.append((self._status, tuple(self._data)))
                self._data = []
        return out


def decode_message(message):
    """Decode one message as python-rtmidi delivers it.

    Returns
    -------
    tuple or None
        ``("cc", channel, number, value)`` or ``("program", channel, program)``
        with channel 1..16; None for anything else or anything malformed.
    """
    try:
        found = MidiStreamParser().feed(message)
    except (TypeError, ValueError):
        return None
    if len(found) != 1:
        return None
    status, data = found[0]
    channel = (status & 0x0F) + 1
    if status & 0xF0 == CONTROL_CHANGE:
        return ("cc", channel, data[0], data[1])
    if status & 0xF0 == PROGRAM_CHANGE:
        return ("program", channel, data[0])
    return None


def decode_relative(mode, value):
    """Signed step count of a relative control's 7-bit value."""
    if mode == "relative-twos":
        return value - 128 if value >= 64 else value
    if mode == "relative-offset":
        return value - 64
    if mode == "relative-signmag":
        magnitude = value & 0x3F
        return -magnitude if value & 0x40 else magnitude
    raise ValueError(mode)


def cc_message(channel, number, value):
    """Bytes of a control change (channel 1..16)."""
    return [CONTROL_CHANGE | (channel - 1), number & 0x7F, value & 0x7F]
