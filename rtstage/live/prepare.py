"""Preparing a live stream: the source, the devices, the shared memory, the warm-up.

Everything here runs before the stream opens and may take its time
(files are read, a probe process lists the devices, the callback is compiled
or loaded from the cache).  :class:`~rtstage.live.supervisor.LiveEngine`
calls these in :meth:`~rtstage.live.supervisor.LiveEngine.prepare`; PortAudio
itself never runs in the engine's process (only in the stream worker and the
probe, :mod:`rtstage.live.worker`).
"""

import json
import mmap
import os
import subprocess
import sys
import tempfile

import numpy as np

from ..errors import RtstageError
from ..log import log
from . import shared as S
from .sources import gen_params, load_source_file

TAP_RING_S = 2.0
"""Capacity of the tap ring, in seconds of audio."""
METER_RING_S = 1.0
"""Capacity of the meter ring, in seconds of audio."""


def worker_command(*args):
    """Command line of the stream worker process (``python -m rtstage.live.worker ...``)."""
    return [sys.executable, "-m", "rtstage.live.worker", *args]


def load_file_source(spec, samplerate, channels):
    """Read a file source; returns ``(data, samplerate, channels)``, checked against any requested rate and count."""
    data, file_rate = load_source_file(spec.path)
    if samplerate is not None and int(samplerate) != file_rate:
        raise RtstageError(f"source file {spec.path} is at {file_rate} Hz, not {samplerate} Hz; rtstage does not resample")
    if channels is not None and int(channels) != data.shape[1]:
        raise RtstageError(f"source file {spec.path} has {data.shape[1]} channels, not {channels}")
    if data.shape[0] == 0:
        raise RtstageError(f"source file {spec.path} is empty")
    return data, file_rate, data.shape[1]


def probe_devices(requested, duplex):
    """Resolve the device specs in a probe process; returns its reply (names, default rate, warnings).

    Parameters
    ----------
    requested : dict
        ``device``, ``input_device``, ``output_device``, ``hostapi`` (None: not given).
    duplex : bool
        True when the input comes from the device.
    """
    cmd = worker_command("probe", "--duplex", "1" if duplex else "0")
    for key in ("device", "input_device", "output_device", "hostapi"):
        if requested[key] is not None:
            cmd += ["--" + key.replace("_", "-"), str(requested[key])]
    result = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, timeout=60)
    try:
        reply = json.loads(result.stdout.strip().splitlines()[-1])
    except (IndexError, ValueError):
        raise RtstageError(f"cannot list audio devices: {result.stderr.strip()[-300:]}") from None
    if not reply["ok"]:
        raise RtstageError(reply["error"])
    for warning in reply["warnings"]:
        log(f"warning: {warning}; output words may be changed before they reach the hardware")
    if reply["note"]:
        log(f"note: {reply['note']}")
    return reply


def geometry(channels, container_bits, blocksize, samplerate, tap, src_frames, meter_ring_s):
    """The shared block's geometry: ``(channels, container_bits, max_frames, ring_frames, src_frames, meter_frames)``."""
    ring_frames = max(int(TAP_RING_S * samplerate), 4 * blocksize) if tap else 0
    meter_frames = max(int(meter_ring_s * samplerate), 8 * blocksize) if meter_ring_s > 0 else 0
    return (channels, container_bits, blocksize, ring_frames, src_frames, meter_frames)


def shared_block(block_geometry):
    """A :class:`~rtstage.live.shared.SharedBlock` in an anonymous memory file that the worker maps.

    The file has no name in any folder (``memfd_create``; where that is missing, a
    file under /dev/shm unlinked at once), so a control process that is killed
    leaves nothing behind; the worker receives the descriptor (``pass_fds``).

    Returns
    -------
    (SharedBlock, mmap.mmap, int)
        The block, its memory (keep it alive) and the open descriptor (close it when done).
    """
    nbytes = S._layout(*block_geometry)[2]
    if hasattr(os, "memfd_create"):
        fd = os.memfd_create("rtstage-live", os.MFD_CLOEXEC)
    else:
        shm_dir = "/dev/shm" if os.path.isdir("/dev/shm") else None
        fd, path = tempfile.mkstemp(prefix="rtstage-live-", dir=shm_dir)
        os.unlink(path)
    try:
        os.ftruncate(fd, nbytes)
        memory = mmap.mmap(fd, nbytes)
    except BaseException:
        os.close(fd)
        raise
    return S.SharedBlock(*block_geometry, buffer=memory), memory, fd


def configure_input(block, samplerate, source_spec, loop):
    """Write the input mode (device, file, generator) and its parameters into the block."""
    ctl = block.ctl
    ctl[S.C_SAMPLERATE] = samplerate
    if source_spec is None:
        ctl[S.C_IN_MODE] = S.IN_DEVICE
    elif source_spec.kind == "file":
        ctl[S.C_IN_MODE] = S.IN_FILE
        ctl[S.C_SRC_LOOP] = 1 if loop else 0
    else:
        ctl[S.C_IN_MODE] = S.IN_GENERATOR
        kind, freq_hz, amplitude, seed_bits = gen_params(source_spec, samplerate)
        ctl[S.C_GEN_KIND] = kind
        ctl[S.C_GEN_SEED] = seed_bits
        block.gen_fp[0] = freq_hz
        block.gen_fp[1] = amplitude


def warm(channels, container_bits, blocksize):
    """Compile (or load from the cache) the callback and run the Python-side helpers once with the real types."""
    from .cfunc import build_callback

    build_callback()
    scratch = S.SharedBlock(channels, container_bits, blocksize, 4 * blocksize)
    S.publish_params(scratch.ctl, scratch.pending_ip, scratch.pending_fp, np.zeros_like(scratch.scratch_ip),
                     np.zeros_like(scratch.scratch_fp))
    S.applied(scratch.ctl)
    S.ring_read(scratch.ctl, scratch.ring, np.zeros((8, channels), dtype=scratch.out_dtype))
