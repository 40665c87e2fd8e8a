"""The automation segment loop: timed parameter changes applied at exact frames.

A change takes effect at the start of the frame it names: a block is split
there, so the words equal those of a live run that applied the change at a
block boundary at that frame (the kernel's output does not depend on how a
signal is split).  The file format, its reader and the live writer are in
:mod:`rtstage.control.automation`; this is the one loop that plays changes,
used by the renderer and the demo.
"""

import numpy as np

from .. import params


class AutomationPlayer:
    """Hand out timed changes block by block.

    Parameters
    ----------
    events : list of (int, dict)
        As returned by :func:`load_automation`.

    Examples
    --------
    Render a block ``x`` starting at ``engine.frame``::

        for offset, nframes, values in player.segments(engine.frame, len(x)):
            if values:
                engine.apply(params.settings_with(engine.settings, values))
            engine.process(x[offset:offset + nframes], out=y[offset:offset + nframes])

    :func:`process_with_automation` does exactly this.
    """

    def __init__(self, events):
        self.events = sorted(events, key=lambda e: e[0])
        self._next = 0

    @property
    def pending(self):
        """Number of changes not handed out yet."""
        return len(self.events) - self._next

    def segments(self, start_frame, nframes):
        """Split ``nframes`` frames from ``start_frame`` at the frames where changes apply.

        Returns
        -------
        list of (int, int, dict or None)
            ``(offset, nframes, values)``: apply ``values`` (merged changes due
            at that frame, or None), then process the frames.  Changes due
            before ``start_frame`` are applied at the first segment.
        """
        out = []
        offset = 0
        end = start_frame + nframes
        while True:
            due = {}
            while self._next < len(self.events) and self.events[self._next][0] <= start_frame + offset:
                due.update(self.events[self._next][1])
                self._next += 1
            if self._next < len(self.events) and self.events[self._next][0] < end:
                stop = self.events[self._next][0] - start_frame
            else:
                stop = nframes
            if stop > offset or due:
                out.append((offset, stop - offset, due or None))
            offset = stop
            if offset >= nframes:
                return out


def process_with_automation(engine, x, player, out=None, quantizer_in=None):
    """Process one block through ``engine``, applying the player's changes on time.

    Parameters
    ----------
    engine : rtstage.engine.Engine
        Engine positioned at the block's first frame (``engine.frame``).
    x : ndarray, shape (frames, channels)
        Input block.
    player : AutomationPlayer
        Changes to apply.
    out : ndarray or None
        Output array to fill; None allocates one.
    quantizer_in : ndarray or None
        Meter tap (float64, at least as many rows as ``x``) receiving ``x·gain``
        as the quantizer saw it; None: off.

    Returns
    -------
    ndarray
        The output words.

    Notes
    -----
    Only the engine fields (``bits``, ``dither``, ``shaper``, ``gain_db``,
    ``dither_scale``) change the offline engine's words today; the others are
    carried for the live engine's monitor and mute stages.
    """
    x = np.asarray(x)
    if out is None:
        out = np.empty(x.shape, dtype=engine.dtype)
    for offset, nframes, values in player.segments(engine.frame, len(x)):
        if values:
            engine.apply(params.settings_with(engine.settings, values))
        tap = None if quantizer_in is None else quantizer_in[offset : offset + nframes]
        engine.process(x[offset : offset + nframes], out=out[offset : offset + nframes], quantizer_in=tap)
    return out
