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
The dither is a pure function of (seed, channel, sample index), so the
only other thing a segment needs to be re-rendered on its own is the
kernel's state at its first frame: the shaper's error history, a gain or
mute ramp under way, the auto-mute counters.  A :class:`BoundarySnapshots`
thread copies that state from the shared block (read-only, between two
callbacks: the audio thread is never stopped or asked for anything) at the
last block boundary S0 before each segment boundary B, and the segment's
sidecar carries it as ``state_at_start``: the sample index S0, the parameter
values in force there, the changes applied in [S0, B) and the kernel arrays.
:func:`segment_engine` rebuilds an :class:`rtstage.engine.Engine` from it;
rendering the source from S0 and dropping the first B - S0 frames gives the
segment's words exactly, whatever the shaper.  Without a snapshot (none
could be taken in time, or the tap dropped blocks) ``state_at_start`` is
null and the segment re-renders exactly as part of the whole run, from the
first segment on.

While the tap ring drops nothing, tap frame k is sample index k, and the
grid is on sample indices.  A dropped block (counted, as always) shifts the
tap against the sample index; the sidecar's ``dropped_frames`` says so.

Retention
---------
``keep = N`` removes the oldest segments (and their sidecars, and the log
segments of the same start) once more than N exist, right after a new one
is opened.

Files
-----
Every segment is a stream of the output policy
(:class:`rtstage.files.policy.StreamOutput`): written under a hidden
``.rtstage-*.part`` name beside it, and sealed onto its name (fsync, rename,
fsync of the folder) when the next segment starts or the run stops, so a
segment never appears half-written; its sidecar is then written whole.  A
write error (a full disk, a file-size limit) seals the part of the segment
already written at once, with one warning line.  Retention counts the
segment being written among the ``keep`` newest.

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


