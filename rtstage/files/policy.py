"""The one output policy: every file any rtstage command writes goes through here.

A command declares what it reads and what it will write in an
:class:`OutputPlan`, checks the plan once before any audio work, and writes
each output through :meth:`OutputPlan.atomic` (a path to write) or
:meth:`OutputPlan.open` (a file object)::

    plan = OutputPlan("rendering in.wav", inputs=["in.wav"], overwrite=args.overwrite)
    wav = plan.add_file("out.wav", "output")
    rep = plan.add_file("out.json", "--report")
    plan.check()                       # everything refused here, nothing written yet
    with plan.atomic(wav) as tmp:      # write tmp (fsync'd on success)
        ...
    plan.commit()                      # every written output renamed into place

or ``with plan: ...``, which checks on entry, commits on a normal exit and
removes everything on any other.

The rules, in the order :meth:`OutputPlan.check` applies them:

* an output that is, or resolves to (symbolic links, ``..``, a hard link to
  the same inode), a file the command reads, or another output of the same
  command, is refused;
* an output that is an existing folder is refused, and said so plainly; an
  existing file is refused unless ``overwrite`` is set;
* every output's folder must exist and be writable, checked by creating the
  temporary file the output will be written into (so a read-only file system,
  a missing folder or a full inode table fail before any audio work); when the
  size of an output is known, free space and the file-size limit are checked
  too.

Writing is atomic: a temporary file in the output's own folder, flushed and
fsync'd, renamed onto the final name, then the folder fsync'd.  Temporary
files are registered while they exist; :func:`install_signal_handlers` makes
SIGINT, SIGTERM and SIGHUP remove them and raise :class:`Interrupted`, and
SIGXFSZ is ignored so a file-size limit (``ulimit -f``) becomes an ``EFBIG``
error that is cleaned up like a full disk (``ENOSPC``).  Files get the mode
the umask gives to ordinary files (0666 & ~umask), like any program's output.

Exit statuses (the command line's ``main`` reads ``exit_status``): 2 for a
refused output (usage), 1 for a failed write (I/O), 128 + signal number for
an interruption (130 SIGINT, 143 SIGTERM, 129 SIGHUP).

Streams
-------
A file written while a live run lasts (the tap, its segments, the
automation log) is a :class:`StreamOutput`, from :meth:`OutputPlan.stream`
(an output the plan declared and checked) or :func:`open_stream` (a file the
run names as it goes, such as the next segment)::

    stream = plan.stream(tap)          # the temporary file to write: stream.tmp
    ...                                # the run writes stream.tmp for as long as it lasts
    stream.seal()                      # fsync, rename onto the final name, fsync the folder

The final name appears only when the stream is sealed, whole.  A recording
of live audio cannot be made again, so a stream is never removed the way
the temporary file of a render is: it is not registered for removal, and on
every way out the part already written is sealed into place.  The writer
seals it when the run stops (SIGINT and SIGTERM stop a live run normally;
a signal that interrupts a command, :class:`Interrupted`, leaves a stream
to be sealed like any exception); a write error (a full disk, ``ENOSPC``; a
file-size limit, ``EFBIG``) makes the writer seal what it has at once, with
one warning line saying the file was cut short; a command that ends with a
stream its writer never closed (an exception) gets it sealed by
:func:`seal_open_streams`, which the command line's ``run_guarded`` calls on
every way out (after the writer's ``finalize`` closed it: a sound file's
header is finalized by closing it), again with one warning line.  Only a
stream that never received a byte is removed instead.  Files that belong to
a stream and are written whole when it ends (a segment's sidecar) go
through :func:`write_whole_file`: whole or not at all.
"""

import contextlib
import errno
import os
import signal
import stat
import tempfile
import threading

from ..errors import RtstageError, RuntimeFailure
from ..log import log

