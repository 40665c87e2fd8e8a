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

Files
-----
The tap is a stream of the output policy (:class:`rtstage.files.policy.StreamOutput`):
while the run lasts the words go into a hidden ``.rtstage-*.part`` file
beside the tap, and :meth:`TapWriter.close` closes it (libsndfile finalizes
the header) and seals it onto the tap's name; the sidecar is then written
whole.  A write error (a full disk, a file-size limit) seals the part
already written at once, with one warning line, and the run goes on without
the tap (:meth:`TapWriter.close` then fails, naming what was kept).
"""

import json
import os

import numpy as np
import soundfile as sf

from ..errors import RtstageError
from ..files.policy import WriteFailed, failure_reason, open_stream, write_whole_file
from ..threads import StoppableThread
from .shared import C_RING_DROPPED, C_RING_HEAD, C_RING_TAIL, ring_backlog, ring_read

CHUNK_FRAMES = 8192
POLL_S = 0.02


def _frames_in(path, default):
    """Frames a closed sound file holds (read back with libsndfile), else ``default``."""
    try:
        return int(sf.info(path).frames)
    except Exception:
        return int(default)


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
        sidecar path (temporary files the caller renames into place itself).
    stream : rtstage.files.policy.StreamOutput or None
        The stream to write the audio into (from the caller's
        :meth:`~rtstage.files.policy.OutputPlan.stream`); None opens one for
        ``path`` (the usual case).  Ignored with ``write_paths``.
    """

    def __init__(self, path, block, samplerate, bits, info=None, write_paths=None, stream=None):
        self.path = path
        self.block = block
        self.gaps = []
        self.info = dict(info or {})
        self.frames_written = 0
        self.stream = None
        if write_paths:
            self._audio_path, self._sidecar_path = write_paths
        else:
            self.stream = stream if stream is not None else open_stream(path, "tap")
            self._audio_path, self._sidecar_path = self.stream.tmp, None
        subtype = "PCM_16" if block.out_dtype == np.int16 else "PCM_24"
        ext = os.path.splitext(path)[1].lower().lstrip(".")
        fmt = {"wav": "WAV", "flac": "FLAC", "aiff": "AIFF", "aif": "AIFF", "w64": "W64", "caf": "CAF"}.get(ext, "WAV")
        try:
            self._file = sf.SoundFile(self._audio_path, "w", int(samplerate), block.channels, subtype, format=fmt)
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            if self.stream is not None:
                self.stream.discard()
            raise RtstageError(f"cannot open tap file {path}: {exc}") from None
        self._chunk = np.zeros((CHUNK_FRAMES, block.channels), dtype=block.out_dtype)
        self._worker = StoppableThread(self._run, "rtstage-tap")
        self.error = None
        self._reason = None
        self.frames_kept = None
        if self.stream is not None:
            self.stream.finalize = self._finish_file

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
            try:
                self._cut_short(exc)  # sealed (and said) before the error shows
            finally:
                self.error = exc

    def _cut_short(self, exc):
        """After a write error (on the tap thread): seal what was written, with one warning line."""
        self._reason = failure_reason(self.path, self._audio_path, exc)
        try:
            self._file.close()
        except Exception:  # libsndfile could not finish the header either; the words are still there
            pass
        if self.stream is None:
            return
        kept = self.frames_kept = _frames_in(self._audio_path, self.frames_written)
        try:
            self.stream.seal(cut_short=f"{self._reason}; the tap stopped after {kept} frames, the run goes on")
        except RtstageError as err:
            self._reason = f"{self._reason}; {err}"

    def _finish_file(self):
        """Stop the thread and close the sound file (its header finalized); called before sealing."""
        self._worker.stop()
        self._file.close()

    def mark_gap(self, engine_frame, gap_s, reason):
        """Record a discontinuity at the current end of the tap (call while the stream is stopped)."""
        self.gaps.append({
            "tap_frame": int(self.block.ctl[C_RING_HEAD]),
            "engine_frame": int(engine_frame),
            "gap_s": round(float(gap_s), 6),
            "reason": reason,
        })

    def close(self):
        """Drain what is left, close and seal the file and write the sidecar; returns a summary dict.

        Raises :class:`rtstage.files.policy.WriteFailed` when writing failed
        (the part written before is in place, see the module notes).
        """
        self._finish_file()
        summary = {
            "path": self.path,
            "frames": int(self.frames_written),
            "dropped_frames": int(self.block.ctl[C_RING_DROPPED]),
            "ring_backlog_frames": ring_backlog(self.block.ctl, C_RING_HEAD, C_RING_TAIL),
            "gaps": self.gaps,
        }
        text = json.dumps({**summary, **self.info}, indent=1)
        if self.stream is None:
            with open(self._sidecar_path, "w") as f:
                f.write(text)
            if self.error is not None:
                raise RtstageError(f"tap file {self.path}: write failed: {self.error}")
            return summary
        self.stream.seal()
        try:
            write_whole_file(sidecar_path(self.path), text)
        except WriteFailed:
            if self.error is None:
                raise
        if self.error is not None:
            raise WriteFailed(f"tap file {self.path}: write failed: {self._reason}; the {self.frames_kept} frames "
                              "written before are kept in it")
        return summary
