"""The service manager notification protocol (sd_notify), written out by hand.

A unit with ``Type=notify`` gives the process a datagram socket in
``$NOTIFY_SOCKET``; the process sends newline-separated ``KEY=VALUE``
assignments to it, one datagram per message.  No library is needed: an
``AF_UNIX`` / ``SOCK_DGRAM`` socket and ``sendto``.  A socket name starting
with ``@`` lives in Linux' abstract namespace (the ``@`` stands for a leading
NUL byte).

What rtstage sends
------------------
``READY=1``
    Once the stream runs *and* its first blocks have gone out (the
    callback's frame counter is above zero), never before: a supervisor
    that starts the next unit on READY then finds audio flowing.
``STATUS=...``
    One line (state, sample index, flagged callbacks, CPU load, restarts),
    kept current about once a second.
``WATCHDOG=1``
    Every ``WATCHDOG_USEC / 2`` (common practice, as the manual page
    recommends), but only when the callback's frame counter advanced since the
    previous ping.  A wedged stream, a stopped audio server or a hung worker
    therefore stop the pings, and the manager restarts the unit after
    ``WatchdogSec=``.  ``WATCHDOG_PID``, when set, must be our process id,
    else the watchdog is not ours and no ping is sent.
``RELOADING=1`` with ``MONOTONIC_USEC=``
    When a SIGHUP re-read of the feed file begins; systemd 253 and later
    (``Type=notify-reload``) expect the CLOCK_MONOTONIC time stamp in the
    same message.  ``READY=1`` follows when the re-read is done.
``STOPPING=1``
    When a stop was asked for (SIGTERM, SIGINT, end of the source).

Without ``$NOTIFY_SOCKET`` every call does nothing, so the same code runs by
hand and under the manager.

References
----------
.. [1] systemd, "sd_notify" manual page (sd_notify(3)), the protocol's
   description: assignments, abstract socket names, WATCHDOG_USEC and
   WATCHDOG_PID, RELOADING and MONOTONIC_USEC.
.. [2] systemd, "systemd.service" manual page (systemd.service(5)):
   ``Type=notify``, ``Type=notify-reload``, ``WatchdogSec=``.
"""

import os
import socket
import threading
import time

from ..log import log


def notify_address(value):
    """The ``sendto`` address for a ``$NOTIFY_SOCKET`` value, or None when unusable.

    Parameters
    ----------
    value : str or None
        The environment value: a path (``/run/...``) or an abstract name
        (``@name``).

    Returns
    -------
    str or bytes or None
        A path string, bytes starting with NUL for the abstract namespace, or
        None (unset, empty, or neither form).
    """
    if not value:
        return None
    if value.startswith("@"):
        return b"\0" + value[1:].encode("utf-8")
    if value.startswith("/"):
        return value
    return None


def watchdog_interval_s(environ=None, pid=None):
    """The ping interval (half of ``WATCHDOG_USEC``) when the watchdog is ours, else None.

    Parameters
    ----------
    environ : mapping or None
        Environment (default ``os.environ``).
    pid : int or None
        Our process id (default ``os.getpid()``).
    """
    env = os.environ if environ is None else environ
    try:
        usec = int(env.get("WATCHDOG_USEC", ""))
    except ValueError:
        return None
    if usec <= 0:
        return None
    wd_pid = env.get("WATCHDOG_PID")
    if wd_pid:
        try:
            if int(wd_pid) != (os.getpid() if pid is None else pid):
                return None
        except ValueError:
            return None
    return usec / 2e6


def monotonic_usec():
    """CLOCK_MONOTONIC in microseconds (for ``MONOTONIC_USEC=``)."""
    return time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000


