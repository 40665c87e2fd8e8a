"""The stream worker: the process that owns PortAudio and runs the callback.

PortAudio cannot be reinitialised in a process whose JACK server died (its
JACK host API asserts in ``Pa_Terminate``, and stopping the dead stream
blocks), so the stream lives in a child process started by
:class:`~rtstage.live.supervisor.LiveEngine`.  The child maps the engine's
shared memory (every array of :class:`~rtstage.live.shared.SharedBlock`:
kernel state, parameters, counters, source, tap ring), builds its own table
of addresses, loads the compiled callback from the numba cache, warms it,
opens the stream and starts it.  When the audio system fails, the supervisor
kills the child and starts a new one: the state in shared memory survives,
so the kernel, the dither clock and the source position carry on.

Commands (internal)::

    python -m rtstage.live.worker probe   [device options]      # JSON on stdout
    python -m rtstage.live.worker stream  --shm-fd FD --geometry N,BITS,MAXF,RING,SRC ...

``stream`` prints one JSON line when the stream runs (or fails to open),
then writes PortAudio's CPU load into ``ctl`` every 20 ms until it reads
``stop`` or end-of-file on stdin (or gets SIGTERM).  Exit status 0 after a
clean stop, 2 when the stream cannot be opened, 3 when the audio system
stopped the stream.
"""

import argparse
import ctypes
import json
import mmap
import os
import select
import signal
import sys
import time

EXIT_OK = 0
EXIT_OPEN_FAILED = 2
EXIT_STREAM_LOST = 3


def _reply(obj):
    sys.stdout.write(json.dumps(obj) + "\n")
    sys.stdout.flush()


def _device_args(p):
    p.add_argument("--device")
    p.add_argument("--input-device")
    p.add_argument("--output-device")
    p.add_argument("--hostapi")
    p.add_argument("--duplex", type=int, default=0)


def probe(args):
    """Resolve device specs to names (never a different device than asked); JSON on stdout."""
    from ..errors import RtstageError
    from .devices import conversion_warning, describe_device, find_device, find_hostapi, hostapi_note
    import sounddevice as sd

    try:
        api = find_hostapi(args.hostapi)
        out_spec = args.output_device if args.output_device is not None else args.device
        in_spec = args.input_device if args.input_device is not None else args.device
        out_index = find_device(out_spec, "output", api)
        out_name, api_name = describe_device(out_index)
        in_name = None
        if args.duplex:
            in_index = find_device(in_spec, "input", api)
            in_name, in_api = describe_device(in_index)
            if in_api != api_name:
                raise RtstageError(f"input device '{in_name}' ({in_api}) and output device '{out_name}' "
                                   f"({api_name}) are on different host APIs")
        warnings = [w for w in (conversion_warning(n, api_name) for n in filter(None, (out_name, in_name))) if w]
        _reply({"ok": True, "output_name": out_name, "input_name": in_name, "hostapi_name": api_name,
                "default_samplerate": sd.query_devices(out_index)["default_samplerate"],
                "max_output_channels": sd.query_devices(out_index)["max_output_channels"],
                "warnings": warnings, "note": hostapi_note(api_name)})
    except RtstageError as exc:
        _reply({"ok": False, "error": str(exc)})
    os._exit(EXIT_OK)


def _busy():
    x = 0
    while True:
        for i in range(2000):
            x = (x + i * i) % 1000003


