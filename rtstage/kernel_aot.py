"""The kernel compiled ahead of time, so that an offline command starts without numba.

A fresh ``rtstage render`` used to spend most of its first second in numba:
about 0.2 s importing it and 0.4 s loading the cached kernel (its type
registries, and through them scipy.linalg), before the first frame.  This
module builds the same :func:`rtstage.kernel.process_block`, from the same
source and with the same numba, into a Python extension module once (numba's
ahead-of-time compiler, ``numba.pycc``), and the offline drivers (render,
pipe, :class:`rtstage.engine.Engine`) call that module when it is current.
The live callback and the deviceless network engine keep calling the numba
kernel directly, since they need its C entry point or run inside other
compiled code.

One kernel
----------
Nothing here is a second implementation: the extension exports thin
wrappers that call ``process_block`` itself, compiled by numba from
:mod:`rtstage.kernel` with the kernel's own options (``nogil``, numpy's
error model, no fastmath).  IEEE arithmetic without contraction gives the
same words on any code path, and ``tests/test_kernel_aot.py`` checks the
built module against the numba kernel and against the independent numpy
reference requantizer, word for word.

When it is used
---------------
The module's name carries a fingerprint of everything that decides its
machine code: the sources of the kernel (``kernel.py``, ``kernel_layout.py``,
``_philox.py``, this file), the numba, llvmlite and numpy versions, the Python
build and the processor (its model and feature flags, since the build
targets the host processor as numba's JIT does).  A change to any of them
changes the name, so a stale build is never loaded; the drivers then use the
numba kernel, with the same words and a slower start, until the next build.

Build it with ``python -m rtstage.kernel_aot`` (``tools/bootstrap.sh`` does,
after installing); it takes about a minute and needs a C compiler, the Python
headers and setuptools.  It goes to ``$RTSTAGE_KERNEL_DIR`` when that is set,
else to ``rtstage/__pycache__`` beside numba's own cache.
"""

import hashlib
import importlib.machinery
import importlib.util
import os
import sys

import numpy as np

KERNEL_DIR_ENV = "RTSTAGE_KERNEL_DIR"
"""Environment variable naming the directory of the ahead-of-time build."""

_PACKAGE_DIR = os.path.dirname(os.path.abspath(__file__))
_SOURCES = ("kernel.py", "kernel_layout.py", "_philox.py", "kernel_aot.py")
_X_TYPES = {"f8": np.dtype(np.float64), "f4": np.dtype(np.float32)}
_Y_TYPES = {"i2": np.dtype(np.int16), "i4": np.dtype(np.int32)}
_STATE_TYPES = "i8, i8[::1], f8[::1], f8[:,::1], i8[:,::1], i8[::1], f8[::1], u8[:,::1], i8[::1]"
"""numba types of ``nframes`` and the :class:`~rtstage.kernel_layout.KernelState` arrays, in call order."""


def kernel_dir():
    """Directory of the ahead-of-time build: ``$RTSTAGE_KERNEL_DIR``, else ``rtstage/__pycache__``."""
    return os.environ.get(KERNEL_DIR_ENV) or os.path.join(_PACKAGE_DIR, "__pycache__")


def _module_text(name):
    """Bytes of a module's version file (or its spec's origin) found without importing it."""
    spec = importlib.util.find_spec(name)
    if spec is None or spec.origin is None:
        return b"absent"
    version_file = os.path.join(os.path.dirname(spec.origin), "_version.py")
    with open(version_file if os.path.exists(version_file) else spec.origin, "rb") as f:
        return f.read()


def _processor_text():
    """The processor's model name and feature flags (Linux), else what the platform says."""
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="replace") as f:
            keep = {}
            for line in f:
                key, _, value = line.partition(":")
                key = key.strip()
                if key in ("vendor_id", "model name", "flags") and key not in keep:
                    keep[key] = value.strip()
                if len(keep) == 3:
                    break
        return repr(sorted(keep.items()))
    except OSError:
        import platform

        return platform.machine() + platform.processor()