__all__ = [
    "OutputPlan",
    "OutputRefused",
    "WriteFailed",
    "Interrupted",
    "install_signal_handlers",
    "deferred_signals",
    "check_interrupted",
    "remove_live_temps",
    "set_activity",
    "file_mode",
    "io_error",
    "write_failure",
    "failure_reason",
    "StreamOutput",
    "LineStream",
    "open_stream",
    "seal_open_streams",
    "write_whole_file",
]

TEMP_PREFIX = ".rtstage-"
"""Prefix of every temporary file (hidden, in the output's own folder)."""


class OutputRefused(RtstageError):
    """An output the policy refuses before anything is written (exit status 2)."""

    exit_status = 2


class WriteFailed(RuntimeFailure):
    """Writing an output failed (full disk, file-size limit, I/O error); nothing was left behind (exit status 1)."""

    exit_status = 1


class Interrupted(KeyboardInterrupt):
    """SIGINT, SIGTERM or SIGHUP arrived; temporary files are already removed.

    A subclass of KeyboardInterrupt so that code which stops cleanly on
    Ctrl-C stops the same way on the other two.
    """

    def __init__(self, signum):
        super().__init__(signum)
        self.signum = int(signum)
        self.exit_status = 128 + self.signum

    def message(self):
        """One line: which signal, and what was interrupted."""
        name = signal.Signals(self.signum).name
        return f"interrupted by {name} while {_activity[0]}; no output was left half-written"


_live = {}
_live_lock = threading.Lock()
_activity = ["starting"]


def set_activity(text):
    """Say what the command is doing (for the one line printed when a signal interrupts it)."""
    _activity[0] = str(text)


def _register(tmp_path, final_path):
    with _live_lock:
        _live[tmp_path] = final_path


def _forget(tmp_path):
    with _live_lock:
        _live.pop(tmp_path, None)


def remove_live_temps():
    """Remove every temporary file still registered; returns how many were removed."""
    with _live_lock:
        paths = list(_live)
        _live.clear()
    removed = 0
    for path in paths:
        try:
            os.unlink(path)
            removed += 1
        except OSError:
            pass
    return removed


_signalled = []
_defer_depth = [0]
_raised = []

GIVE_UP_S = 5.0
"""How long a deferred interruption may wait for a safe point before the process leaves anyway."""


def _give_up(signum):
    if _raised:
        return
    try:
        import sys

        print(f"rtstage: {Interrupted(signum).message()}", file=sys.stderr, flush=True)
    finally:
        os._exit(128 + int(signum))


def _on_signal(signum, frame):
    remove_live_temps()
    if _signalled:
        # A second signal while the first is being handled: leave at once, nothing half-written remains.
        os._exit(128 + int(signum))
    _signalled.append(signum)
    if _defer_depth[0] == 0:
        _raised.append(signum)
        raise Interrupted(signum)
    timer = threading.Timer(GIVE_UP_S, _give_up, args=(signum,))
    timer.daemon = True
    timer.start()


def check_interrupted():
    """Raise :class:`Interrupted` if a signal arrived while signals were deferred (call at safe points)."""
    if _signalled and not _raised:
        _raised.append(_signalled[0])
        raise Interrupted(_signalled[0])


@contextlib.contextmanager
def deferred_signals():
    """Inside, a signal does not raise at once (it could land inside a lock of a queue shared with
    worker threads); it removes the temporary files, and :func:`check_interrupted`, called at safe
    points, raises it.  If no safe point comes within :data:`GIVE_UP_S`, the process says so and leaves."""
    _defer_depth[0] += 1
    try:
        yield
    finally:
        _defer_depth[0] -= 1
    check_interrupted()


def install_signal_handlers():
    """SIGINT/SIGTERM/SIGHUP remove temporary files and raise :class:`Interrupted`; SIGXFSZ is ignored.

    Call once from the main thread, before any output is written.  With
    SIGXFSZ ignored, exceeding RLIMIT_FSIZE makes ``write`` fail with EFBIG
    instead of killing the process, so the temporary file is removed.
    """
    for sig in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):
        signal.signal(sig, _on_signal)
    if hasattr(signal, "SIGXFSZ"):
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)


