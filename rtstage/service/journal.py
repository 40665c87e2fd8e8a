"""Log lines for the journal: syslog priority prefixes when stderr is connected to it.

When the service manager connects a unit's stderr to the journal it sets
``JOURNAL_STREAM`` to ``<device>:<inode>`` of that stream.  If stderr's
``fstat`` matches, rtstage's stderr lines are going to the journal (and not
to a terminal or a redirected file that merely inherited the variable), and
each line gets a ``<N>`` prefix with its syslog priority, which the journal
strips and records as the line's priority.  Terminal styling is turned off
(``NO_COLOR``, and the live display prints plain lines: stderr is no
terminal there).

Priorities (RFC 5424 numeric severities): 3 error, 4 warning, 5 notice,
6 informational.  rtstage's lines carry no level of their own yet, so the
level is read from the text: ``warning:`` and ``caution:`` are 4, lines
saying a stream failed or a retry failed are 3, a closing error line
(``rtstage: <reason>`` printed by the command line on failure, see
:func:`error_line`) is 3, everything else 6.

References
----------
.. [1] systemd, "systemd.exec" manual page: ``JOURNAL_STREAM``.
.. [2] systemd, "sd-daemon" manual page (sd-daemon(3)): the ``<N>`` prefixes
   (``SD_ERR`` "<3>", ``SD_WARNING`` "<4>", ``SD_INFO`` "<6>").
.. [3] RFC 5424, The Syslog Protocol, section 6.2.1 (severity values).
"""

import io
import os
import sys
import threading

PRIORITY_ERROR = 3
PRIORITY_WARNING = 4
PRIORITY_NOTICE = 5
PRIORITY_INFO = 6

_ERROR_MARKS = ("audio stream failed", ": retry ", "error:", "failed:", "traceback")
_WARNING_MARKS = ("warning:", "caution:", "refused")


def journal_stream_matches(fd=2, environ=None):
    """True when ``JOURNAL_STREAM`` names the stream open on ``fd`` (``device:inode``)."""
    env = os.environ if environ is None else environ
    value = env.get("JOURNAL_STREAM", "")
    try:
        dev_text, ino_text = value.split(":", 1)
        dev, ino = int(dev_text), int(ino_text)
        st = os.fstat(fd)
    except (ValueError, OSError):
        return False
    return st.st_dev == dev and st.st_ino == ino


def priority_of(line):
    """Syslog priority of one log line (see the module notes)."""
    low = line.lower()
    if any(mark in low for mark in _ERROR_MARKS):
        return PRIORITY_ERROR
    if any(mark in low for mark in _WARNING_MARKS):
        return PRIORITY_WARNING
    return PRIORITY_INFO


def format_line(line, priority=None):
    """``<N>line`` (the priority from :func:`priority_of` unless given); a line already prefixed stays as it is."""
    if len(line) >= 3 and line[0] == "<" and line[1].isdigit() and line[2] == ">":
        return line
    return f"<{priority_of(line) if priority is None else int(priority)}>{line}"


def error_line(message):
    """The closing error line, with the error priority when stderr goes to the journal."""
    line = f"rtstage: {message}"
    return format_line(line, PRIORITY_ERROR) if isinstance(sys.stderr, JournalStream) else line


class JournalStream(io.TextIOBase):
    """A text stream that prefixes every line written through it with its priority.

    Parameters
    ----------
    raw : text stream
        The real stderr.

    Notes
    -----
    Partial lines are held until their newline (or :meth:`flush`), so the
    prefix is always at the start of a line; one lock keeps lines from
    different threads whole.
    """

    def __init__(self, raw):
        self.raw = raw
        self._pending = ""
        self._lock = threading.Lock()

    def writable(self):
        return True

    def isatty(self):
        return False

    def fileno(self):
        return self.raw.fileno()

    @property
    def encoding(self):
        return getattr(self.raw, "encoding", "utf-8")

    def write(self, text):
        with self._lock:
            data = self._pending + text
            lines = data.split("\n")
            self._pending = lines.pop()
            if lines:
                self.raw.write("".join(format_line(line) + "\n" for line in lines))
        return len(text)

    def flush(self):
        with self._lock:
            if self._pending:
                self.raw.write(format_line(self._pending) + "\n")
                self._pending = ""
            self.raw.flush()


def install(environ=None):
    """Route stderr through :class:`JournalStream` when it goes to the journal; returns True when it does.

    Also sets ``NO_COLOR`` so that no library styles the lines.
    """
    env = os.environ if environ is None else environ
    if isinstance(sys.stderr, JournalStream) or not journal_stream_matches(2, env):
        return isinstance(sys.stderr, JournalStream)
    os.environ.setdefault("NO_COLOR", "1")
    sys.stderr = JournalStream(sys.stderr)
    return True
