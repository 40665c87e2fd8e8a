"""The terminal meter display of ``rtstage run`` and ``rtstage watch``.

:class:`LiveDisplay` reads a meter snapshot (a dict as returned by
:meth:`rtstage.live.supervisor.LiveEngine.meters`, or the smaller frame every
control target's ``meters()`` gives) from a callable or an object with a
``meters()`` method, and shows it on stderr (stdout stays for data):

* stderr is a terminal: a ``rich`` live panel redrawn ``refresh_hz`` times a
  second (10 by default), one row per channel with a level bar drawn in
  characters (``=`` up to the RMS level, ``+`` up to the peak, ``.`` empty,
  ``!`` at the right end once that channel has clipped) and the figures
  beside it, so it reads the same without colour;
* stderr is not a terminal (CI, pipes): one compact status line per second;
* ``quiet``: nothing.

:func:`render_text` and :func:`status_line` are the two layouts as plain
functions of a snapshot, for tests and for other front ends.

Hearing safety: the display only reads levels.  When listening to the added
error with make-up gain, or to full-scale test tones, turn the monitor level
down first and follow local codes and licensed practice on exposure.
"""

import math
import sys
import time

from ..meters.loudness import loudness_line, verdict_text
from ..threads import Startable, StoppableThread

BAR_WIDTH = 40
"""Characters of a level bar."""
BAR_FLOOR_DBFS = -80.0
"""Level at the bar's left end; the right end is 0 dBFS."""
STATUS_LINE_S = 1.0
"""Seconds between status lines without a terminal."""