def stream(args):
    """Attach, warm, open, run until told to stop (see the module docstring)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the supervisor's to handle
    stop_requested = []
    signal.signal(signal.SIGTERM, lambda *a: stop_requested.append(1))
    import numpy as np

    from . import shared as S
    from .cfunc import build_callback
    from .devices import find_by_name
    from .stream import close_stream, open_stream

    geometry = [int(v) for v in args.geometry.split(",")]
    memory = mmap.mmap(args.shm_fd, 0)  # the control process's anonymous memory file, inherited
    os.close(args.shm_fd)
    block = S.SharedBlock(*geometry, buffer=memory, init=False)
    nch, container_bits, max_frames = geometry[0], geometry[1], geometry[2]

    # Warm the compiled callback on a scratch block of the same types before anything runs.
    cb = build_callback()
    scratch = S.SharedBlock(nch, container_bits, max_frames, 4 * max_frames, max_frames)
    scratch.ctl[:S.C_SRC_POS] = block.ctl[:S.C_SRC_POS]
    scratch.ctl[S.C_RING_FRAMES] = 4 * max_frames
    scratch.ctl[S.C_SRC_FRAMES] = max_frames
    scratch.ctl[S.C_TAP_ON] = 1
    scratch.kernel.iparams[:] = block.kernel.iparams
    scratch.kernel.fparams[:] = block.kernel.fparams
    width = np.dtype(block.out_dtype).itemsize
    out = np.zeros(max_frames * nch * width, dtype=np.uint8)
    inp = np.zeros(max_frames * nch, dtype=np.float32)
    for _ in range(2):
        cb.ctypes(ctypes.c_void_p(inp.ctypes.data), ctypes.c_void_p(out.ctypes.data), max_frames, None, 0,
                  ctypes.c_void_p(scratch.address))

    from .realtime import prepare_stream_process

    rt_info = prepare_stream_process(memory, out, inp)  # mlockall, then every page of the shared block resident
    out_index = find_by_name(args.output_name, args.hostapi_name, "output")
    in_index = find_by_name(args.input_name, args.hostapi_name, "input") if args.input_name else None
    if out_index is None or (args.input_name and in_index is None):
        _reply({"ok": False, "error": f"device '{args.output_name}' ({args.hostapi_name}) is not available"})
        os._exit(EXIT_OPEN_FAILED)
    from .timing import JackFrameClock

    frame_clock = JackFrameClock(enabled="JACK" in args.hostapi_name)  # the per-cycle port check (JACK only)
    frame_clock.install(block.ctl)
    from .packing import install as install_packing

    pack_scratch = install_packing(block.ctl, nch, max_frames, args.packed24)  # noqa: F841 (kept alive)
    try:
        s = open_stream(block, args.samplerate, args.blocksize, out_index, in_index, args.latency, args.callback)
        from .realtime import promote_new_threads, thread_ids

        before = thread_ids()
        s.start()
        if "ALSA" in args.hostapi_name and rt_info["realtime_permitted"]:
            rt_info["promoted_threads"] = promote_new_threads(before)  # PortAudio's ALSA thread to SCHED_FIFO
    except Exception as exc:
        _reply({"ok": False, "error": str(exc)})
        os._exit(EXIT_OPEN_FAILED)
    if args.load_thread:
        import threading

        threading.Thread(target=_busy, daemon=True).start()
    import gc

    gc.collect()
    gc.freeze()
    block.ctl[S.C_WORKER_PID] = os.getpid()
    _reply({"ok": True, "pid": os.getpid(), "latency_s": s.latency, "realtime": rt_info})
    while True:
        ready, _, _ = select.select([sys.stdin], [], [], 0.02)
        if ready:
            line = sys.stdin.readline()
            if not line or line.strip() == "stop":
                break
        if stop_requested:
            break
        try:
            block.ctl[S.C_CPU_LOAD_PPM] = int(s.cpu_load * 1e6)
        except Exception:
            pass
        if not s.active:
            if block.ctl[S.C_SRC_DONE]:
                break
            os._exit(EXIT_STREAM_LOST)  # the audio system stopped the stream: never touch it again
    close_stream(s, abort=False)
    frame_clock.close(block.ctl)
    sys.stdout.flush()
    os._exit(EXIT_OK)


def main(argv=None):
    """Entry point of the worker process."""
    p = argparse.ArgumentParser(prog="python -m rtstage.live.worker")
    sub = p.add_subparsers(dest="command", required=True)
    pp = sub.add_parser("probe")
    _device_args(pp)
    ps = sub.add_parser("stream")
    ps.add_argument("--shm-fd", type=int, required=True)
    ps.add_argument("--geometry", required=True)
    ps.add_argument("--samplerate", type=int, required=True)
    ps.add_argument("--blocksize", type=int, required=True)
    ps.add_argument("--latency", type=float)
    ps.add_argument("--output-name", required=True)
    ps.add_argument("--input-name")
    ps.add_argument("--hostapi-name", required=True)
    ps.add_argument("--callback", default="compiled")
    ps.add_argument("--load-thread", action="store_true")
    ps.add_argument("--packed24", action="store_true")
    args = p.parse_args(argv)
    if args.command == "probe":
        probe(args)
    else:
        stream(args)


if __name__ == "__main__":
    main()
