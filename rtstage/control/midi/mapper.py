"""From decoded messages to parameter changes: soft takeover, relative steps, 14-bit pairs, learn.

Part of :mod:`rtstage.control.midi` (its notes describe the map format and the modes).
"""

from ... import params
from .maps import Control
from .wire import decode_relative


class MidiMapper:
    """Turn decoded MIDI messages into parameter changes.

    Parameters
    ----------
    midi_map : MidiMap
        The controls.

    Notes
    -----
    :meth:`handle` returns actions: ``("set", values, control_key)`` or
    ``("recall", preset_name)``.  Call :meth:`released` for every change
    that did not come from a control, so soft takeover re-arms.
    """

    def __init__(self, midi_map):
        self.map = midi_map
        self._msb = {}
        self._engaged = {}
        self._last_target = {}
        self._learn = None
        self._learn_callback = None

    # learn
    def arm_learn(self, name, callback=None):
        """Bind the next control change that arrives to parameter ``name``."""
        self._learn = name
        self._learn_callback = callback

    def cancel_learn(self):
        """Disarm learn; returns True when it was armed."""
        armed = self._learn is not None
        self._learn = None
        self._learn_callback = None
        return armed

    @property
    def learning(self):
        """The parameter armed for learn, or None."""
        return self._learn

    def released(self, name):
        """Parameter ``name`` changed from elsewhere: its soft-takeover controls wait to cross it again."""
        for control in self.map.controls:
            if control.param == name:
                self._engaged.pop(control.key, None)
                self._last_target.pop(control.key, None)

    def handle(self, message, current):
        """Actions for one decoded message (see :func:`decode_message`) given the ``current`` values."""
        if message is None:
            return []
        if message[0] == "program":
            preset = self.map.programs.get(message[2])
            return [("recall", preset)] if preset is not None else []
        _, channel, cc, value = message
        if self._learn is not None:
            return self._do_learn(channel, cc)
        control = self.map.control_for(channel, cc)
        if control is None:
            return []
        if control.mode == "14bit":
            if cc == control.cc:
                self._msb[control.key] = value
                raw = value << 7
            else:
                msb = self._msb.get(control.key)
                if msb is None:
                    return []
                raw = (msb << 7) | value
            return self._absolute(control, raw, current)
        if control.mode == "absolute":
            return self._absolute(control, value, current)
        cur = current[control.param]
        if control.mode == "toggle":
            if value < 64:
                return []
            return [("set", {control.param: not bool(cur)}, control.key)]
        steps = decode_relative(control.mode, value)
        if steps == 0:
            return []
        new = control.step_by(cur, steps)
        return [("set", {control.param: new}, control.key)] if new != cur else []

    def _absolute(self, control, raw, current):
        target = control.from_position(raw)
        cur = current[control.param]
        key = control.key
        if control.takeover == "soft" and not self._engaged.get(key):
            cur_n = control.number(cur)
            new_n = control.number(target)
            prev = self._last_target.get(key)
            self._last_target[key] = target
            met = new_n == cur_n or raw == control.to_position(cur)  # same value, or the position that shows it
            crossed = met or (prev is not None and (control.number(prev) - cur_n) * (new_n - cur_n) <= 0)
            if not crossed:
                return []
            self._engaged[key] = True
        self._last_target[key] = target
        if target == cur:
            return []
        return [("set", {control.param: target}, key)]

    def _do_learn(self, channel, cc):
        name = self._learn
        callback = self._learn_callback
        self._learn = None
        self._learn_callback = None
        self.map.controls = [c for c in self.map.controls
                             if not (c.channel == channel and (c.cc == cc or c.lsb_cc == cc)) and c.param != name]
        control = Control(name, channel, cc, "toggle" if params.PARAMS[name].kind == "bool" else "absolute")
        self.map.controls.append(control)
        self._engaged.pop(control.key, None)
        self._last_target.pop(control.key, None)
        if callback is not None:
            callback({"event": "learned", "name": name, "channel": channel, "cc": cc, "mode": control.mode})
        return []
