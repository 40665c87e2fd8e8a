"""The output tap: exactly the words sent to the device, written to a file.

The callback copies every block of output words into the SPSC ring of
:mod:`rtstage.live.shared`; a :class:`TapWriter` thread drains the ring into a
sound file (``PCM_16`` for a 16-bit container, ``PCM_24`` for 17..24-bit words,
which sit left-justified in int32 and lose nothing in 24 bits).  A block that
does not fit the ring is dropped whole and counted (none is expected: the
ring holds two seconds).

Discontinuities
---------------
When the stream stops and is reopened (the device vanished, the server was
restarted), the audio on the device has a gap.  The tap file stays a plain
concatenation of the words that were sent, and the gap is recorded, never
hidden: the sidecar ``<tap>.gaps.json`` lists each gap with the tap frame
index where the words resume, the engine's sample index, the wall-clock
length of the gap and the reason, and the status report counts them.  The
file itself is never padded or shifted.
"""

import json
import os

import numpy as np
import soundfile as sf

from ..errors import RtstageError
from ..threads import StoppableThread
from .shared import C_RING_DROPPED, C_RING_HEAD, C_RING_TAIL, ring_backlog, ring_read

CHUNK_FRAMES = 8192
POLL_S = 0.02


def sidecar_path(path):
    """Path of the gaps sidecar of tap file ``path``."""
    return path + ".gaps.json"


class TapWriter:
    """Thread draining the tap ring of a :class:`~rtstage.live.shared.SharedBlock` into a file.

    Parameters
    ----------
    path : str
        Output file (format from the extension, WAV when unknown).
    block : SharedBlock
        The shared arrays (ring and counters).
    samplerate : int
        Sample rate in Hz.
    bits : int
        Word length (chooses PCM_16 or PCM_24).
    info : dict
        Extra plain data for the sidecar (settings, source).
    write_paths : (str, str) or None
        Where to write the audio and the sidecar instead of ``path`` and its
        sidecar path (the temporary files of the output policy, renamed
        into place by the caller).
    """

    def __init__(self, path, block, samplerate, bits, info=None, write_paths=None):
        self.path = path
        self._audio_path, self._sidecar_path = write_paths or (path, sidecar_path(path))
        self.block = block
        self.gaps = []
        self.info = dict(info or {})
        self.frames_written = 0
        subtype = "PCM_16" if block.out_dtype == np.int16 else "PCM_24"
        ext = os.path.splitext(path)[1].lower().lstrip(".")
        fmt = {"wav": "WAV", "flac": "FLAC", "aiff": "AIFF", "aif": "AIFF", "w64": "W64", "caf": "CAF"}.get(ext, "WAV")
        try:
            self._file = sf.SoundFile(self._audio_path, "w", int(samplerate), block.channels, subtype, format=fmt)
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            raise RtstageError(f"cannot open tap file {path}: {exc}") from None
        self._chunk = np.zeros((CHUNK_FRAMES, block.channels), dtype=block.out_dtype)
        self._worker = StoppableThread(self._run, "rtstage-tap")
        self.error = None

    def start(self):
        """Start draining."""
        self._worker.start()

    def _drain(self):
        while True:
            n = ring_read(self.block.ctl, self.block.ring, self._chunk)
            if n == 0:
                return
            self._file.write(self._chunk[:n])
            self.frames_written += n

    def _run(self):
        try:
            while not self._worker.wait(POLL_S):
                self._drain()
            self._drain()
        except Exception as exc:  # reported by close(); the audio side never waits for this thread
            self.error = exc

    def mark_gap(self, engine_frame, gap_s, reason):
        """Record a discontinuity at the current end of the tap (call while the stream is stopped)."""
        self.gaps.append({
            "tap_frame": int(self.block.ctl[C_RING_HEAD]),
            "engine_frame": int(engine_frame),
            "gap_s": round(float(gap_s), 6),
            "reason": reason,
        })

    def close(self):
        """Drain what is left, close the file and write the sidecar; returns a summary dict."""
        self._worker.stop()
        self._file.close()
        summary = {
            "path": self.path,
            "frames": int(self.frames_written),
            "dropped_frames": int(self.block.ctl[C_RING_DROPPED]),
            "ring_backlog_frames": ring_backlog(self.block.ctl, C_RING_HEAD, C_RING_TAIL),
            "gaps": self.gaps,
        }
        with open(self._sidecar_path, "w") as f:
            json.dump({**summary, **self.info}, f, indent=1)
        if self.error is not None:
            raise RtstageError(f"tap file {self.path}: write failed: {self.error}")
        return summary