def fingerprint():
    """Hex digest naming everything that decides the built module's machine code."""
    h = hashlib.sha256()
    for name in _SOURCES:
        with open(os.path.join(_PACKAGE_DIR, name), "rb") as f:
            h.update(name.encode() + b"\0" + f.read() + b"\0")
    for name in ("numba", "llvmlite"):
        h.update(name.encode() + b"\0" + _module_text(name) + b"\0")
    h.update(f"{np.__version__}\0{sys.version}\0{sys.implementation.cache_tag}\0".encode())
    h.update(_processor_text().encode())
    return h.hexdigest()


def module_name(digest=None):
    """Name of the extension module for ``digest`` (default: the current :func:`fingerprint`)."""
    return "_rtstage_kernel_" + (digest or fingerprint())[:20]


def module_path(directory=None, digest=None):
    """Path of the extension module for ``digest`` in ``directory`` (default :func:`kernel_dir`)."""
    suffix = importlib.machinery.EXTENSION_SUFFIXES[0]
    return os.path.join(directory or kernel_dir(), module_name(digest) + suffix)


def _export_name(x_code, y_code, meter_words):
    return f"process_{x_code}_{y_code}" + ("_meter" if meter_words else "")


class AotKernel:
    """``process_block`` of a built extension module, called like :func:`rtstage.kernel.process_block`.

    The module exports one function per input type (float64, float32),
    word type (int16, int32) and presence of the meter words ``yq``; a
    call picks the one its arrays match.  Any other combination goes to the
    numba kernel (imported then), so every call the numba kernel accepts is
    accepted here, with the same words.
    """

    def __init__(self, module):
        self.module = module
        self.path = module.__file__
        self._by_types = {}
        for x_code, x_type in _X_TYPES.items():
            for y_code, y_type in _Y_TYPES.items():
                for meter_words in (False, True):
                    fn = getattr(module, _export_name(x_code, y_code, meter_words))
                    self._by_types[(x_type, y_type, meter_words)] = fn

    def __call__(self, x, y, vq, nframes, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag, yq=None):
        fn = None
        if (isinstance(x, np.ndarray) and isinstance(y, np.ndarray) and isinstance(vq, np.ndarray)
                and x.ndim == 2 and y.ndim == 2 and vq.ndim == 2 and vq.dtype == np.float64
                and (yq is None or (isinstance(yq, np.ndarray) and yq.ndim == 2 and yq.dtype == y.dtype))):
            fn = self._by_types.get((x.dtype, y.dtype, yq is not None))
        if fn is None:
            from . import kernel

            return kernel.process_block(x, y, vq, nframes, iparams, fparams, hist, counts, clock, ramp,
                                        rng_words, rng_tag, yq)  # fmt: skip
        if yq is None:
            fn(x, y, vq, nframes, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag)
        else:
            fn(x, y, vq, nframes, iparams, fparams, hist, counts, clock, ramp, rng_words, rng_tag, yq)


_loaded = {}


def load(directory=None):
    """The current ahead-of-time build as an :class:`AotKernel`, or None when there is none.

    Never raises: a missing, stale or unloadable build means None (and the
    numba kernel serves).  The result is remembered per directory.
    """
    directory = directory or kernel_dir()
    if directory in _loaded:
        return _loaded[directory]
    found = None
    try:
        digest = fingerprint()
        path = module_path(directory, digest)
        if os.path.exists(path):
            spec = importlib.util.spec_from_file_location(module_name(digest), path)
            module = importlib.util.module_from_spec(spec)
            spec.loader.exec_module(module)
            found = AotKernel(module)
    except (ImportError, OSError, AttributeError):
        found = None
    _loaded[directory] = found
    return found


def offline_kernel():
    """The ``process_block`` the offline drivers call: the ahead-of-time build when current, else numba's."""
    found = load()
    if found is not None:
        return found
    from . import kernel

    return kernel.process_block


def _aot_flags_class(flags_class):
    """numba's compile flags with the kernel's options for the exported wrappers (GIL released, numpy errors)."""

    class KernelFlags(flags_class):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            self.release_gil = True
            self.error_model = "numpy"

    return KernelFlags


