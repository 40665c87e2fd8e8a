"""The compiled PortAudio callbacks cannot call back into Python: checked on their LLVM IR.

The real-time rules (DEVELOPERS.md) say the audio thread runs no Python, takes no GIL, raises nothing
and allocates nothing.  numba compiles a function that can raise (with its default error model, an
integer ``%`` or ``//`` by a variable can raise ZeroDivisionError) into code that stores an exception
record and returns an error status; the cfunc's C wrapper then takes the GIL and calls the
interpreter.  So the check reads the LLVM IR numba (through llvmlite, a general-purpose library)
produced for the callback and every function linked into it, and fails on any of:

* the GIL: ``numba_gil_ensure``, ``PyGILState_Ensure`` (numba's wrapper of it);
* Python's error machinery: ``PyErr_*``, ``numba_do_raise``, ``numba_unpickle``, an exception record
  (``.const.picklebuf``) or a store through the ``excinfo`` argument (how a numba function raises);
* allocation: ``NRT_MemInfo_alloc*``, ``NRT_Allocate*``;
* a call to a compiled function the IR declares but does not define (it could not be inspected).

The cfunc's own C wrapper (``cfunc.*``) always carries an error path that takes the GIL; it runs only
when the function it wraps returns an error status, which the rules above exclude, so the wrapper is
the one function not scanned.  A second test compiles a small deliberately raising cfunc and checks
that the detector flags it, so that the first test can fail.
"""

import os
import re
import subprocess
import sys
from pathlib import Path

import numba
import numpy as np
import pytest
from numba import njit, types

ROOT = Path(__file__).resolve().parent.parent

FORBIDDEN = {
    "numba_gil_ensure": "takes the GIL",
    "PyGILState_Ensure": "takes the GIL",
    "PyErr_": "calls Python's error API",
    "numba_do_raise": "raises a Python exception",
    "numba_unpickle": "builds a Python exception",
    "numba_runtime_build_excinfo_struct": "builds an exception record",
    ".const.picklebuf": "holds an exception record (a raise)",
    "NRT_MemInfo_alloc": "allocates",
    "NRT_Allocate": "allocates",
}

_DEFINE = re.compile(r'^define\b[^@]*@"?([^"(\s]+)"?\(', re.M)
_CALL = re.compile(r'call [^@\n]*@"?([^"(\s]+)"?\(')
_RECORD_STORE = re.compile(r"store ptr @[^\n,]+, ptr %excinfo")
"""How a numba function raises: it stores a constant exception record through its ``excinfo`` argument.
(Storing null, or a callee's record passed on, is how it clears or propagates one: judged at the callee.)"""


def functions(llvm_ir):
    """``{name: body}`` of every function the IR defines."""
    out = {}
    starts = [(m.start(), m.group(1)) for m in _DEFINE.finditer(llvm_ir)]
    for start, name in starts:
        end = llvm_ir.find("\n}\n", start)
        out[name] = llvm_ir[start : end if end >= 0 else len(llvm_ir)]
    return out


def findings(llvm_ir):
    """Reasons the code reachable from the cfunc could call back into Python or allocate (empty: none).

    Walks the call graph from the cfunc's C wrapper (``cfunc.*``): every function it reaches is scanned
    for the markers in :data:`FORBIDDEN` and for a raise; a compiled function (mangled ``_ZN...``) that
    is reached but not defined in the IR is reported as not inspected.  The wrapper itself is only
    followed, not scanned (see the module notes).
    """
    bodies = functions(llvm_ir)
    roots = [name for name in bodies if name.startswith("cfunc.")]
    seen, todo, found = set(), list(roots), []
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        seen.add(name)
        body = bodies.get(name)
        if body is None:
            if name.startswith("_ZN"):
                found.append(f"calls {name}, compiled elsewhere and not inspected")
            continue
        callees = set(_CALL.findall(body))
        if name in roots:
            todo.extend(c for c in callees if c.startswith("_ZN"))
            continue
        todo.extend(callees)
        for needle, why in FORBIDDEN.items():
            if needle in body:
                found.append(f"{name} {why} ({needle})")
        if _RECORD_STORE.search(body):
            found.append(f"{name} raises (stores an exception record through excinfo)")
    return sorted(set(found))


_DUMPS = {
    # The live engine's callback (rtstage run, rtstage demo).
    "engine": "from rtstage.live.cfunc import compile_callback as compile_it\ncb = compile_it(cache=False)",
    # The link test's play-and-record callback (rtstage linktest run).
    "linktest": "from rtstage.linktest.loop import compile_loop_callback as compile_it\ncb = compile_it()",
}


@pytest.mark.parametrize("which", sorted(_DUMPS))
def test_compiled_callback_cannot_call_back_into_python(tmp_path, which):
    # A fresh numba cache, so that every function the callback calls is compiled in this process and its IR
    # is part of the callback's module (a function loaded from the cache comes as object code, without IR).
    env = dict(os.environ, PYTHONPATH=str(ROOT), NUMBA_CACHE_DIR=str(tmp_path / "numba"))
    script = f"import sys\n{_DUMPS[which]}\nsys.stdout.write(cb.inspect_llvm())\n"
    result = subprocess.run([sys.executable, "-c", script], cwd=ROOT, env=env, capture_output=True, text=True,
                            timeout=900)
    assert result.returncode == 0, result.stderr[-2000:]
    llvm_ir = result.stdout
    names = functions(llvm_ir)
    # The module holds the callback body and its wrapper (a sanity check that the split found functions).
    assert any(n.startswith("cfunc.") for n in names) and len(names) >= 2, sorted(names)
    assert findings(llvm_ir) == []


@njit(nogil=True)
def _modulo_default_error_model(a, b):
    return a % b  # ZeroDivisionError when b == 0: numba's default error model compiles a raise


@njit(nogil=True, error_model="numpy")
def _modulo_numpy_error_model(a, b):
    return a % b  # the numpy error model gives 0 for b == 0, no raise


@njit(nogil=True)
def _allocates(n):
    return np.ones(n).sum()  # np.ones allocates through numba's runtime (NRT)


_SIG = types.float64(types.int64, types.int64)


def test_the_detector_flags_a_raising_callee_and_passes_a_clean_one():
    bad = numba.cfunc(_SIG, nopython=True)(lambda a, b: _modulo_default_error_model(a, b))
    good = numba.cfunc(_SIG, nopython=True, error_model="numpy")(lambda a, b: _modulo_numpy_error_model(a, b))
    bad_findings = findings(bad.inspect_llvm())
    assert bad_findings, "the detector missed a callee that raises ZeroDivisionError"
    assert any("exception record" in f or "raises" in f for f in bad_findings), bad_findings
    assert findings(good.inspect_llvm()) == []
    # The wrapper of even the clean cfunc holds the GIL path; the detector passes it only as the wrapper.
    assert "numba_gil_ensure" in good.inspect_llvm()


def test_the_detector_flags_allocation():
    sig = types.float64(types.int64)
    allocating = numba.cfunc(sig, nopython=True, error_model="numpy")(lambda n: _allocates(n))
    assert any("allocates" in f for f in findings(allocating.inspect_llvm()))