def _read_umask():
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def file_mode():
    """The mode an ordinary new file gets under the current umask (0666 & ~umask)."""
    return 0o666 & ~_read_umask()


def _os_reason(exc):
    """Plain words for the reason of an OSError (full disk and size limit said plainly)."""
    code = getattr(exc, "errno", None)
    if code == errno.ENOSPC:
        return "no space left on the device"
    if code == errno.EFBIG:
        return "file too large (file-size limit reached)"
    if code == errno.EDQUOT:
        return "disk quota exceeded"
    return getattr(exc, "strerror", None) or str(exc)


def io_error(path, exc, what="write"):
    """A :class:`WriteFailed` naming the path and the reason of an OSError (full disk and size limit said plainly)."""
    return WriteFailed(f"cannot {what} {path}: {_os_reason(exc)}; nothing was written")


def _library_reason(path, tmp):
    """The reason behind a library's bare error code while writing ``tmp``, from the file system, or None."""
    import resource

    folder = os.path.dirname(os.path.abspath(tmp or path))
    try:
        size = os.path.getsize(tmp) if tmp else 0
    except OSError:
        size = 0
    soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
    if soft != resource.RLIM_INFINITY and size >= soft - 65536:
        return _os_reason(OSError(errno.EFBIG, "File too large"))
    try:
        st = os.statvfs(folder)
        if st.f_bavail * st.f_frsize < 1 << 20:
            return _os_reason(OSError(errno.ENOSPC, "No space left on device"))
    except OSError:
        pass
    return None


def failure_reason(path, tmp, exc):
    """Plain words for why writing ``tmp`` (destined for ``path``) failed: from errno, or from the file system
    for a library's bare error code (see :func:`write_failure`)."""
    if isinstance(exc, OSError) and exc.errno is not None:
        return _os_reason(exc)
    return _library_reason(path, tmp) or str(exc).strip() or type(exc).__name__


def write_failure(path, tmp, exc):
    """A :class:`WriteFailed` for an error a library raised while writing ``tmp`` (destined for ``path``).

    libsndfile reports a full disk or a file-size limit as a bare error code;
    the reason is recovered from the file system: free space in the folder,
    and the temporary file's size against RLIMIT_FSIZE.
    """
    if isinstance(exc, OSError) and exc.errno is not None:
        return io_error(path, exc)
    reason = _library_reason(path, tmp)
    if reason is not None:
        return WriteFailed(f"cannot write {path}: {reason}; nothing was written")
    detail = str(exc).strip() or type(exc).__name__
    return WriteFailed(f"cannot write {path}: {detail}; nothing was written")