class Notifier:
    """Sends notifications to the service manager (nothing when there is none).

    Parameters
    ----------
    environ : mapping or None
        Environment to read ``NOTIFY_SOCKET`` from (default ``os.environ``).

    Notes
    -----
    Thread-safe: one lock around ``sendto``.  A failed send is said once on
    stderr and never raised: losing a notification must not stop the audio.
    """

    def __init__(self, environ=None):
        env = os.environ if environ is None else environ
        self.address = notify_address(env.get("NOTIFY_SOCKET"))
        self._sock = None
        self._lock = threading.RLock()  # re-entrant: a signal handler on the main thread may send too
        self._failed = False
        self.sent = 0
        if self.address is not None:
            self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
            self._sock.setblocking(False)

    @property
    def enabled(self):
        """True when a notification socket is configured."""
        return self._sock is not None

    def send(self, *assignments):
        """Send ``KEY=VALUE`` assignments in one datagram; returns True when sent."""
        if self._sock is None or not assignments:
            return False
        data = "\n".join(assignments).encode("utf-8")
        with self._lock:
            try:
                self._sock.sendto(data, self.address)
            except OSError as exc:
                if not self._failed:
                    self._failed = True
                    log(f"warning: cannot notify the service manager: {exc.strerror or exc}")
                return False
            self.sent += 1
        return True

    def ready(self, status=None):
        """``READY=1`` (with a status line)."""
        return self.send("READY=1", *([f"STATUS={_one_line(status)}"] if status else []))

    def status(self, text):
        """``STATUS=`` one line."""
        return self.send(f"STATUS={_one_line(text)}")

    def watchdog(self):
        """``WATCHDOG=1``."""
        return self.send("WATCHDOG=1")

    def reloading(self):
        """``RELOADING=1`` with ``MONOTONIC_USEC=``."""
        return self.send("RELOADING=1", f"MONOTONIC_USEC={monotonic_usec()}")

    def stopping(self, status=None):
        """``STOPPING=1`` (with a status line)."""
        return self.send("STOPPING=1", *([f"STATUS={_one_line(status)}"] if status else []))

    def close(self):
        """Close the socket."""
        with self._lock:
            if self._sock is not None:
                self._sock.close()
                self._sock = None


def _one_line(text):
    return " ".join(str(text).split())


class ServiceHeartbeat:
    """Thread that sends READY, STATUS and the watchdog pings for a running engine.

    Parameters
    ----------
    notifier : Notifier
        Where notifications go.
    progress : callable
        ``progress() -> int``: the callback's frame counter (frames sent to
        the device since the start, all stream restarts included).
    running : callable
        ``running() -> bool``: the stream is open and the engine supervises it.
    status_line : callable
        ``status_line() -> str``: the one-line summary for ``STATUS=``.
    watchdog_s : float or None
        Ping interval (:func:`watchdog_interval_s`); None: no watchdog.
    status_interval_s : float
        How often ``STATUS=`` is refreshed.

    Notes
    -----
    ``READY=1`` is sent the first time ``running()`` is true and the frame
    counter is above zero.  A ping is sent only when the counter changed
    since the last check, so a stopped stream stops the pings; once the
    counter moves again the pings resume.  ``pings`` and ``missed`` count
    the intervals with and without progress (for status and metrics).
    """

    def __init__(self, notifier, progress, running, status_line, watchdog_s=None, status_interval_s=1.0):
        self.notifier = notifier
        self.progress = progress
        self.running = running
        self.status_line = status_line
        self.watchdog_s = watchdog_s
        self.status_interval_s = float(status_interval_s)
        self.ready_sent = False
        self.pings = 0
        self.missed = 0
        self._last_frames = None
        self._paused = threading.Event()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="rtstage-notify", daemon=True)

    def start(self):
        """Start the thread; returns self."""
        self._thread.start()
        return self

    def stop(self):
        """Stop the thread (no more pings)."""
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join()

    def pause(self):
        """Hold READY/STATUS/pings (while a reload is announced)."""
        self._paused.set()

    def resume(self):
        """Undo :meth:`pause`."""
        self._paused.clear()

    def _tick_s(self):
        ticks = [0.05 if not self.ready_sent else self.status_interval_s]
        if self.watchdog_s is not None:
            ticks.append(self.watchdog_s)
        return min(ticks)

    def _run(self):
        next_status = 0.0
        next_ping = 0.0
        while not self._stop.wait(self._tick_s() if self.ready_sent else 0.05):
            if self._paused.is_set():
                continue
            now = time.monotonic()
            try:
                frames = int(self.progress())
                running = bool(self.running())
            except Exception:  # the engine went away under us; stop quietly
                continue
            if not self.ready_sent:
                if running and frames > 0:
                    self.ready_sent = True
                    self._last_frames = frames
                    self.notifier.ready(self.status_line())
                    next_status = now + self.status_interval_s
                    next_ping = now  # first ping at once: progress was just seen
                    if self.watchdog_s is not None:
                        self.notifier.watchdog()
                        self.pings += 1
                        next_ping = now + self.watchdog_s
                continue
            if self.watchdog_s is not None and now >= next_ping - 1e-3:
                next_ping = now + self.watchdog_s
                if frames != self._last_frames:
                    self._last_frames = frames
                    self.notifier.watchdog()
                    self.pings += 1
                else:
                    self.missed += 1
            if now >= next_status - 1e-3:
                next_status = now + self.status_interval_s
                self.notifier.status(self.status_line())
