"""Taps and automation logs that can run forever: segments on a fixed grid of sample indices, and retention.

Segments
--------
With rotation on, the tap is written as a series of segment files instead of
one file.  Segment boundaries lie on a fixed grid of tap frame indices:
every ``segment_frames`` frames (``rotate_s`` seconds of audio, or the
number of frames whose PCM words fill ``rotate_mb`` megabytes).  A segment is
named after the run (its UTC start time) and the sample index of its first
frame: ``tap.wav`` becomes ``tap-20261202T093000Z-000000172800.wav``,
``tap-20261202T093000Z-000000345600.wav`` ...  (a restarted service starts a
new run at sample index 0 again, beside the old files, never over them)  The tap thread
splits the frames it drains from the ring exactly at the boundary, so the
concatenated segments are the unrotated tap, frame for frame: nothing lost,
nothing duplicated.  Each segment gets a sidecar ``<segment>.json`` when it
is closed (start sample index, frames, gaps and drops inside it).

The automation log rotates on the same grid: ``automation.jsonl`` becomes
``automation-20261202T093000Z-000000172800.jsonl``, whose first change line (after the
header) restates *every* parameter in force at the segment's first frame.
A segment of the tap can therefore be re-rendered from the source and its
own log segment alone: an :class:`rtstage.engine.Engine` started at that
sample index (``start_frame``) with the restated values, the changes
applied at their logged frames.  The dither is a pure function of (seed,
channel, sample index), so this is exact whenever the engine's state at
the boundary is its rest state: no error-feedback history (the flat shaper),
no gain ramp or mute ramp in progress, no auto-mute hold under way.  With a
feedback shaper, a segment re-renders exactly as part of the whole run
(all segments from the first), which the logs also allow; see
docs/service.md.

While the tap ring drops nothing, tap frame k is sample index k, and the
grid is on sample indices.  A dropped block (counted, as always) shifts the
tap against the sample index; the sidecar's ``dropped_frames`` says so.

Retention
---------
``keep = N`` removes the oldest segments (and their sidecars, and the log
segments of the same start) once more than N exist, right after a new one
is opened.

Real-time
---------
All of it runs on the tap thread (and, for the log, the control housekeeping
thread); the audio callback only writes the ring, never waits on a file, and
counts a block it cannot place as dropped.
"""

import glob
import json
import os
import re
import threading
import time

import numpy as np

from ..errors import RtstageError

INDEX_DIGITS = 12
"""Digits of the sample index in segment names (zero-padded; wider indices just get longer)."""
WAV_HEADER_BYTES = 44


def new_run_id():
    """A run id for segment names: the UTC start time, ``YYYYMMDDTHHMMSSZ``."""
    return time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())


def segment_path(path, start_frame, run_id=None):
    """Segment file name for the segment starting at ``start_frame`` of run ``run_id`` (see the module notes)."""
    stem, ext = os.path.splitext(path)
    run = f"{run_id}-" if run_id else ""
    return f"{stem}-{run}{int(start_frame):0{INDEX_DIGITS}d}{ext}"


def list_segments(path):
    """Existing segments of ``path`` (all runs) as ``[((run_id, start_frame), file)]``, oldest first."""
    stem, ext = os.path.splitext(path)
    pattern = re.compile(re.escape(os.path.basename(stem)) + r"-(?:(\d{8}T\d{6}Z)-)?(\d{%d,})" % INDEX_DIGITS
                         + re.escape(ext) + "$")
    out = []
    for name in glob.glob(glob.escape(stem) + "-*" + glob.escape(ext)):
        m = pattern.match(os.path.basename(name))
        if m:
            out.append(((m.group(1) or "", int(m.group(2))), name))
    return sorted(out)