def _identity(path):
    """(st_dev, st_ino) of an existing path (following links), else None."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_dev, st.st_ino)


class _Output:
    def __init__(self, path, what, size_bytes=None, folder=False):
        self.path = os.fspath(path)
        self.what = what
        self.size_bytes = size_bytes
        self.folder = folder
        self.tmp = None
        self.created = []
        self.files = []

    @property
    def real(self):
        return os.path.realpath(self.path)


class OutputPlan:
    """The inputs and outputs of one command, checked together before any audio work.

    Parameters
    ----------
    activity : str
        What the command does, for the line printed on a signal (for
        example ``"rendering in.wav to out.wav"``).
    inputs : iterable of str
        Every file the command reads (audio, preset, shaper, automation,
        report); an output may not be, or resolve to, any of them.
    overwrite : bool
        Replace existing output files (``--overwrite``); folders and inputs
        are never replaced.
    """

    def __init__(self, activity, inputs=(), overwrite=False):
        self.activity = activity
        self.inputs = []
        self.overwrite = bool(overwrite)
        self.outputs = []
        self._checked = False
        for path in inputs:
            self.add_input(path)
        set_activity(activity)

    def add_input(self, path):
        """Declare one more file the command reads (None is ignored)."""
        if path is not None:
            self.inputs.append(os.fspath(path))
        return path

    def add_file(self, path, what="output", size_bytes=None):
        """Declare an output file; ``size_bytes`` (when known) is checked against free space and RLIMIT_FSIZE."""
        out = _Output(path, what, size_bytes=size_bytes)
        self.outputs.append(out)
        return out

    def add_folder(self, path, what, filenames):
        """Declare an output folder (created when missing) and the names of the files it will receive."""
        out = _Output(path, what, folder=True)
        self.outputs.append(out)
        for name in filenames:
            sub = _Output(os.path.join(out.path, name), f"{what} file", size_bytes=None)
            sub.parent_folder = out
            out.files.append(sub)
        return out

    # -- checking -------------------------------------------------------------

    def _all_files(self):
        for out in self.outputs:
            if out.folder:
                yield from out.files
            else:
                yield out

    def _committed_folders(self):
        for out in self.outputs:
            out.created = []

    def check(self):
        """Apply every rule to every output; raise :class:`OutputRefused` (or WriteFailed) before anything is written.

        On success each output file has its temporary file created (and
        registered for removal), which proves its folder writable.
        """
        inputs = [(p, os.path.realpath(p), _identity(p)) for p in self.inputs]
        seen = {}
        try:
            for out in self.outputs:
                if out.folder:
                    self._check_folder(out)
            for out in self._all_files():
                self._check_file(out, inputs, seen)
            for out in self._all_files():
                self._reserve(out)
        except BaseException:
            self.discard()
            raise
        self._checked = True
        return self

    def _check_folder(self, out):
        path = out.path
        if os.path.lexists(path) and not os.path.isdir(path):
            raise OutputRefused(f"{out.what} {path} exists and is not a folder")
        if not os.path.isdir(path):
            parent = os.path.dirname(os.path.abspath(path))
            if not os.path.isdir(parent):
                raise OutputRefused(f"{out.what} {path}: the folder {parent} does not exist")

    def _check_file(self, out, inputs, seen):
        path = out.path
        if path == "" or path.endswith(os.sep):
            raise OutputRefused(f"{out.what} '{path}' is not a file name")
        real = out.real
        ident = _identity(path)
        for given, input_real, input_ident in inputs:
            if real == input_real or (ident is not None and ident == input_ident):
                same = "is" if path == given else "resolves to"
                raise OutputRefused(f"{out.what} {path} {same} the input {given}; refusing to write over an input")
        for other_real, (other_what, other_path, other_ident) in seen.items():
            if real == other_real or (ident is not None and ident == other_ident):
                raise OutputRefused(f"{out.what} {path} and {other_what} {other_path} are the same file")
        seen[real] = (out.what, path, ident)
        if os.path.isdir(path):
            raise OutputRefused(f"{out.what} {path} is a folder; give a file name")
        if os.path.lexists(path):
            if not os.path.exists(path) or not stat.S_ISREG(os.stat(path).st_mode):
                if os.path.exists(path):
                    raise OutputRefused(f"{out.what} {path} exists and is not a regular file")
            if not self.overwrite:
                raise OutputRefused(f"{out.what} {path} exists (use --overwrite to replace it)")
        folder = os.path.dirname(os.path.abspath(path))
        if getattr(out, "parent_folder", None) is not None:
            return  # missing folders inside a declared output folder are created when written
        if not os.path.isdir(folder):
            raise OutputRefused(f"{out.what} {path}: the folder {folder} does not exist")

    def _reserve(self, out):
        folder = _existing_ancestor(os.path.dirname(os.path.abspath(out.path)))
        try:
            fd, tmp = tempfile.mkstemp(prefix=TEMP_PREFIX, suffix=".part", dir=folder)
        except OSError as exc:
            if exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
                raise OutputRefused(f"{out.what} {out.path}: cannot write in {folder} ({exc.strerror})") from None
            raise io_error(out.path, exc, "create") from None
        os.close(fd)
        _register(tmp, out.path)
        out.tmp = tmp
        if out.size_bytes:
            self._check_space(out, folder)

    def _check_space(self, out, folder):
        import resource

        soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
        if soft != resource.RLIM_INFINITY and out.size_bytes > soft:
            raise WriteFailed(f"{out.what} {out.path} needs about {out.size_bytes} bytes, above the file-size limit "
                              f"of {soft} bytes (ulimit -f); nothing was written")
        try:
            st = os.statvfs(folder)
        except OSError:
            return
        free = st.f_bavail * st.f_frsize
        if out.size_bytes > free:
            raise WriteFailed(f"{out.what} {out.path} needs about {out.size_bytes} bytes; {folder} has {free} bytes free; "
                              f"nothing was written")

    def discard(self):
        """Remove every temporary file and every folder this plan created (on any failure)."""
        self.finish()
        for out in self.outputs:
            for created in reversed(out.created):
                try:
                    os.rmdir(created)
                except OSError:
                    pass
            out.created = []

    # -- writing --------------------------------------------------------------

    def _find(self, target):
        if isinstance(target, _Output):
            return target
        for out in self._all_files():
            if out.path == os.fspath(target):
                return out
        raise KeyError(f"{target} was not declared in this output plan")

    def file_in(self, folder, name):
        """The declared output ``name`` inside output folder ``folder``."""
        wanted = os.path.join(folder.path, name)
        for out in folder.files:
            if out.path == wanted:
                return out
        raise KeyError(f"{name} was not declared in {folder.path}")

    def _prepare_tmp(self, out):
        parent = getattr(out, "parent_folder", None)
        folder = os.path.dirname(os.path.abspath(out.path))
        if parent is not None and not os.path.isdir(folder):
            missing = []
            probe = folder
            while not os.path.isdir(probe):
                missing.append(probe)
                probe = os.path.dirname(probe)
            for new in reversed(missing):
                try:
                    os.mkdir(new)
                except OSError as exc:
                    raise io_error(new, exc, "create the folder") from None
                parent.created.append(new)
        if out.tmp is not None and os.path.dirname(out.tmp) != folder:
            os.unlink(out.tmp)
            _forget(out.tmp)
            out.tmp = None
        if out.tmp is None:
            try:
                fd, out.tmp = tempfile.mkstemp(prefix=TEMP_PREFIX, suffix=".part", dir=folder)
            except OSError as exc:
                raise io_error(out.path, exc, "create") from None
            os.close(fd)
            _register(out.tmp, out.path)
        os.chmod(out.tmp, file_mode())
        return out.tmp

    @contextlib.contextmanager
    def atomic(self, target):
        """Context manager yielding the temporary path to write ``target`` into.

        On a normal exit the temporary file is fsync'd and kept until
        :meth:`commit` renames every written output into place (so a failure in
        a later output leaves none of them behind).  On any exception (a
        signal, a full disk, a file-size limit, an error) every temporary file
        of the plan is removed, with any folder it created, and OSErrors
        become :class:`WriteFailed`.
        """
        if not self._checked:
            raise RuntimeError("OutputPlan.check() must run before writing")
        out = self._find(target)
        try:
            tmp = self._prepare_tmp(out)
            yield tmp
            fd = os.open(tmp, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
            out.ready = True
        except OSError as exc:
            self.discard()
            raise io_error(out.path, exc) from None
        except BaseException:
            self.discard()
            raise

    @contextlib.contextmanager
    def open(self, target, mode="w", encoding="utf-8"):
        """Context manager yielding a file object writing ``target`` atomically (``mode`` "w" or "wb")."""
        with self.atomic(target) as tmp:
            kwargs = {} if "b" in mode else {"encoding": encoding}
            with open(tmp, mode, **kwargs) as f:
                yield f
                f.flush()

    def write_text(self, target, text):
        """Write ``text`` (UTF-8) to ``target`` atomically."""
        with self.open(target, "w") as f:
            f.write(text)

    def stream(self, target, finalize=None):
        """A :class:`StreamOutput` for the declared output ``target``: written while a run lasts, sealed into place.

        Takes over the output's temporary file (it leaves the plan's clean-up:
        :meth:`discard`, :meth:`commit` and a signal never remove it).  See
        the module notes, *Streams*.

        Parameters
        ----------
        target : str or declared output
            An output of this plan (checked).
        finalize : callable or None
            Closes whatever writes the stream (see :class:`StreamOutput`).
        """
        if not self._checked:
            raise RuntimeError("OutputPlan.check() must run before writing")
        out = self._find(target)
        tmp = self._prepare_tmp(out)
        stream = StreamOutput(out.path, out.what, tmp=tmp, finalize=finalize)
        _forget(tmp)
        out.tmp = None
        return stream

    def commit(self):
        """Rename every written output onto its name, fsync the folders, and remove unused temporary files."""
        folders = set()
        try:
            for out in self._all_files():
                if getattr(out, "ready", False) and out.tmp is not None:
                    os.replace(out.tmp, out.path)
                    _forget(out.tmp)
                    out.tmp = None
                    out.ready = False
                    folders.add(os.path.dirname(os.path.abspath(out.path)))
        except OSError as exc:
            self.discard()
            raise io_error(out.path, exc, "rename into") from None
        for folder in folders:
            _fsync_folder(folder)
        self.finish()
        self._committed_folders()

    def finish(self):
        """Remove the temporary files still held: those of outputs declared but not written (or, on failure, all)."""
        for out in self._all_files():
            if out.tmp is not None:
                try:
                    os.unlink(out.tmp)
                except OSError:
                    pass
                _forget(out.tmp)
                out.tmp = None

    def __enter__(self):
        if not self._checked:
            self.check()
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.commit()
        else:
            self.discard()
        return False


# -- streams: files written while a live run lasts (see the module notes) ----------------------------------

_streams = {}
_streams_lock = threading.Lock()


def _fsync_path(path):
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _describe(exc):
    """A few words for what ended a stream early."""
    if isinstance(exc, Interrupted):
        return f"interrupted by {signal.Signals(exc.signum).name}"
    if isinstance(exc, KeyboardInterrupt):
        return "interrupted"
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _is_write_error(exc):
    """True for an error raised by writing itself: an OSError, or an error of the sound-file library."""
    return isinstance(exc, OSError) or type(exc).__module__ == "soundfile"


class StreamOutput:
    """One output written as a stream while a live run lasts, sealed into place when it ends.

    Write :attr:`tmp` (a hidden ``.rtstage-*.part`` file in the output's own
    folder, with the mode the umask gives); :meth:`seal` makes it appear at
    :attr:`path`, whole, at once.  Never registered for removal: a live
    recording is sealed, not removed, on every way out (module notes,
    *Streams*).  Usable as a context manager: a normal exit seals; an
    exception seals what was written (after the block closed its file) and
    says so in one line: a write error (full disk, file-size limit) becomes a
    :class:`WriteFailed` naming the part kept, any other exception a warning
    line before it propagates.

    Parameters
    ----------
    path : str
        The final name (already checked by the caller's plan, or named by
        rule during the run, such as the next segment).
    what : str
        What it is, for messages (``"tap"``, ``"automation log"``).
    tmp : str or None
        A temporary file already created in ``path``'s folder (by a plan);
        None creates one.
    finalize : callable or None
        Closes whatever writes :attr:`tmp` (stops a writer thread, closes a
        sound file so that its header is final); called by :meth:`abort`
        before sealing.  It must not seal.

    Attributes
    ----------
    sealed : bool
        True once sealed (or discarded).
    cut_short : str or None
        Why the stream was sealed early, when it was.
    """

    def __init__(self, path, what="output", tmp=None, finalize=None):
        self.path = os.fspath(path)
        self.what = what
        self.finalize = finalize
        self.sealed = False
        self.cut_short = None
        self._lock = threading.Lock()
        if tmp is None:
            try:
                fd, tmp = tempfile.mkstemp(prefix=TEMP_PREFIX, suffix=".part", dir=self.folder)
            except OSError as exc:
                raise io_error(self.path, exc, "create") from None
            os.close(fd)
        self.tmp = tmp
        with _streams_lock:
            _streams[tmp] = self
        try:
            os.chmod(tmp, file_mode())
        except OSError as exc:
            self.discard()
            raise io_error(self.path, exc, "create") from None

    @property
    def folder(self):
        """The output's folder (where the temporary file lives too)."""
        return os.path.dirname(os.path.abspath(self.path))

    def _claim(self):
        with self._lock:
            if self.sealed:
                return False
            self.sealed = True
        with _streams_lock:
            _streams.pop(self.tmp, None)
        return True

    def seal(self, cut_short=None):
        """fsync the written part, rename it onto :attr:`path`, fsync the folder; True on the call that sealed.

        Idempotent (later calls return False).  With ``cut_short`` (why the
        writing stopped early) one warning line says so.  Raises
        :class:`WriteFailed` when the rename fails (the part written stays in
        :attr:`tmp`, and the message names it).
        """
        if not self._claim():
            return False
        self.cut_short = cut_short
        try:
            _fsync_path(self.tmp)
        except OSError as exc:  # the data may not all be on disk; it is still put in place, and said
            cut_short = f"{cut_short}; " if cut_short else ""
            cut_short += f"syncing it failed: {_os_reason(exc)}"
        try:
            os.replace(self.tmp, self.path)
        except OSError as exc:
            raise WriteFailed(f"cannot move {self.what} {self.path} into place: {_os_reason(exc)}; what was "
                              f"written is kept in {self.tmp}") from None
        _fsync_folder(self.folder)
        if cut_short:
            log(f"warning: {self.what} {self.path} cut short: {cut_short}; the part written is kept there")
        return True

    def abort(self, reason):
        """Seal what was written when its writer could not finish (one warning line); True when it sealed.

        Calls :attr:`finalize` first.  A stream that never received a byte is
        removed instead (nothing was recorded).
        """
        if self.sealed:
            return False
        if self.finalize is not None:
            try:
                self.finalize()
            except Exception as exc:  # what is on disk is still sealed
                reason = f"{reason}; closing it failed: {_describe(exc)}"
        try:
            empty = os.path.getsize(self.tmp) == 0
        except OSError:
            empty = False
        if empty:
            self.discard()
            return False
        return self.seal(cut_short=reason)

    def discard(self):
        """Remove the temporary file of a stream that holds nothing (its writer could not even open it)."""
        if not self._claim():
            return
        try:
            os.unlink(self.tmp)
        except OSError:
            pass

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.seal()
            return False
        if _is_write_error(exc):
            reason = failure_reason(self.path, self.tmp, exc)
            if self.finalize is not None:
                try:
                    self.finalize()
                except Exception:
                    pass
            self.seal()
            raise WriteFailed(f"cannot write {self.path}: {reason}; the part written before is kept in "
                              f"{self.path}") from None
        self.abort(_describe(exc))
        return False


