"""The one logger: a line on stderr, prefixed ``rtstage:``; syslog priorities when stderr is the journal.

Stdout is reserved for data (``rtstage pipe`` writes words there, ``rtstage
send`` replies), so every message, warning and note goes to stderr, one flushed
line each.  Never call it from the audio thread: it is console I/O.

The journal
-----------
When the service manager connects a unit's stderr to the journal it sets
``JOURNAL_STREAM`` to ``<device>:<inode>`` of that stream.  If stderr's
``fstat`` matches, stderr is the journal (and not a terminal or a file that
merely inherited the variable): :func:`use_journal` then routes stderr
through :class:`JournalStream`, which gives every line a ``<N>`` prefix with
its syslog priority (the journal strips it and records the priority), and
sets ``NO_COLOR`` so that no library styles the lines.

Priorities (RFC 5424 numeric severities): 3 error, 4 warning, 6
informational.  The level is read from the text of the line: ``warning:``,
``caution:`` and refusals are 4; a failed stream, a failed retry, ``error:``
and tracebacks are 3; the closing error line of the command line
(:func:`error_line`) is 3; everything else 6.

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


def log(message):
    """One line on stderr (stdout is reserved for data in pipe mode)."""
    print(f"rtstage: {message}", file=sys.stderr, flush=True)


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


def use_journal(environ=None):
    """Route stderr through :class:`JournalStream` when it goes to the journal; returns True when it does.

    Also sets ``NO_COLOR`` so that no library styles the lines.
    """
    env = os.environ if environ is None else environ
    if isinstance(sys.stderr, JournalStream) or not journal_stream_matches(2, env):
        return isinstance(sys.stderr, JournalStream)
    os.environ.setdefault("NO_COLOR", "1")
    sys.stderr = JournalStream(sys.stderr)
    return True
