"""Writing the link test sequence to a sound file, block by block.

The words go into a PCM container that holds them exactly: ``PCM_16`` for
words of up to 16 bits, ``PCM_24`` above, left-justified (the low container
bits zero).  The file goes through the output policy
(:mod:`rtstage.files.policy`), so a reader never sees half a sequence.
"""

import os

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


def write_sequence(path, seed, bits, samplerate, channels, frames, overwrite=False, blocksize=BLOCK_FRAMES, plan=None):
    """Write the sequence to ``path`` (format from the extension); returns the frames written.

    Parameters
    ----------
    path : str
        Output sound file: .wav, .flac, .aiff, .w64 or .caf.
    seed, bits, samplerate, channels, frames
        The sequence (see :func:`rtstage.linktest.sequence.sequence_block`).
    overwrite : bool
        Replace an existing file (when this function makes its own output plan).
    blocksize : int
        Frames generated and written at a time (the file does not depend on it).
    plan : rtstage.files.policy.OutputPlan or None
        A checked plan that declares ``path`` (the caller commits it); None: one of its own.

    Notes
    -----
    The file goes through the output policy (:mod:`rtstage.files.policy`):
    refused before any work if it exists (without ``overwrite``) or is a
    folder, written under a temporary name, fsync'd and renamed into place.
    """
    import soundfile as sf

    from ..files.policy import OutputPlan

    seq.check_shape(bits, samplerate, channels, frames)
    ext = os.path.splitext(path)[1].lower()
    if ext not in FORMATS:
        raise RtstageError(f"cannot tell the output format from '{path}' (use one of: {', '.join(FORMATS)})")
    subtype = container_subtype(bits)
    own = plan is None
    if own:
        plan = OutputPlan(f"writing the link test sequence {path}", overwrite=overwrite)
        plan.add_file(path, "output", size_bytes=int(frames) * int(channels) * (2 if subtype == "PCM_16" else 3))
        plan.check()
    try:
        with plan.atomic(path) as tmp:
            with sf.SoundFile(tmp, "w", int(samplerate), int(channels), subtype, format=FORMATS[ext]) as f:
                for start in range(0, int(frames), int(blocksize)):
                    block = seq.sequence_block(seed, bits, samplerate, channels, frames, start, blocksize)
                    f.write(left_justified(block, bits))
    except (sf.LibsndfileError, RuntimeError) as exc:
        raise RtstageError(f"cannot write {path}: {exc}") from None
    if own:
        plan.commit()
    return int(frames)
