"""PortAudio's stream-callback interface, as the compiled callbacks see it.

The values are PortAudio's (portaudio.h, v19): the callback's return codes,
the ``PaStreamCallbackFlags`` bits and the C signature of ``PaStreamCallback``.
"""

from numba import types

PA_CONTINUE = 0
PA_COMPLETE = 1

PA_INPUT_UNDERFLOW = 0x1
PA_INPUT_OVERFLOW = 0x2
PA_OUTPUT_UNDERFLOW = 0x4
PA_OUTPUT_OVERFLOW = 0x8
PA_PRIMING_OUTPUT = 0x10

CALLBACK_SIGNATURE = types.intc(types.voidptr, types.voidptr, types.ulong, types.voidptr, types.ulong, types.voidptr)
"""``int (const void *in, void *out, unsigned long frames, const PaStreamCallbackTimeInfo *, PaStreamCallbackFlags, void *user)``."""
