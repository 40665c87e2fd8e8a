"""Value feedback to the controller: which values to send back, and when.

Part of :mod:`rtstage.control.midi` (its notes describe the map format and the modes).
"""

from .wire import cc_message


class FeedbackScheduler:
    """Decide which values to send back to the controller, and when.

    Parameters
    ----------
    midi_map : MidiMap
        The controls (shared with the :class:`MidiMapper`).
    min_interval_s : float
        Least time between two messages to one control (rate limit).
    suppress_s : float
        After a control is moved, nothing is sent to it for this long (the
        hand is on it); then its final value is sent once.

    Notes
    -----
    Values identical to the last one sent to a control are dropped.
    :meth:`on_connect` forgets what was sent and queues every control.
    """

    def __init__(self, midi_map, min_interval_s=0.02, suppress_s=0.3):
        self.map = midi_map
        self.min_interval_s = float(min_interval_s)
        self.suppress_s = float(suppress_s)
        self._pending = {}
        self._last_sent = {}
        self._last_t = {}
        self._suppress_until = {}

    def on_connect(self, values):
        """The output (re)opened: queue every control's current value."""
        self._last_sent.clear()
        for control in self.map.controls:
            if control.param in values:
                self._pending[control.key] = (control, control.to_position(values[control.param]))

    def on_change(self, values, source_key, now_s):
        """Parameters changed; ``source_key`` is the control that moved them (or None)."""
        for control in self.map.controls:
            if control.param not in values:
                continue
            raw = control.to_position(values[control.param])
            if control.key == source_key:
                self._suppress_until[control.key] = now_s + self.suppress_s
            self._pending[control.key] = (control, raw)

    def due(self, now_s):
        """Messages to send now (lists of bytes), in order."""
        out = []
        for key in list(self._pending):
            control, raw = self._pending[key]
            if now_s < self._suppress_until.get(key, -1.0):
                continue
            if self._last_sent.get(key) == raw:
                del self._pending[key]
                continue
            if now_s - self._last_t.get(key, -1e9) < self.min_interval_s:
                continue
            del self._pending[key]
            self._last_sent[key] = raw
            self._last_t[key] = now_s
            if control.mode == "14bit":
                out.append(cc_message(control.channel, control.cc, raw >> 7))
                out.append(cc_message(control.channel, control.lsb_cc, raw & 0x7F))
            elif control.mode.startswith("relative"):
                continue  # an endless encoder shows nothing
            else:
                out.append(cc_message(control.channel, control.cc, raw))
        return out

    def next_due_s(self):
        """True when messages wait (sent by a later :meth:`due`)."""
        return bool(self._pending)
