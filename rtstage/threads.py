"""The one helper for rtstage's housekeeping threads: a named daemon thread with a stop flag.

Every thread beside the audio path (tap writer, meter thread, display,
MIDI runtime, live control target) has the same life: start once, loop until
asked to stop (waking early when asked), then be joined.  :class:`StoppableThread`
holds that, so each owner writes only its loop::

    self._worker = StoppableThread(self._run, "rtstage-tap")
    ...
    def _run(self):
        while not self._worker.wait(POLL_S):
            self._drain()

None of this ever runs on the audio thread; the callback never waits for
any of these threads.
"""

import threading


class Startable:
    """Mixin for an owner of a thread with ``start()`` (returning self) and ``stop()``: a context manager."""

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()


class StoppableThread:
    """A daemon thread running ``target()`` with a stop event.

    Parameters
    ----------
    target : callable
        The loop; it should return soon after :meth:`stopping` turns true
        (poll it, or sleep in :meth:`wait`).
    name : str
        Thread name (``rtstage-...``), as shown by debuggers and ``ps -L``.
    """

    def __init__(self, target, name):
        self._stop = threading.Event()
        self._thread = threading.Thread(target=target, name=name, daemon=True)

    def start(self):
        """Start the thread (once); returns self."""
        self._thread.start()
        return self

    def stop(self, timeout_s=None):
        """Ask the loop to end and wait for it (when it was started)."""
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(timeout_s)

    def join(self, timeout_s=None):
        """Wait (at most ``timeout_s``) for the loop to end by itself."""
        if self._thread.is_alive():
            self._thread.join(timeout_s)

    def request_stop(self):
        """Ask the loop to end without waiting."""
        self._stop.set()

    def wait(self, timeout_s):
        """Sleep up to ``timeout_s`` seconds, ending early when stopped; True once stopping."""
        return self._stop.wait(timeout_s)

    @property
    def stopping(self):
        """True once a stop was asked."""
        return self._stop.is_set()

    @property
    def alive(self):
        """True while the thread runs."""
        return self._thread.is_alive()

    @property
    def started(self):
        """True once :meth:`start` ran."""
        return self._thread.ident is not None
