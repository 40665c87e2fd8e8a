"""Writing the link test sequence to a sound file, block by block.

The words go into a PCM container that holds them exactly: ``PCM_16`` for
words of up to 16 bits, ``PCM_24`` above, left-justified (the low container
bits zero).  The file is written under a temporary name beside the target and
renamed when complete, so a reader never sees half a sequence.
"""

import os
import tempfile

import numpy as np

from ..errors import RtstageError
from . import sequence as seq

BLOCK_FRAMES = 65536

FORMATS = {".wav": "WAV", ".flac": "FLAC", ".aiff": "AIFF", ".aif": "AIFF", ".w64": "W64", ".caf": "CAF"}


def container_subtype(bits):
    """``PCM_16`` for words of up to 16 bits, ``PCM_24`` above."""
    return "PCM_16" if int(bits) <= 16 else "PCM_24"


def left_justified(words, bits):
    """N-bit integer words as left-justified int32 (what libsndfile writes exactly into PCM_16/PCM_24)."""
    return words.astype(np.int32) << np.int32(32 - int(bits))


def write_sequence(path, seed, bits, samplerate, channels, frames, force=False, blocksize=BLOCK_FRAMES):
    """Write the sequence to ``path`` (format from the extension); returns the frames written.

    Parameters
    ----------
    path : str
        Output sound file: .wav, .flac, .aiff, .w64 or .caf.
    seed, bits, samplerate, channels, frames
        The sequence (see :func:`rtstage.linktest.sequence.sequence_block`).
    force : bool
        Replace an existing file.
    blocksize : int
        Frames generated and written at a time (the file does not depend on it).
    """
    import soundfile as sf

    seq.check_shape(bits, samplerate, channels, frames)
    ext = os.path.splitext(path)[1].lower()
    if ext not in FORMATS:
        raise RtstageError(f"cannot tell the output format from '{path}' (use one of: {', '.join(FORMATS)})")
    if os.path.exists(path) and not force:
        raise RtstageError(f"{path} exists; use --overwrite to replace it")
    directory = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".linktest-", suffix=ext, dir=directory)
    os.close(fd)
    try:
        with sf.SoundFile(tmp, "w", int(samplerate), int(channels), container_subtype(bits), format=FORMATS[ext]) as f:
            for start in range(0, int(frames), int(blocksize)):
                block = seq.sequence_block(seed, bits, samplerate, channels, frames, start, blocksize)
                f.write(left_justified(block, bits))
        os.replace(tmp, path)
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        raise RtstageError(f"cannot write {path}: {exc}") from None
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return int(frames)