def segment_frames_for(samplerate, nchannels, bytes_per_sample, rotate_s=None, rotate_mb=None):
    """Frames per segment from a duration and/or a size (the smaller wins); None without rotation.

    The size counts the PCM words plus a 44-byte WAV header (the file size of
    an uncompressed WAV segment).
    """
    candidates = []
    if rotate_s is not None:
        candidates.append(int(round(float(rotate_s) * samplerate)))
    if rotate_mb is not None:
        candidates.append((int(float(rotate_mb) * 1_000_000) - WAV_HEADER_BYTES) // (nchannels * bytes_per_sample))
    if not candidates:
        return None
    frames = min(candidates)
    if frames < 1:
        raise RtstageError(f"tap rotation: a segment must hold at least one frame (rotate_s={rotate_s}, "
                           f"rotate_mb={rotate_mb})")
    return frames


def _retain(path, keep, extra_suffixes=(".json",)):
    """Remove the oldest segments of ``path`` beyond ``keep``; returns the start frames removed."""
    if keep is None:
        return []
    segments = list_segments(path)
    removed = []
    for (_, start), name in segments[:-keep] if len(segments) > keep else []:
        for victim in (name, *(name + s for s in extra_suffixes)):
            try:
                os.unlink(victim)
            except FileNotFoundError:
                pass
        removed.append(start)
    return removed


class RotatingTapWriter:
    """Drop-in for :class:`rtstage.live.tap.TapWriter` that writes segments (see the module notes).

    Parameters
    ----------
    path : str
        Tap path; segments are named from it (:func:`segment_path`).
    block : SharedBlock
        Shared arrays (ring and counters).
    samplerate : int
        Sample rate in Hz.
    bits : int
        Word length (PCM_16 up to 16 bits, else PCM_24).
    info : dict
        Extra plain data for the sidecars (settings, source).
    segment_frames : int
        Frames per segment (:func:`segment_frames_for`).
    keep : int or None
        Retention: segments kept.
    on_segment : callable or None
        ``on_segment(start_frame)`` on the tap thread after a segment was
        opened (the automation log's rotation follows with it).
    on_retain : callable or None
        ``on_retain(start_frames)`` with the start frames of removed segments.
    run_id : str or None
        Run id in the segment names (:func:`new_run_id`).
    """

    def __init__(self, path, block, samplerate, bits, info=None, segment_frames=None, keep=None, on_segment=None,
                 on_retain=None, run_id=None):
        from ..live.tap import CHUNK_FRAMES

        if segment_frames is None or segment_frames < 1:
            raise RtstageError("tap rotation needs a positive segment length")
        self.path = path
        self.run_id = run_id
        self.block = block
        self.samplerate = int(samplerate)
        self.info = dict(info or {}, run_id=run_id)
        self.segment_frames = int(segment_frames)
        self.keep = keep
        self.on_segment = on_segment
        self.on_retain = on_retain
        self.gaps = []
        self.frames_written = 0
        self.segments = []
        self.removed = []
        self.subtype = "PCM_16" if block.out_dtype == np.int16 else "PCM_24"
        ext = os.path.splitext(path)[1].lower().lstrip(".")
        self.format = {"wav": "WAV", "flac": "FLAC", "aiff": "AIFF", "aif": "AIFF", "w64": "W64"}.get(ext, "WAV")
        self._file = None
        self._seg = None
        self._chunk = np.zeros((CHUNK_FRAMES, block.nchannels), dtype=block.out_dtype)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="rtstage-tap", daemon=True)
        self.error = None
        self._open_segment(0)  # fail early (at prepare) when the directory is not writable

    # -- segments -----------------------------------------------------------------------------
    def _open_segment(self, start):
        import soundfile as sf

        name = segment_path(self.path, start, self.run_id)
        try:
            self._file = sf.SoundFile(name, "w", self.samplerate, self.block.nchannels, self.subtype,
                                      format=self.format)
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            raise RtstageError(f"cannot open tap segment {name}: {exc}") from None
        self._seg = {"path": name, "start_frame": int(start), "frames": 0,
                     "dropped_before": int(self.block.ctl[self._dropped_index()]), "gaps": []}
        self.segments.append(name)

    @staticmethod
    def _dropped_index():
        from ..live.shared import C_RING_DROPPED

        return C_RING_DROPPED

    def _close_segment(self):
        if self._file is None:
            return
        self._file.close()
        seg = self._seg
        dropped = int(self.block.ctl[self._dropped_index()]) - seg.pop("dropped_before")
        sidecar = {**seg, "end_frame": seg["start_frame"] + seg["frames"], "dropped_frames": dropped,
                   "samplerate": self.samplerate, **self.info}
        with open(seg["path"] + ".json", "w") as f:
            json.dump(sidecar, f, indent=1)
        self._file = None

    def _rotate(self, start):
        self._close_segment()
        self._open_segment(start)
        removed = _retain(self.path, self.keep)
        if removed:
            self.removed.extend(removed)
            self.segments = [s for s in self.segments if os.path.exists(s)]
        if self.on_segment is not None:
            self.on_segment(start)
        if removed and self.on_retain is not None:
            self.on_retain(removed)

    # -- thread -------------------------------------------------------------------------------
    def start(self):
        """Start draining."""
        if self.on_segment is not None:
            self.on_segment(0)
        self._thread.start()

    def _write(self, words):
        """Write ``words`` (frames in tap order), splitting at segment boundaries.

        The next segment is opened when its first frame arrives, so a run
        that ends on a boundary leaves no empty segment behind.
        """
        pos = 0
        n = words.shape[0]
        while pos < n:
            end = self._seg["start_frame"] + self.segment_frames
            if self.frames_written == end:
                self._rotate(end)
                end += self.segment_frames
            take = min(n - pos, end - self.frames_written)
            self._file.write(words[pos:pos + take])
            self._seg["frames"] += take
            self.frames_written += take
            pos += take

    def _drain(self):
        from ..live.shared import ring_read

        while True:
            n = ring_read(self.block.ctl, self.block.ring, self._chunk)
            if n == 0:
                return
            self._write(self._chunk[:n])

    def _run(self):
        try:
            while not self._stop.wait(0.02):
                self._drain()
            self._drain()
        except Exception as exc:  # reported by close(); the audio side never waits for this thread
            self.error = exc

    def mark_gap(self, engine_frame, gap_s, reason):
        """Record a discontinuity at the current end of the tap (while the stream is stopped)."""
        from ..live.shared import C_RING_HEAD

        self.gaps.append({"tap_frame": int(self.block.ctl[C_RING_HEAD]), "engine_frame": int(engine_frame),
                          "gap_s": round(float(gap_s), 6), "reason": reason})

    def close(self):
        """Drain what is left, close the last segment and write the sidecars; returns a summary dict."""
        from ..live.shared import C_RING_DROPPED, C_RING_HEAD, C_RING_TAIL

        self._stop.set()
        if self._thread.is_alive():
            self._thread.join()
        if self._seg is not None:
            # gaps recorded by the engine land in the segment that holds their tap frame
            for gap in self.gaps:
                if gap["tap_frame"] >= self._seg["start_frame"]:
                    self._seg["gaps"].append(gap)
        self._close_segment()
        summary = {
            "path": self.path,
            "frames": int(self.frames_written),
            "dropped_frames": int(self.block.ctl[C_RING_DROPPED]),
            "ring_backlog_frames": int(self.block.ctl[C_RING_HEAD] - self.block.ctl[C_RING_TAIL]),
            "gaps": self.gaps,
            "segment_frames": self.segment_frames,
            "segments": [s for s in self.segments if os.path.exists(s)],
            "removed_segments": len(self.removed),
        }
        if self.error is not None:
            raise RtstageError(f"tap {self.path}: write failed: {self.error}")
        return summary