def _fmt(value, width=6, digits=1):
    """A number right-aligned, or ``--`` for None."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "--".rjust(width)
    return f"{value:{width}.{digits}f}"


def level_bar(rms_dbfs, peak_dbfs, clipped=False, width=BAR_WIDTH, floor_dbfs=BAR_FLOOR_DBFS):
    """A level bar in characters: ``=`` to the RMS level, ``+`` on to the peak, ``.`` beyond.

    Parameters
    ----------
    rms_dbfs, peak_dbfs : float or None
        Levels in dBFS (None: silence).
    clipped : bool
        Mark the right end with ``!``.
    width : int
        Characters inside the brackets.
    floor_dbfs : float
        Level of the left end (the right end is 0 dBFS).

    Returns
    -------
    str
        ``[`` + ``width`` characters + ``]``.
    """

    def cells(level):
        if level is None:
            return 0
        frac = (min(level, 0.0) - floor_dbfs) / -floor_dbfs
        return max(0, min(width, int(round(frac * width))))

    n_rms = cells(rms_dbfs)
    n_peak = max(cells(peak_dbfs), n_rms)
    chars = ["="] * n_rms + ["+"] * (n_peak - n_rms) + ["."] * (width - n_peak)
    if clipped:
        chars[-1] = "!"
    return "[" + "".join(chars) + "]"


def _channel_name(c, nch):
    if nch == 2:
        return "LR"[c]
    return str(c + 1)


def _noise(ch, key):
    return (ch.get("added_noise_dbfs") or {}).get(key)


def _diff(ch, key):
    return (ch.get("noise_difference_db") or {}).get(key)


def render_text(snap, width=BAR_WIDTH):
    """The terminal layout of one snapshot as plain text (no colour codes).

    Parameters
    ----------
    snap : dict or None
        A meter snapshot.
    width : int
        Width of the level bars.

    Returns
    -------
    str
        Several lines: a heading with the stream and engine health, then two
        lines per channel (levels; noise, modulation, counts, bits).
    """
    if not snap:
        return "rtstage meters: waiting for the first snapshot"
    peaks = snap.get("peak_dbfs") or []
    nch = len(peaks)
    channels = snap.get("channels") or [{} for _ in range(nch)]
    clipped = snap.get("clipped") or [0] * nch
    rate = snap.get("samplerate")
    frame = snap.get("frame", 0)
    head = [f"rtstage meters  sample {frame}"]
    if rate:
        head.append(f"t {frame / rate:8.1f} s")
    if snap.get("bits"):
        head.append(f"{snap['bits']}-bit {snap.get('dither', '?')}, shaper {snap.get('shaper') or 'custom'}")
    if "cpu_load" in snap:
        head.append(f"cpu {100.0 * (snap.get('cpu_load') or 0.0):4.1f} %")
    if "xruns" in snap:
        head.append(f"xruns {snap.get('xruns')}")
    if "meter_dropped_frames" in snap:
        head.append(f"meter drops {snap.get('meter_dropped_frames')}")
    lines = ["  ".join(head)]
    scale = f"{int(BAR_FLOOR_DBFS)} dBFS".ljust(width // 2) + "0 dBFS".rjust(width - width // 2)
    lines.append(f"     {scale}     rms   peak  in-pk  out-TP")
    for c in range(nch):
        ch = channels[c] if c < len(channels) else {}
        rms = (snap.get("rms_dbfs") or [None] * nch)[c]
        bar = level_bar(rms, peaks[c], bool(clipped[c]) if c < len(clipped) else False, width)
        muted = c < len(snap.get("auto_muted") or []) and snap["auto_muted"][c]
        lines.append(f"{_channel_name(c, nch):>3}  {bar} {_fmt(rms)} {_fmt(peaks[c])} "
                     f"{_fmt(ch.get('input_sample_peak_dbfs'))} {_fmt(ch.get('true_peak_dbtp'))}"
                     + ("  MUTED (digital silence)" if muted else ""))
        if ch:
            lines.append(
                f"     noise dBFS unw {_fmt(_noise(ch, 'unweighted'))} A {_fmt(_noise(ch, 'a_weighted'))} "
                f"468 {_fmt(_noise(ch, 'itu468'))}  vs theory {_fmt(_diff(ch, 'unweighted'), 5)} dB  "
                f"mod {_fmt(ch.get('noise_modulation_db'), 5)} dB  clip {ch.get('clipped_samples', clipped[c])}  "
                f"repl {ch.get('nonfinite_samples', 0)}  bits {ch.get('active_bits', '-')} "
                f"{ch.get('bit_pattern', '')}")
        else:
            lines.append(f"     clip {clipped[c] if c < len(clipped) else 0}")
    if snap.get("loudness"):
        lines.append("     " + loudness_line(snap["loudness"]))
    return "\n".join(lines)


def status_line(snap):
    """One compact line for a log (no terminal): time, per-channel peak / A-weighted noise / noise modulation / clips, health."""
    if not snap:
        return "rtstage: meters: waiting"
    peaks = snap.get("peak_dbfs") or []
    nch = len(peaks)
    channels = snap.get("channels") or []
    clipped = snap.get("clipped") or [0] * nch
    rate = snap.get("samplerate")
    frame = snap.get("frame", 0)
    parts = [f"t={frame / rate:.1f}s" if rate else f"sample={frame}"]
    for c in range(nch):
        ch = channels[c] if c < len(channels) else {}
        text = f"{_channel_name(c, nch)} pk {_fmt(peaks[c], 0)}"
        if ch:
            text += f" nA {_fmt(_noise(ch, 'a_weighted'), 0)} mod {_fmt(ch.get('noise_modulation_db'), 0)}"
        text += f" clip {clipped[c] if c < len(clipped) else 0}"
        if c < len(snap.get("auto_muted") or []) and snap["auto_muted"][c]:
            text += " MUTED(silence)"
        parts.append(text)
    loud = snap.get("loudness")
    if loud:
        i = loud.get("integrated_lufs")
        parts.append(f"I {'-' if i is None else f'{i:.1f}'} LUFS" + (f" {verdict_text(loud['target'])}" if loud.get("target") else ""))
    if "cpu_load" in snap:
        parts.append(f"cpu {100.0 * (snap.get('cpu_load') or 0.0):.1f}%")
    if "xruns" in snap:
        parts.append(f"xruns {snap.get('xruns')}")
    return "rtstage: meters " + " | ".join(parts)


class LiveDisplay(Startable):
    """Show meter snapshots on stderr until stopped (see the module notes).

    Parameters
    ----------
    engine_or_source : object with ``meters()``, or callable
        Where snapshots come from; called from the display's own thread.
    refresh_hz : float
        Redraws per second on a terminal (at least 10 is the goal).
    quiet : bool
        Show nothing.
    stream : file or None
        Where to draw; default ``sys.stderr``.
    terminal : bool or None
        Force the terminal (True) or line (False) layout; None: ``stream.isatty()``.

    Examples
    --------
    >>> display = LiveDisplay(engine, refresh_hz=10).start()   # doctest: +SKIP
    >>> engine.run()                                            # doctest: +SKIP
    >>> display.stop()                                          # doctest: +SKIP
    """

    def __init__(self, engine_or_source, refresh_hz=10.0, quiet=False, stream=None, terminal=None):
        get = getattr(engine_or_source, "meters", None)
        self._get = get if callable(get) else engine_or_source
        self.refresh_hz = float(refresh_hz)
        self.quiet = bool(quiet)
        self.stream = stream if stream is not None else sys.stderr
        if terminal is None:
            isatty = getattr(self.stream, "isatty", None)
            terminal = bool(isatty()) if callable(isatty) else False
        self.terminal = terminal
        self.frames_drawn = 0
        self._worker = StoppableThread(self._run, "rtstage-display")

    def start(self):
        """Start drawing (does nothing with ``quiet``)."""
        if not self.quiet:
            self._worker.start()
        return self

    def stop(self):
        """Stop drawing; the terminal keeps the last panel."""
        self._worker.stop()

    def _snapshot(self):
        try:
            return self._get()
        except Exception as exc:  # a display never takes the engine down
            return {"error": str(exc)}

    def _run(self):
        if self.terminal:
            self._run_terminal()
        else:
            self._run_lines()

    def _run_terminal(self):
        from rich.console import Console
        from rich.live import Live
        from rich.text import Text

        console = Console(file=self.stream, highlight=False)
        period_s = 1.0 / self.refresh_hz
        with Live(Text(render_text(None)), console=console, auto_refresh=False, transient=False) as live:
            while True:
                live.update(Text(render_text(self._snapshot())), refresh=True)
                self.frames_drawn += 1
                if self._worker.wait(period_s):
                    break

    def _run_lines(self):
        next_t = time.monotonic() + STATUS_LINE_S
        while not self._worker.wait(max(0.0, next_t - time.monotonic())):
            next_t += STATUS_LINE_S
            print(status_line(self._snapshot()), file=self.stream, flush=True)
            self.frames_drawn += 1


def run_display(get_frame, stop_event, refresh_hz=10.0, quiet=False):
    """Show snapshots from ``get_frame()`` until ``stop_event`` is set (blocking form of :class:`LiveDisplay`)."""
    display = LiveDisplay(get_frame, refresh_hz=refresh_hz, quiet=quiet).start()
    try:
        stop_event.wait()
    finally:
        display.stop()
