"""Timed parameter changes: the automation file, its writer and its player.

File format (JSON lines, UTF-8)
-------------------------------
One JSON object per line; blank lines and lines starting with ``#`` are
ignored.  An optional first object is the header::

    {"rtstage_automation": 1, "samplerate": 48000}

Every other line is one change, at a sample index or at a time in seconds::

    {"at_frame": 96000, "values": {"bits": 12}}
    {"at_s": 2.5, "values": {"dither": "rpdf", "gain_db": -3.0}}

``at_s`` is converted to ``round(at_s * samplerate)`` with the render's
sample rate.  Changes are applied in file order; several changes at the same
frame are merged, later ones winning.  A change takes effect at the start of
the frame it names: the renderer splits its blocks there, so the words are
those of a live run that applied the change at a block boundary at that
frame (the kernel's output does not depend on how a signal is split).

The live engine writes the changes it applied with :class:`AutomationWriter`
(``--automation-log FILE``), always as ``at_frame``, so the session can be
rendered again offline, bit for bit, with :func:`load_automation` and
:class:`AutomationPlayer`.
"""

import json
import math

from .. import params
from ..engine.automation import AutomationPlayer, process_with_automation  # noqa: F401  (the player lives with the engine)
from ..errors import RtstageError

FORMAT_VERSION = 1
"""Value of the header's ``rtstage_automation`` key."""


def _parse_line(text, where):
    try:
        obj = json.loads(text)
    except json.JSONDecodeError as exc:
        raise RtstageError(f"{where}: not valid JSON ({exc.msg})") from None
    if not isinstance(obj, dict):
        raise RtstageError(f"{where}: expected a JSON object")
    return obj


def load_automation(path, samplerate=None):
    """Read an automation file.

    Parameters
    ----------
    path : str
        File to read.
    samplerate : int or None
        Sample rate of the render, in Hz: converts ``at_s`` and must agree with
        the header's ``samplerate`` when the file has one.  None: the header's.

    Returns
    -------
    list of (int, dict)
        ``(frame, values)`` in the order they apply (sorted by frame, stable),
        values in canonical form.

    Raises
    ------
    RtstageError
        Unreadable file, malformed line, unknown parameter, bad value or a
        sample rate that disagrees, naming the line.
    """
    try:
        with open(path, encoding="utf-8") as f:
            lines = f.readlines()
    except OSError as exc:
        raise RtstageError(f"cannot read automation file {path}: {exc.strerror}") from None
    except UnicodeDecodeError:
        raise RtstageError(f"automation file {path}: not UTF-8 text") from None
    header_rate = None
    events = []
    first = True
    for lineno, line in enumerate(lines, 1):
        text = line.strip()
        if not text or text.startswith("#"):
            continue
        where = f"automation file {path}, line {lineno}"
        obj = _parse_line(text, where)
        if first and "rtstage_automation" in obj:
            first = False
            if obj["rtstage_automation"] != FORMAT_VERSION:
                raise RtstageError(f"{where}: format version {obj['rtstage_automation']!r} is not {FORMAT_VERSION}")
            header_rate = obj.get("samplerate")
            if header_rate is not None and (isinstance(header_rate, bool) or not isinstance(header_rate, int) or header_rate <= 0):
                raise RtstageError(f"{where}: samplerate must be a positive integer")
            if samplerate is not None and header_rate is not None and header_rate != samplerate:
                raise RtstageError(
                    f"{where}: written at {header_rate} Hz, but the render runs at {samplerate} Hz"
                )
            continue
        first = False
        extra = set(obj) - {"at_frame", "at_s", "values"}
        if extra:
            raise RtstageError(f"{where}: unknown key(s) {', '.join(sorted(extra))}")
        if ("at_frame" in obj) == ("at_s" in obj):
            raise RtstageError(f"{where}: give exactly one of at_frame and at_s")
        if "at_frame" in obj:
            frame = obj["at_frame"]
            if isinstance(frame, bool) or not isinstance(frame, int) or frame < 0:
                raise RtstageError(f"{where}: at_frame must be a non-negative integer")
        else:
            at_s = obj["at_s"]
            if isinstance(at_s, bool) or not isinstance(at_s, (int, float)) or not math.isfinite(at_s) or at_s < 0:
                raise RtstageError(f"{where}: at_s must be a non-negative number of seconds")
            rate = samplerate if samplerate is not None else header_rate
            if rate is None:
                raise RtstageError(f"{where}: at_s needs a sample rate (none in the header or the render)")
            frame = int(round(at_s * rate))
        values = obj.get("values")
        if not isinstance(values, dict) or not values:
            raise RtstageError(f"{where}: values must be a non-empty object")
        try:
            checked = {name: params.validate(name, value) for name, value in values.items()}
        except RtstageError as exc:
            raise RtstageError(f"{where}: {exc}") from None
        events.append((frame, checked))
    events.sort(key=lambda e: e[0])
    return events