class RotatingAutomationLog:
    """Automation log in segments on the tap's grid (the :class:`AutomationWriter` interface).

    Parameters
    ----------
    path : str
        Log path; segments are named from it (:func:`segment_path`).
    samplerate : int
        Sample rate in Hz (in each segment's header).
    segment_frames : int
        The tap's frames per segment (the same grid).
    initial_values : dict
        Every parameter's value at sample index 0.
    format_version : int
        Automation file format version for the header
        (:data:`rtstage.control.automation.FORMAT_VERSION`).
    keep : int or None
        Retention, as the tap's.
    run_id : str or None
        The tap's run id (the same segment names).

    Notes
    -----
    :meth:`write` is called by the control housekeeping thread as changes are
    applied, in sample order; :meth:`advance` by the tap thread when a tap
    segment opens.  Both place a segment by its sample index on the grid, so
    a change always lands in the segment whose frames it governs, whichever
    thread gets there first.  Each segment starts with the header and one
    line restating every parameter at its first frame.
    """

    def __init__(self, path, samplerate, segment_frames, initial_values, format_version, keep=None, run_id=None):
        self.path = path
        self.format_version = format_version
        self.run_id = run_id
        self.samplerate = int(samplerate)
        self.segment_frames = int(segment_frames)
        self.keep = keep
        self.values = dict(initial_values)
        self._lock = threading.Lock()
        self._file = None
        self._start = None
        self.segments = []
        with self._lock:
            self._open(0)

    def _open(self, start):
        if self._file is not None:
            self._file.close()
        name = segment_path(self.path, start, self.run_id)
        try:
            self._file = open(name, "w", encoding="utf-8")
        except OSError as exc:
            raise RtstageError(f"cannot write automation log {name}: {exc.strerror}") from None
        self._start = int(start)
        self._file.write(json.dumps({"rtstage_automation": self.format_version, "samplerate": self.samplerate}) + "\n")
        self._file.write(json.dumps({"at_frame": self._start, "values": self.values}, separators=(",", ":")) + "\n")
        self._file.flush()
        self.segments.append(name)
        _retain(self.path, self.keep, extra_suffixes=())

    def _segment_start(self, frame):
        return (int(frame) // self.segment_frames) * self.segment_frames

    def advance(self, frame):
        """Open the segment holding ``frame`` if it is past the current one."""
        with self._lock:
            if self._file is not None and self._segment_start(frame) > self._start:
                self._open(self._segment_start(frame))

    def write(self, frame, values):
        """Record that ``values`` took effect at sample index ``frame``."""
        with self._lock:
            if self._file is None:
                return
            if self._segment_start(frame) > self._start:
                self._open(self._segment_start(frame))
            self._file.write(json.dumps({"at_frame": int(frame), "values": values}, separators=(",", ":")) + "\n")
            self._file.flush()
            self.values.update(values)

    def close(self):
        """Flush and close the current segment."""
        with self._lock:
            if self._file is not None:
                self._file.close()
                self._file = None
