"""The one exception type the command line turns into a one-line message."""


class RtstageError(Exception):
    """A user-facing error: bad input, bad settings, a file that cannot be used.

    The command line prints ``rtstage: <message>`` on stderr and exits with
    status 2; library callers catch it like any exception.
    """