class AutomationWriter:
    """Append applied changes to an automation file, one whole line each.

    Parameters
    ----------
    path : str
        File to create (an existing one is replaced when the log is sealed).
    samplerate : int
        Sample rate of the session in Hz, written in the header.
    write_path : str or None
        Write here instead (a temporary file the caller renames into place
        itself).
    stream : rtstage.files.policy.StreamOutput or None
        The stream to write into (from the caller's
        :meth:`~rtstage.files.policy.OutputPlan.stream`); None opens one for
        ``path``.  Ignored with ``write_path``.

    Notes
    -----
    Writing is file I/O: call :meth:`write` from a control or housekeeping
    thread, never from the audio callback.

    The log is a stream of the output policy: while the session lasts it is
    written under a hidden temporary name beside ``path``, and :meth:`close`
    seals it onto ``path``.  Each line is written whole; a write error (a
    full disk, a file-size limit) seals the lines written so far at once,
    with one warning line, and the changes that follow are not logged.
    """

    def __init__(self, path, samplerate, write_path=None, stream=None):
        from ..files.policy import LineStream, open_stream

        self.path = path
        self.samplerate = int(samplerate)
        if write_path is None and stream is None:
            stream = open_stream(path, "automation log")
        try:
            self._lines = LineStream(write_path or stream)
        except OSError as exc:
            if stream is not None:
                stream.discard()
            raise RtstageError(f"cannot write automation log {path}: {exc.strerror}") from None
        if stream is not None:
            stream.finalize = self._lines.close_file
        self._lines.write_line(json.dumps({"rtstage_automation": FORMAT_VERSION, "samplerate": self.samplerate}))

    @property
    def error(self):
        """The OSError that stopped the log, or None."""
        return self._lines.error

    def write(self, frame, values):
        """Record that ``values`` took effect at sample index ``frame``."""
        self._lines.write_line(json.dumps({"at_frame": int(frame), "values": values}, separators=(",", ":")))

    def close(self):
        """Close the file and seal it onto its name."""
        self._lines.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def review_automation(events, settings, total_frames, path, warn):
    """Check timed changes against the whole render before it starts, and count those that do nothing.

    Every change is validated with the settings in force when it applies, so
    a combination the engine refuses (a shaper left without dither, say) is
    refused before any audio work, naming the file and the frame.  A change
    that the settings accept only because ``settings.accept_unsafe`` is set
    is warned about, naming the file and the frame.  Changes at or past the
    input's end and changes that repeat the value already in force are
    counted and reported in one warning line.

    Parameters
    ----------
    events : list of (int, dict)
        From :func:`load_automation`.
    settings : EngineSettings
        The render's settings at frame 0 (resolved).
    total_frames : int
        Frames in the input.
    path : str
        The automation file, for the messages.
    warn : callable
        Called with each warning line.

    Returns
    -------
    dict
        ``{"past_end": n, "repeated": n}``.
    """
    from ..settings import unsafe_warning

    current = settings
    past_end = repeated = 0
    for frame, values in events:
        if frame >= total_frames:
            past_end += 1
            continue
        now = params.values_from_settings(current)
        if all(now.get(k) == v for k, v in values.items()):
            repeated += 1
        nxt = params.settings_with(current, values)
        try:
            nxt = nxt.resolved()
        except RtstageError as exc:
            raise RtstageError(f"automation file {path}, change at frame {frame}: {exc}") from None
        message = unsafe_warning(nxt, f"automation file {path} at frame {frame}")
        if message and nxt.unsafe_risks() != current.unsafe_risks():
            warn(message)
        current = nxt
    if past_end or repeated:
        parts = []
        if past_end:
            parts.append(f"{past_end} change(s) at or past the end of the input ({total_frames} frames) not applied")
        if repeated:
            parts.append(f"{repeated} change(s) repeating the value already in force")
        warn(f"warning: automation file {path}: {'; '.join(parts)}")
    return {"past_end": past_end, "repeated": repeated}
