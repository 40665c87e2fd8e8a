"""The exception types the command line turns into a one-line message and an exit status."""


class RtstageError(Exception):
    """A user-facing error: bad input, bad settings, a file that cannot be used.

    The command line prints ``rtstage: <message>`` on stderr and exits with
    ``exit_status`` (2: bad input or usage); library callers catch it like any
    exception.
    """

    exit_status = 2


class RuntimeFailure(RtstageError):
    """A failure at run time rather than in the user's input: I/O, a server that cannot be reached (exit status 1)."""

    exit_status = 1