def build(directory=None, log=None):
    """Compile the kernel ahead of time into ``directory`` (default :func:`kernel_dir`); returns the module's path.

    The module is compiled in a temporary directory beside the target and
    renamed into place, so a reader never sees half a module.  Older builds
    of other fingerprints in the directory are removed.

    Raises
    ------
    rtstage.errors.RtstageError
        When numba's ahead-of-time compiler or a C compiler is missing, or the
        directory cannot be written.
    """
    import tempfile
    import warnings

    from .errors import RtstageError

    directory = directory or kernel_dir()
    digest = fingerprint()
    name = module_name(digest)
    target = module_path(directory, digest)
    try:
        os.makedirs(directory, exist_ok=True)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # numba.pycc announces its own pending deprecation
            import numba.pycc.compiler as pycc_compiler
            from numba.pycc import CC
    except ImportError as exc:
        raise RtstageError(f"cannot build the kernel ahead of time: {exc} (it needs numba and setuptools)") from None
    except OSError as exc:
        raise RtstageError(f"cannot build the kernel ahead of time: {directory}: {exc.strerror}") from None
    from .kernel import process_block

    cc = CC(name)
    cc.target_cpu = "host"
    cc.verbose = False
    for x_code in _X_TYPES:
        for y_code in _Y_TYPES:
            args = f"{x_code}[:,:], {y_code}[:,:], f8[:,:], {_STATE_TYPES}"

            def without_meter(x, y, vq, n, ip, fp, hist, counts, clock, ramp, rng_words, rng_tag):
                process_block(x, y, vq, n, ip, fp, hist, counts, clock, ramp, rng_words, rng_tag)

            def with_meter(x, y, vq, n, ip, fp, hist, counts, clock, ramp, rng_words, rng_tag, yq):
                process_block(x, y, vq, n, ip, fp, hist, counts, clock, ramp, rng_words, rng_tag, yq)

            cc.export(_export_name(x_code, y_code, False), f"void({args})")(without_meter)
            cc.export(_export_name(x_code, y_code, True), f"void({args}, {y_code}[:,:])")(with_meter)
    plain_flags = pycc_compiler.Flags
    pycc_compiler.Flags = _aot_flags_class(plain_flags)
    try:
        with tempfile.TemporaryDirectory(dir=directory, prefix=".kernel-build-") as tmp:
            cc.output_dir = tmp
            try:
                cc.compile()
            except Exception as exc:  # the C toolchain's failures come in many types
                raise RtstageError(f"cannot build the kernel ahead of time: {type(exc).__name__}: {exc}") from None
            built = os.path.join(tmp, os.path.basename(target))
            os.replace(built, target)
    except OSError as exc:
        raise RtstageError(f"cannot build the kernel ahead of time: {directory}: {exc.strerror}") from None
    finally:
        pycc_compiler.Flags = plain_flags
    suffix = importlib.machinery.EXTENSION_SUFFIXES[0]
    for entry in os.listdir(directory):
        if entry.startswith("_rtstage_kernel_") and entry.endswith(suffix) and entry != os.path.basename(target):
            try:
                os.unlink(os.path.join(directory, entry))
            except OSError:
                pass
    _loaded.pop(directory, None)
    if log is not None:
        log(f"built the kernel ahead of time: {target}")
    return target


def main(argv=None):
    """``python -m rtstage.kernel_aot [--dir DIR] [--check]``: build the kernel ahead of time, or say whether it is current."""
    import argparse

    from .errors import RtstageError
    from .log import log

    parser = argparse.ArgumentParser(prog="python -m rtstage.kernel_aot",
                                     description="Build rtstage's kernel ahead of time so offline commands start fast.")
    parser.add_argument("--dir", help=f"directory of the build (default ${KERNEL_DIR_ENV}, else rtstage/__pycache__)")
    parser.add_argument("--check", action="store_true", help="say whether a current build exists; exit 1 if not")
    args = parser.parse_args(argv)
    if args.check:
        found = load(args.dir)
        print(found.path if found else f"no current build (would be {module_path(args.dir)})")
        return 0 if found else 1
    try:
        build(args.dir, log=log)
    except RtstageError as exc:
        print(f"rtstage: {exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