def open_stream(path, what="output", finalize=None):
    """A :class:`StreamOutput` for ``path`` outside any plan: a file a run names as it goes (the next segment).

    The caller has checked ``path`` (the plan checked the first of a series;
    the later ones are new names by rule).
    """
    return StreamOutput(path, what, finalize=finalize)


def seal_open_streams(reason="the command ended before its writer closed it"):
    """Seal every stream still open (after its ``finalize``), one warning line each; returns how many were sealed.

    Called on every way out of a command (``rtstage.files.exits.run_guarded``),
    before the temporary files of unfinished outputs are removed.
    """
    with _streams_lock:
        streams = list(_streams.values())
    sealed = 0
    for stream in streams:
        try:
            sealed += bool(stream.abort(reason))
        except RtstageError as exc:
            log(f"warning: {exc}")
    return sealed


class LineStream:
    """Text lines appended to a stream, each written whole: a reader of the sealed file never sees half a line.

    Each line goes straight to the file (no buffer, so a line is either
    written or not).  A write error (full disk, file-size limit) cuts the
    file back to its last whole line, seals it with one warning line, and
    drops the lines that follow (:attr:`error` holds the error).

    Parameters
    ----------
    target : StreamOutput or str
        The stream (sealed by :meth:`close`), or a plain path the caller
        renames into place itself.
    """

    def __init__(self, target):
        self.stream = target if isinstance(target, StreamOutput) else None
        self.name = self.stream.path if self.stream is not None else os.fspath(target)
        path = self.stream.tmp if self.stream is not None else os.fspath(target)
        self._fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o666)
        self._lock = threading.Lock()
        self._size = 0
        self.lines = 0
        self.error = None

    def write_line(self, text):
        """Append ``text`` and a newline; False when the line could not be written (see the class notes)."""
        data = (text + "\n").encode("utf-8")
        with self._lock:
            if self._fd is None:
                return False
            try:
                view = memoryview(data)
                while view:
                    view = view[os.write(self._fd, view):]
            except OSError as exc:
                self.error = exc
                self._cut(_os_reason(exc))
                return False
            self._size += len(data)
            self.lines += 1
            return True

    def _cut(self, reason):
        try:
            os.ftruncate(self._fd, self._size)
        except OSError:
            pass
        self._close_fd()
        if self.stream is not None:
            self.stream.seal(cut_short=f"{reason}; {self.lines} whole lines written")

    def close_file(self):
        """Close the file without sealing (a stream's ``finalize``)."""
        with self._lock:
            self._close_fd()

    def _close_fd(self):
        if self._fd is not None:
            try:
                os.close(self._fd)
            except OSError:
                pass
            self._fd = None

    @property
    def closed(self):
        """True once closed (or cut short)."""
        return self._fd is None

    def close(self):
        """Close the file and seal the stream (a no-op once done)."""
        self.close_file()
        if self.stream is not None:
            self.stream.seal()


def write_whole_file(path, data):
    """Write ``data`` (str, UTF-8, or bytes) to ``path`` whole or not at all, outside any plan.

    For a small file that goes with a stream and is written when it ends (a
    segment's or a tap's sidecar): a temporary file in the same folder with
    the umask's mode, fsync, rename, fsync the folder.  The temporary file is
    registered while it exists (a signal removes it) and removed on failure;
    an OSError becomes :class:`WriteFailed`.
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    if isinstance(data, str):
        data = data.encode("utf-8")
    try:
        fd, tmp = tempfile.mkstemp(prefix=TEMP_PREFIX, suffix=".part", dir=folder)
    except OSError as exc:
        raise io_error(path, exc, "create") from None
    _register(tmp, path)
    try:
        try:
            os.fchmod(fd, file_mode())
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view):]
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
        _forget(tmp)
    except BaseException as exc:
        _forget(tmp)
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(exc, OSError):
            raise io_error(path, exc) from None
        raise
    _fsync_folder(folder)


def _existing_ancestor(folder):
    while folder and not os.path.isdir(folder):
        parent = os.path.dirname(folder)
        if parent == folder:
            break
        folder = parent
    return folder


def _fsync_folder(folder):
    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