def segment_frames_for(samplerate, channels, bytes_per_sample, rotate_s=None, rotate_mb=None):
    """Frames per segment from a duration and/or a size (the smaller wins); None without rotation.

    The size counts the PCM words plus a 44-byte WAV header (the file size of
    an uncompressed WAV segment).
    """
    candidates = []
    if rotate_s is not None:
        candidates.append(int(round(float(rotate_s) * samplerate)))
    if rotate_mb is not None:
        candidates.append((int(float(rotate_mb) * 1_000_000) - WAV_HEADER_BYTES) // (channels * bytes_per_sample))
    if not candidates:
        return None
    frames = min(candidates)
    if frames < 1:
        raise RtstageError(f"tap rotation: a segment must hold at least one frame (rotate_s={rotate_s}, "
                           f"rotate_mb={rotate_mb})")
    return frames


def _write_json_atomic(path, obj):
    """Write a sidecar whole or not at all (the output policy's :func:`~rtstage.files.policy.write_whole_file`)."""
    from ..files.policy import write_whole_file

    write_whole_file(path, json.dumps(obj, indent=1))


def _retain(path, keep, extra_suffixes=(".json",), writing=1):
    """Remove the oldest segments of ``path`` beyond ``keep``; returns the start frames removed.

    ``writing`` segments are being written (not yet under their names, so not
    listed): they count among the ``keep`` newest.
    """
    if keep is None:
        return []
    segments = list_segments(path)
    excess = len(segments) - max(0, int(keep) - int(writing))
    removed = []
    for (_, start), name in segments[:max(0, excess)]:
        for victim in (name, *(name + s for s in extra_suffixes)):
            try:
                os.unlink(victim)
            except FileNotFoundError:
                pass
        removed.append(start)
    return removed


# ----------------------------------------------------------------------------- kernel state at a boundary

STATE_ARRAYS = ("iparams", "fparams", "hist", "counts", "clock", "ramp")
"""Kernel state arrays a segment snapshot carries (the Philox cache is left out: it never changes a value)."""


def take_state_snapshot(block, blocksize):
    """A consistent copy of the kernel state between two callbacks, or None when a callback was running.

    Parameters
    ----------
    block : SharedBlock
        The live engine's shared arrays.
    blocksize : int
        Frames per callback (fixed for the stream).

    Returns
    -------
    dict or None
        ``frame`` (sample index of the next frame the callback will
        process) and a copy of each array of :data:`STATE_ARRAYS`.

    Notes
    -----
    The callback increments the callback counter first and adds its frames
    to the frame counter last, so between two callbacks
    ``frames == callbacks * blocksize``.  The copy counts only when that
    holds before and after it with neither counter moved: no callback ran
    while the arrays were read.  Reads only; the audio thread is never
    stopped or waited for.  (x86 keeps loads in order; on weaker memory
    models a fence belongs around the copy.)
    """
    from .. import kernel as K
    from ..live import shared as S

    ctl = block.ctl
    c1, f1 = int(ctl[S.C_CALLBACKS]), int(ctl[S.C_FRAMES])
    if f1 != c1 * blocksize:
        return None
    kst = block.kernel
    copy = {name: np.array(getattr(kst, name), copy=True) for name in STATE_ARRAYS}
    c2, f2 = int(ctl[S.C_CALLBACKS]), int(ctl[S.C_FRAMES])
    if c2 != c1 or f2 != f1:
        return None
    copy["frame"] = int(copy["clock"][K.CLK_FRAME])
    return copy


class BoundarySnapshots:
    """Thread taking a kernel-state snapshot just before each segment boundary (see the module notes).

    Parameters
    ----------
    block : SharedBlock
        The live engine's shared arrays.
    blocksize : int
        Frames per callback.
    samplerate : int
        Sample rate in Hz.
    segment_frames : int
        Frames per segment: the boundaries are its multiples.
    lead_s : float
        How long before a boundary the thread polls every millisecond.
    poll_s : float
        Snapshot interval further from a boundary.

    Notes
    -----
    The thread takes a snapshot every ``poll_s`` (a copy of a few hundred
    numbers), every millisecond within ``lead_s`` of a boundary, and keeps
    the latest one taken at or before the boundary, so a thread that gets
    little CPU near a boundary still has an earlier snapshot to offer (the
    re-render then starts a little earlier).  :meth:`get` hands out the snapshot of boundary
    ``b`` (kept for the last few boundaries).
    """

    KEEP = 16

    def __init__(self, block, blocksize, samplerate, segment_frames, lead_s=0.05, poll_s=0.02):
        self.block = block
        self.poll_s = float(poll_s)
        self.blocksize = int(blocksize)
        self.samplerate = int(samplerate)
        self.segment_frames = int(segment_frames)
        self.lead_s = float(lead_s)
        self._snaps = {}
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="rtstage-snapshots", daemon=True)
        self.missed = 0

    def start(self):
        """Start the thread; returns self."""
        self._thread.start()
        return self

    def stop(self):
        """Stop the thread."""
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join()

    def get(self, boundary):
        """The snapshot for ``boundary`` (None when none could be taken)."""
        with self._lock:
            return self._snaps.get(int(boundary))

    def _run(self):
        from .. import kernel as K

        clock = self.block.kernel.clock
        best = None  # latest snapshot at or before the coming boundary
        boundary = None
        while not self._stop.is_set():
            frame = int(clock[K.CLK_FRAME])
            if boundary is None or frame > boundary:
                if boundary is not None:
                    with self._lock:
                        if best is None:
                            self.missed += 1
                        else:
                            self._snaps[boundary] = best
                        for old in sorted(self._snaps)[:-self.KEEP]:
                            del self._snaps[old]
                boundary = (frame // self.segment_frames + 1) * self.segment_frames
            snap = take_state_snapshot(self.block, self.blocksize)
            if snap is not None and snap["frame"] <= boundary:
                best = snap
            to_go_s = (boundary - int(clock[K.CLK_FRAME])) / self.samplerate
            self._stop.wait(0.001 if to_go_s <= self.lead_s else self.poll_s)


def segment_state(snapshot, boundary, log=None):
    """The ``state_at_start`` of the segment starting at ``boundary``, from a snapshot and the log's history."""
    if snapshot is None:
        return None
    s0 = snapshot["frame"]
    out = {"frame": s0}
    if log is not None:
        out["values"] = log.values_before(s0)
        out["events"] = [[f, v] for f, v in log.events_from(s0) if f < boundary]
    for name in STATE_ARRAYS:
        out[name] = snapshot[name].tolist()
    return out


def segment_engine(state, start_frame, channels, samplerate, settings_type=None):
    """An engine positioned at ``state["frame"]`` with the kernel state of a segment sidecar.

    Parameters
    ----------
    state : dict
        The sidecar's ``state_at_start``.
    start_frame : int
        The segment's first sample index (B).
    channels, samplerate : int
        Stream geometry.

    Returns
    -------
    (Engine, list of (int, dict), int)
        The engine, the changes to apply from ``state["frame"]`` on (those of
        [S0, B) first; add the segment's own log after them), and the frames
        to render and drop before the segment's first frame (B - S0).
    """
    from .. import params
    from ..engine import Engine
    from ..settings import EngineSettings

    values = state["values"]
    settings = params.settings_with(EngineSettings(seed=values["seed"]), values)
    s0 = int(state["frame"])
    engine = Engine(settings, channels, samplerate, start_frame=s0)
    kst = engine.state
    if not state.get("rest"):
        for name in STATE_ARRAYS:
            getattr(kst, name)[...] = np.asarray(state[name], dtype=getattr(kst, name).dtype)
        kst.rng_tag[:] = -1
    events = [(int(f), v) for f, v in state.get("events", [])]
    return engine, events, int(start_frame) - s0


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
    snapshots : BoundarySnapshots or None
        Kernel-state snapshots at the boundaries (started and stopped with this writer).
    log : RotatingAutomationLog or callable or None
        The automation log (or a callable returning it), for the values and
        changes around a boundary.
    """

    def __init__(self, path, block, samplerate, bits, info=None, segment_frames=None, keep=None, on_segment=None,
                 on_retain=None, run_id=None, snapshots=None, log=None):
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
        self.snapshots = snapshots
        self._log = log
        self.gaps = []
        self.frames_written = 0
        self.segments = []
        self.removed = []
        self.subtype = "PCM_16" if block.out_dtype == np.int16 else "PCM_24"
        ext = os.path.splitext(path)[1].lower().lstrip(".")
        self.format = {"wav": "WAV", "flac": "FLAC", "aiff": "AIFF", "aif": "AIFF", "w64": "W64"}.get(ext, "WAV")
        self._file = None
        self._stream = None
        self._seg = None
        self._reason = None
        self._chunk = np.zeros((CHUNK_FRAMES, block.channels), dtype=block.out_dtype)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="rtstage-tap", daemon=True)
        self.error = None
        self._open_segment(0)  # fail early (at prepare) when the directory is not writable

    # -- segments -----------------------------------------------------------------------------
    def _open_segment(self, start):
        import soundfile as sf

        from ..files.policy import open_stream

        name = segment_path(self.path, start, self.run_id)
        stream = open_stream(name, "tap segment", finalize=self._finish_file)
        try:
            self._file = sf.SoundFile(stream.tmp, "w", self.samplerate, self.block.channels, self.subtype,
                                      format=self.format)
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            stream.discard()
            raise RtstageError(f"cannot open tap segment {name}: {exc}") from None
        self._stream = stream
        self._seg = {"path": name, "start_frame": int(start), "frames": 0,
                     "dropped_before": int(self.block.ctl[self._dropped_index()]), "gaps": []}
        self.segments.append(name)

    @staticmethod
    def _dropped_index():
        from ..live.shared import C_RING_DROPPED

        return C_RING_DROPPED

    def _finish_file(self):
        """Stop the thread and close the segment being written (its header finalized); a stream's ``finalize``."""
        self._stop.set()
        if self._thread.is_alive() and self._thread is not threading.current_thread():
            self._thread.join()
        if self._file is not None:
            self._file.close()

    def _close_segment(self, cut_short=None):
        """Close the segment being written, seal it onto its name and write its sidecar."""
        if self._stream is None:
            return
        stream, seg = self._stream, self._seg
        self._stream = None
        try:
            self._file.close()
        except Exception:  # after a write error libsndfile may not finish the header; the words are there
            if cut_short is None:
                raise
        self._file = None
        if cut_short is not None:
            from ..live.tap import _frames_in

            seg["frames"] = _frames_in(stream.tmp, seg["frames"])
            cut_short = f"{cut_short}; the tap stopped after {seg['frames']} frames of this segment, the run goes on"
        stream.seal(cut_short=cut_short)
        dropped_total = int(self.block.ctl[self._dropped_index()])
        dropped = dropped_total - seg.pop("dropped_before")
        sidecar = {**seg, "end_frame": seg["start_frame"] + seg["frames"], "dropped_frames": dropped,
                   "samplerate": self.samplerate, **self.info, "state_at_start": self._state_at(seg, dropped_total)}
        _write_json_atomic(seg["path"] + ".json", sidecar)

    def _state_at(self, seg, dropped_total):
        """``state_at_start`` of a closing segment (see the module notes)."""
        log = self._log() if callable(self._log) else self._log
        start = seg["start_frame"]
        if start == 0:
            values = log.values_before(0) if log is not None else None
            return {"frame": 0, "rest": True, "values": values, "events": []}
        if self.snapshots is None or dropped_total:
            return None  # after a drop, tap frames are no longer sample indices
        return segment_state(self.snapshots.get(start), start, log)

    def _rotate(self, start):
        self._close_segment()  # sealed onto its name as the next one starts
        self._open_segment(start)
        removed = _retain(self.path, self.keep)
        if removed:
            self.removed.extend(removed)
            self.segments = [s for s in self.segments if os.path.exists(s) or s == self._seg["path"]]
        if self.on_segment is not None:
            self.on_segment(start)
        if removed and self.on_retain is not None:
            self.on_retain(removed)

    # -- thread -------------------------------------------------------------------------------
    def start(self):
        """Start draining (and the snapshot thread)."""
        if self.on_segment is not None:
            self.on_segment(0)
        if self.snapshots is not None:
            self.snapshots.start()
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
            try:
                self._cut_short(exc)  # sealed (and said) before the error shows
            finally:
                self.error = exc

    def _cut_short(self, exc):
        """After a write error (on the tap thread): seal the part of the segment written, with one warning line."""
        from ..files.policy import failure_reason

        self._reason = failure_reason(self.path, self._stream.tmp if self._stream is not None else None, exc)
        try:
            self._close_segment(cut_short=self._reason)
        except Exception as err:  # the sidecar could not be written either
            self._reason = f"{self._reason}; {err}"

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
        if self.snapshots is not None:
            self.snapshots.stop()
        if self._seg is not None and self._stream is not None:
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
            from ..files.policy import WriteFailed

            raise WriteFailed(f"tap {self.path}: write failed: {self._reason or self.error}; the segments written "
                              "before are kept")
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

    HISTORY = 4096
    """Recent changes kept for :meth:`values_before` and :meth:`events_from`."""

    def __init__(self, path, samplerate, segment_frames, initial_values, format_version, keep=None, run_id=None):
        self.path = path
        self.format_version = format_version
        self.run_id = run_id
        self.samplerate = int(samplerate)
        self.segment_frames = int(segment_frames)
        self.keep = keep
        self.values = dict(initial_values)
        self._base_values = dict(initial_values)  # values before every change still in the history
        self._history = []  # (frame, values) of recent changes, in order
        self._lock = threading.Lock()
        self._file = None
        self._start = None
        self.segments = []
        with self._lock:
            self._open(0)

    def _open(self, start):
        from ..files.policy import LineStream, open_stream

        if self._file is not None:
            self._file.close()  # sealed onto its name as the next one starts
            self._file = None
        name = segment_path(self.path, start, self.run_id)
        stream = open_stream(name, "automation log segment")
        try:
            self._file = LineStream(stream)
        except OSError as exc:
            stream.discard()
            raise RtstageError(f"cannot write automation log {name}: {exc.strerror}") from None
        stream.finalize = self._file.close_file
        self._start = int(start)
        self._file.write_line(json.dumps({"rtstage_automation": self.format_version, "samplerate": self.samplerate}))
        self._file.write_line(json.dumps({"at_frame": self._start, "values": self.values}, separators=(",", ":")))
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
            self._file.write_line(json.dumps({"at_frame": int(frame), "values": values}, separators=(",", ":")))
            self.values.update(values)
            self._history.append((int(frame), dict(values)))
            if len(self._history) > self.HISTORY:
                for _, old in self._history[:-self.HISTORY // 2]:
                    self._base_values.update(old)
                del self._history[:-self.HISTORY // 2]

    def values_before(self, frame):
        """Every parameter's value in force before the changes at ``frame`` (from the recent history)."""
        with self._lock:
            out = dict(self._base_values)
            for f, values in self._history:
                if f >= frame:
                    break
                out.update(values)
            return out

    def events_from(self, frame):
        """Changes applied at ``frame`` or later (recent history), in order."""
        with self._lock:
            return [(f, dict(v)) for f, v in self._history if f >= frame]

    def close(self):
        """Close the current segment and seal it onto its name."""
        with self._lock:
            if self._file is not None:
                self._file.close()
                self._file = None
