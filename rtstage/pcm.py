"""Raw little-endian PCM: decoding input frames and encoding output words.

Formats
-------
=======  =====  ===================================================
id       bytes  meaning
=======  =====  ===================================================
f32le    4      IEEE float, full scale ±1.0 (input only)
f64le    8      IEEE double, full scale ±1.0 (input only)
s16le    2      signed integer, full scale 2^15
s24le    3      signed integer packed in three bytes, full scale 2^23
s32le    4      signed integer, full scale 2^31
=======  =====  ===================================================

Integer input is scaled by ``2^-(width-1)``, which is exact in float64, so a
16- or 24-bit stream enters the engine as exactly the values a sound file of
the same words would give.  Output words are left-justified in their
container: a 12-bit word in ``s16le`` has its four low bits zero.
"""

import numpy as np

from .errors import RtstageError

INPUT_FORMATS = {"f32le": 4, "f64le": 8, "s16le": 2, "s24le": 3, "s32le": 4}
OUTPUT_FORMATS = {"s16le": 16, "s24le": 24, "s32le": 32}


def bytes_per_sample(fmt):
    """Size of one sample of ``fmt`` in bytes."""
    return INPUT_FORMATS[fmt]


def decode(buf, fmt, channels):
    """Decode whole frames of raw PCM ``buf`` (bytes-like) to float64 (frames, channels)."""
    if fmt == "f32le":
        x = np.frombuffer(buf, dtype="<f4").astype(np.float64)
    elif fmt == "f64le":
        x = np.frombuffer(buf, dtype="<f8").astype(np.float64)
    elif fmt == "s16le":
        x = np.frombuffer(buf, dtype="<i2") * 2.0**-15
    elif fmt == "s32le":
        x = np.frombuffer(buf, dtype="<i4") * 2.0**-31
    elif fmt == "s24le":
        # Behind one leading byte, the little-endian int32 at byte 3i holds sample i in its three high
        # bytes (the low byte is the previous sample's last, or the pad): an arithmetic shift by 8 gives
        # the sample with its sign, read with a 3-byte stride and no per-byte work.
        n = len(buf) // 3
        padded = bytearray(3 * n + 1)
        padded[1:] = memoryview(buf)[: 3 * n]
        x = (np.ndarray((n,), dtype="<i4", buffer=padded, strides=(3,)) >> 8) * 2.0**-23
    else:
        raise RtstageError(f"unknown input format '{fmt}' (known: {', '.join(INPUT_FORMATS)})")
    return x.reshape(-1, channels)


def engine_format_bits(fmt):
    """Sample format (16, 24 or 32 bits) of the engine whose words output format ``fmt`` carries."""
    return OUTPUT_FORMATS[fmt]


def encode(words, fmt):
    """Encode engine words (int16, or left-justified int32) as raw PCM bytes of ``fmt``."""
    if fmt == "s16le":
        return words.astype("<i2", copy=False).tobytes()
    if fmt == "s32le":
        return words.astype("<i4", copy=False).tobytes()
    if fmt == "s24le":
        w = words.astype("<i4", copy=False).reshape(-1)
        # The three high bytes of each left-justified 32-bit word.
        return np.ascontiguousarray(w.view(np.uint8).reshape(-1, 4)[:, 1:4]).tobytes()
    raise RtstageError(f"unknown output format '{fmt}' (known: {', '.join(OUTPUT_FORMATS)})")
