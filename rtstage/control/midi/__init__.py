"""MIDI control: controller maps, decoding, soft takeover, learn, value feedback, and the ports.

The mapping logic is pure and takes explicit time (``now_s``), so it is tested
on byte sequences; :class:`MidiControl` wires it to python-rtmidi ports.

Controller maps (TOML, ``presets/midi/*.toml``)
-----------------------------------------------
::

    name = "desk"
    description = "one line"
    feedback = true                  # send current values back to the controller

    [[control]]
    param = "bits"                   # a name from rtstage.params.PARAMS
    channel = 1                      # MIDI channel 1..16
    cc = 102                         # controller number 0..119
    mode = "absolute"                # absolute | relative-twos | relative-offset
                                     # | relative-signmag | 14bit | toggle
    # lsb_cc = 103                   # 14bit: the LSB controller (default cc + 32)
    # min = 8, max = 24              # part of the parameter's range the control covers
    # step = 1                       # relative: change per tick
    # takeover = "soft"              # soft | jump (absolute and 14bit)

    [programs]                       # program change (0..127, as sent) -> preset name
    0 = "mastering-16"

Modes
-----
``absolute``
    The 7-bit value spans the range: ``min + (value / 127)·(max - min)``
    (rounded for integers; an enum's choices get equal slices; a bool is on
    from 64).
``relative-twos`` / ``relative-offset`` / ``relative-signmag``
    Each message is a signed number of steps: two's complement in 7 bits
    (1..63 up, 127..65 down), offset 64 (65 = +1, 63 = -1), or sign and
    magnitude (bit 6 is the sign, 0x41 = -1).
``14bit``
    A pair of controllers, MSB then LSB (MIDI 1.0: LSB of controller n is
    n + 32 for n < 32); per channel, an MSB resets the LSB to 0, so the value
    is ``msb·128`` until the LSB arrives; the range is spanned by 0..16383.
``toggle``
    A bool flips on every press (value ≥ 64); releases are ignored.

Soft takeover: after a start, or after the parameter was changed from
elsewhere, an absolute control does nothing until its position crosses (or
meets) the parameter's current value, so a fader that sits elsewhere cannot
make it jump.

Everything that is not a control change or a program change (SysEx, clock,
active sensing, notes, malformed bytes) is ignored.

References
----------
.. [1] MIDI Manufacturers Association, "The Complete MIDI 1.0 Detailed
   Specification", 1996: controller numbers 102–119 are undefined; 0–31 MSB
   with 32–63 LSB; running status; system real-time bytes may appear anywhere.
"""

from .wire import (  # noqa: F401
    CHANNEL_PRESSURE, CONTROL_CHANGE, MidiStreamParser, NOTE_OFF, NOTE_ON, PITCH_BEND, POLY_PRESSURE, PROGRAM_CHANGE, REALTIME_FIRST, SYSEX_END, SYSEX_START, cc_message, decode_message, decode_relative,
)
from .maps import (  # noqa: F401
    Control, MAX_CC, MODES, MidiMap, PRESET_MIDI_DIR, UNDEFINED_CCS, load_map, map_from_dict,
)
from .mapper import (  # noqa: F401
    MidiMapper,
)
from .feedback import (  # noqa: F401
    FeedbackScheduler,
)
from .ports import (  # noqa: F401
    API_NAMES, api_constants, match_port, open_api, port_base_name,
)
from .runtime import (  # noqa: F401
    MidiControl,
)
