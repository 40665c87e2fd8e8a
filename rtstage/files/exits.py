"""How every command ends: one line on stderr, a documented exit status, never a traceback.

Exit statuses
-------------
* 0: done (also when the reader of stdout went away: ``rtstage ... | head``);
* 1: a run-time failure: a write that failed (full disk, file-size limit, I/O
  error), a server that cannot be reached, an unexpected internal error;
* 2: bad input or usage: a bad option or value, a file that cannot be used,
  an output the policy refuses;
* 128 + N: interrupted by signal N (130 SIGINT, 143 SIGTERM, 129 SIGHUP),
  with one line saying what was interrupted.

:func:`run_guarded` applies these to a command; :class:`Parser` turns
argparse's usage errors into the same one line; :func:`write_crash_log`
keeps the traceback of an unexpected error in a file under the user's state
folder (``$XDG_STATE_HOME/rtstage``, else ``~/.local/state/rtstage``) and the
one line names that file.
"""

import argparse
import datetime
import os
import select
import sys
import traceback

from ..errors import RtstageError, RuntimeFailure
from .policy import Interrupted, remove_live_temps, seal_open_streams

EXIT_FAILURE = 1
EXIT_USAGE = 2

FORCE_REFUSED = ("--force is no longer accepted: use --overwrite to replace existing outputs, "
                 "--accept-unsafe-shaping to accept settings theory marks unsafe")


class UsageError(RtstageError):
    """A bad command line (exit status 2)."""

    exit_status = EXIT_USAGE


class Parser(argparse.ArgumentParser):
    """An ArgumentParser whose usage errors are one line: ``rtstage: <command>: <message> (see --help)``."""

    def error(self, message):
        command = self.prog.removeprefix("rtstage").strip()  # the error line itself starts "rtstage: "
        raise UsageError(f"{command + ': ' if command else ''}{message} (see '{self.prog} --help')")


class _RefuseForce(argparse.Action):
    def __call__(self, parser, namespace, values, option_string=None):
        raise UsageError(FORCE_REFUSED)


def refuse_force(parser):
    """Make ``--force`` a one-line usage error naming ``--overwrite`` and ``--accept-unsafe-shaping`` (once per parser)."""
    if "--force" not in getattr(parser, "_option_string_actions", {}):
        parser.add_argument("--force", nargs=0, action=_RefuseForce, help=argparse.SUPPRESS)


def add_overwrite_options(parser):
    """Add ``--overwrite`` (replace existing outputs) and the refused ``--force``."""
    parser.add_argument("--overwrite", action="store_true",
                        help="replace existing output files (never an input, never a folder)")
    refuse_force(parser)


def state_folder():
    """The user's state folder for rtstage: ``$XDG_STATE_HOME/rtstage``, else ``~/.local/state/rtstage``."""
    base = os.environ.get("XDG_STATE_HOME") or os.path.join(os.path.expanduser("~"), ".local", "state")
    return os.path.join(base, "rtstage")


def write_crash_log(exc_type, exc, tb, argv=None):
    """Write the traceback of an unexpected error under :func:`state_folder`; returns the path, or None."""
    from .policy import OutputPlan

    folder = state_folder()
    try:
        os.makedirs(folder, exist_ok=True)
    except OSError:
        return None
    stamp = datetime.datetime.now().strftime("%Y%m%d-%H%M%S")
    path = os.path.join(folder, f"crash-{stamp}-{os.getpid()}.log")
    text = "".join([
        f"rtstage internal error, {datetime.datetime.now().isoformat(timespec='seconds')}\n",
        f"command line: {' '.join(argv if argv is not None else sys.argv)}\n\n",
        *traceback.format_exception(exc_type, exc, tb),
    ])
    try:
        plan = OutputPlan("writing the crash log")
        plan.add_file(path, "crash log")
        with plan:
            plan.write_text(path, text)
    except (RtstageError, OSError):
        return None
    return path


def say(message):
    """The one line on stderr: ``rtstage: <message>`` (newlines folded)."""
    from ..log import error_line

    text = " ".join(str(message).split("\n")).strip()
    try:
        print(error_line(text), file=sys.stderr, flush=True)
    except (OSError, ValueError):
        pass


def stdout_closed():
    """True when stdout is a pipe or socket whose reader has gone (poll reports POLLERR/POLLHUP)."""
    try:
        poller = select.poll()
        poller.register(sys.stdout.fileno(), select.POLLOUT)
        return any(ev & (select.POLLERR | select.POLLHUP) for _, ev in poller.poll(0))
    except (OSError, ValueError, AttributeError):
        return False


def silence_stdout():
    """Point stdout at /dev/null so that the interpreter's final flush cannot fail."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):
        pass


def run_guarded(func, argv=None):
    """Run ``func()`` and turn every way it can end into an exit status and at most one line on stderr.

    Temporary output files still registered are removed on every way out;
    streams still open (a live recording whose writer was never closed) are
    sealed into place instead (:func:`rtstage.files.policy.seal_open_streams`).
    """
    try:
        status = int(func() or 0)
        try:
            sys.stdout.flush()
        except BrokenPipeError:
            silence_stdout()
        return status
    except Interrupted as exc:
        say(exc.message())
        return exc.exit_status
    except KeyboardInterrupt:
        say("interrupted by SIGINT; no output was left half-written")
        return 130
    except BrokenPipeError as exc:
        if stdout_closed():
            silence_stdout()
            return 0
        say(f"connection closed by the other end ({exc.strerror})")
        return EXIT_FAILURE
    except RtstageError as exc:
        say(exc)
        return int(getattr(exc, "exit_status", EXIT_USAGE))
    except SystemExit as exc:
        return exc.code if isinstance(exc.code, int) else (0 if exc.code is None else EXIT_USAGE)
    except MemoryError:
        say("out of memory")
        return EXIT_FAILURE
    except OSError as exc:
        where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
        say(f"{where}{exc.strerror or exc}")
        return EXIT_FAILURE
    except Exception:
        path = write_crash_log(*sys.exc_info(), argv=argv)
        exc = sys.exc_info()[1]
        where = f"; the traceback is in {path}" if path else ""
        say(f"internal error ({type(exc).__name__}: {exc}){where}; please report it")
        return EXIT_FAILURE
    finally:
        seal_open_streams()
        remove_live_temps()
