"""The one logger: a line on stderr, prefixed ``rtstage:``.

Stdout is reserved for data (``rtstage pipe`` writes words there, ``rtstage
send`` replies), so every message, warning and note goes to stderr, one flushed
line each.  Never call it from the audio thread: it is console I/O.
"""

import sys


def log(message):
    """One line on stderr (stdout is reserved for data in pipe mode)."""
    print(f"rtstage: {message}", file=sys.stderr, flush=True)
