"""Preallocated blocks shared by the audio callback and the Python side.

Everything the callback touches is allocated here, before the stream opens,
and reached through one table of addresses (the callback's userdata):

* the kernel's parameter and state arrays (:class:`rtstage.kernel.KernelState`);
* the pending parameter block, guarded by a seqlock;
* the control and counter array ``ctl`` (int64, indices ``C_*``);
* the source: a preloaded float64 file, or generator parameters and a scratch block;
* the tap ring: a single-producer single-consumer ring of output words;
* the meter tap ``vq`` (the quantizer's input of the current block), the
  requantized words of the current block (the kernel's second output), and
  the meter ring: an SPSC ring of (quantizer input, requantized word) pairs.
  The device and the tap ring get the monitored words (``monitor``, mute,
  auto-mute); the meters always get the requantized words.

Seqlock (parameters, Python → callback)
---------------------------------------
The writer (:func:`publish_params`) makes ``ctl[C_PARAM_SEQ]`` odd, copies the
new iparams/fparams into the pending block, and makes it even again.  At the
start of a block the callback copies the pending block into scratch only when
the sequence number is even and new, re-reads it, and if it is unchanged
copies scratch into the kernel's parameters and records the sample index at
which they took effect (``ctl[C_APPLIED_FRAME]``, then ``ctl[C_APPLIED_SEQ]``).
The callback never waits: a torn read is simply retried one block later.

Ring (words, callback → tap writer)
-----------------------------------
One SPSC ring of :mod:`rtstage.live.ring`: ``ctl[C_RING_HEAD]`` and
``ctl[C_RING_TAIL]`` count frames written and read since the start; the slot
of frame k is ``k % ring_frames``.  The callback writes a block only if it
fits whole (otherwise it adds the block's frames to ``ctl[C_RING_DROPPED]``),
then advances the head after a fence; the consumer (:func:`ring_read`) copies
up to the head and advances the tail after a fence.

Meter ring (quantizer input and words, callback → meter thread)
---------------------------------------------------------------
The same discipline with its own counters (``C_MRING_HEAD``,
``C_MRING_TAIL``, ``C_MRING_DROPPED``) and two parallel arrays of
``meter_frames`` rows: ``x·gain`` exactly as the quantizer saw it (float64)
and the requantized words (equal to the output words in the requantized
monitor mode, unmuted).  :func:`meter_ring_write` appends a block whole or
counts it dropped, so the callback never waits for the meter thread;
:func:`meter_ring_read` is the consumer.  While no frame is dropped, meter
ring frame k is the engine's sample index k.
"""

import numpy as np
from numba import njit

from .. import kernel as K
from . import ring as R
from ._ptr import fence

# --- table of addresses (userdata) -----------------------------------------------
T_KIP, T_KFP, T_HIST, T_COUNTS, T_CLOCK, T_RAMP, T_RNGW, T_RNGT = range(8)
T_CTL = 8
T_PIP = 9
"""Pending iparams (seqlock-guarded)."""
T_PFP = 10
T_SIP = 11
"""Scratch iparams the callback reads the pending block into."""
T_SFP = 12
T_SRC = 13
"""Preloaded file source, float64 (src_frames, channels)."""
T_XBUF = 14
"""Generator scratch, float64 (max_frames, channels)."""
T_GENW = 15
"""Generator Philox scratch, uint64 (channels, 4)."""
T_GENF = 16
"""Generator float parameters: freq_hz, amplitude."""
T_RING = 17
"""Tap ring, output dtype (ring_frames, channels)."""
T_VQ = 18
"""Meter tap of the current block, float64 (max_frames, channels): x·gain as quantized."""
T_MX = 19
"""Meter ring, quantizer input, float64 (meter_frames, channels)."""
T_MW = 20
"""Meter ring, requantized words, output dtype (meter_frames, channels)."""
T_YQ = 21
"""Requantized words of the current block, output dtype (max_frames, channels): what the meters get, whatever
the monitor mode, mute or auto-mute (the device and the tap get the monitored words)."""
T_LEN = 22

# --- ctl: layout and configuration (written before start) -------------------------
C_NCH = 0
C_MAX_FRAMES = 1
C_IN_MODE = 2
C_CONTAINER_BITS = 3
"""Output container: 16 (int16) or 32 (int32)."""
C_SRC_FRAMES = 4
C_SRC_LOOP = 5
C_GEN_KIND = 6
C_GEN_SEED = 7
C_SAMPLERATE = 8
C_RING_FRAMES = 9
C_TAP_ON = 10
# --- ctl: written by the callback ---------------------------------------------------
C_SRC_POS = 16
"""Next source frame (file position or generator sample index)."""
C_SRC_DONE = 17
C_APPLIED_SEQ = 18
C_APPLIED_FRAME = 19
C_CALLBACKS = 20
C_FRAMES = 21
"""Frames written to the device since the start (source padding included)."""
C_IN_UNDERFLOW = 22
C_IN_OVERFLOW = 23
C_OUT_UNDERFLOW = 24
C_OUT_OVERFLOW = 25
C_PRIMING = 26
C_FLAGGED = 27
"""Callbacks with at least one status flag set."""
C_RING_HEAD = 28
C_RING_DROPPED = 29
C_LOOPS = 30
C_CPU_LOAD_PPM = 31
"""PortAudio's CPU load in millionths, written by the stream worker."""
C_WORKER_PID = 32
C_MRING_HEAD = 33
"""Frames written into the meter ring since the start."""
C_MRING_DROPPED = 34
"""Frames the meter ring had no room for (dropped whole blocks)."""
# --- ctl: written by the Python side -----------------------------------------------
C_PARAM_SEQ = 40
C_RING_TAIL = 41
C_MRING_TAIL = 42
"""Frames the meter thread has read from the meter ring."""
C_METER_ON = 43
"""1 when the callback fills the meter ring (set at layout; outside ``ctl[:C_SRC_POS]``, which the worker
copies into its warm-up block, because that block has no meter ring)."""
C_MRING_FRAMES = 44
"""Capacity of the meter ring in frames (set at layout, like ``C_METER_ON``)."""
C_LEN = 104
"""Slots 48..103 belong to :mod:`rtstage.live.timing` (callback timing, the per-cycle check) and :mod:`rtstage.live.packing`."""

IN_DEVICE = 0
"""Input from PortAudio's input buffer (float32)."""
IN_FILE = 1
IN_GENERATOR = 2

FLAG_COUNTERS = (
    ("input_underflow", C_IN_UNDERFLOW),
    ("input_overflow", C_IN_OVERFLOW),
    ("output_underflow", C_OUT_UNDERFLOW),
    ("output_overflow", C_OUT_OVERFLOW),
    ("priming_output", C_PRIMING),
    ("flagged_callbacks", C_FLAGGED),
)
"""Status-flag counters by name, as reported in :meth:`LiveEngine.status`."""


def _layout(channels, container_bits, max_frames, ring_frames, src_frames, meter_frames=0):
    """(slot, shape, dtype) of every shared array, in table order."""
    nch = int(channels)
    out_dtype = K.word_dtype(container_bits)
    spec = [None] * T_LEN
    spec[T_KIP] = ((K.IP_LEN,), np.int64)
    spec[T_KFP] = ((K.FP_LEN,), np.float64)
    spec[T_HIST] = ((nch, K.HIST_LEN), np.float64)
    spec[T_COUNTS] = ((nch, K.CNT_LEN), np.int64)
    spec[T_CLOCK] = ((K.CLK_LEN,), np.int64)
    spec[T_RAMP] = ((K.RAMP_LEN,), np.float64)
    spec[T_RNGW] = ((nch * K.RNG_RING_BLOCKS, 4), np.uint64)
    spec[T_RNGT] = ((K.RNG_TAG_LEN,), np.int64)
    spec[T_CTL] = ((C_LEN,), np.int64)
    spec[T_PIP] = spec[T_SIP] = ((K.IP_LEN,), np.int64)
    spec[T_PFP] = spec[T_SFP] = ((K.FP_LEN,), np.float64)
    spec[T_SRC] = ((max(int(src_frames), 1), nch), np.float64)
    spec[T_XBUF] = ((int(max_frames), nch), np.float64)
    spec[T_GENW] = ((nch, 4), np.uint64)
    spec[T_GENF] = ((4,), np.float64)
    spec[T_RING] = ((max(int(ring_frames), 1), nch), out_dtype)
    spec[T_VQ] = ((int(max_frames), nch), np.float64)
    spec[T_MX] = ((max(int(meter_frames), 1), nch), np.float64)
    spec[T_MW] = ((max(int(meter_frames), 1), nch), out_dtype)
    spec[T_YQ] = ((int(max_frames), nch), out_dtype)
    offsets = []
    offset = 0
    for shape, dtype in spec:
        offsets.append(offset)
        size = int(np.prod(shape)) * np.dtype(dtype).itemsize
        offset += (size + 63) // 64 * 64
    return spec, offsets, offset


class SharedBlock:
    """Every array the callback touches, and the table of their addresses.

    All arrays are views into one buffer, so a second process (the stream
    worker) can map the same memory and build its own table of addresses.

    Parameters
    ----------
    channels : int
        Channels in and out.
    container_bits : int
        Output container: 16 for int16, 32 for left-justified int32.
    max_frames : int
        Largest block the callback processes in one kernel call (longer
        PortAudio buffers are processed in pieces of this size).
    ring_frames : int
        Capacity of the tap ring in frames (0 when there is no tap).
    src_frames : int
        Frames of the preloaded file source (0 when there is none).
    meter_frames : int
        Capacity of the meter ring in frames (0: no meter ring, the kernel's
        meter tap is off).
    buffer : writable buffer or None
        Memory to lay the arrays in (at least :attr:`nbytes`); None allocates.
    init : bool
        Initialise the layout fields and kernel state (the owner does; a
        process attaching to existing memory does not).
    """

    def __init__(self, channels, container_bits, max_frames, ring_frames=0, src_frames=0, meter_frames=0, buffer=None,
                 init=True):
        self.channels = int(channels)
        self.geometry = (self.channels, int(container_bits), int(max_frames), int(ring_frames), int(src_frames),
                         int(meter_frames))
        self.out_dtype = K.word_dtype(container_bits)
        spec, offsets, self.nbytes = _layout(*self.geometry)
        if buffer is None:
            buffer = np.zeros(self.nbytes, dtype=np.uint8)
        self._buffer = buffer
        arrays = [np.ndarray(shape, dtype=dtype, buffer=buffer, offset=off) for (shape, dtype), off in zip(spec, offsets)]
        self.kernel = K.KernelState(self.channels)
        (self.kernel.iparams, self.kernel.fparams, self.kernel.hist, self.kernel.counts, self.kernel.clock,
         self.kernel.ramp, self.kernel.rng_words, self.kernel.rng_tag) = arrays[T_KIP : T_RNGT + 1]
        self.ctl = arrays[T_CTL]
        self.pending_ip, self.pending_fp = arrays[T_PIP], arrays[T_PFP]
        self.scratch_ip, self.scratch_fp = arrays[T_SIP], arrays[T_SFP]
        self.source, self.xbuf, self.gen_words, self.gen_fp = arrays[T_SRC], arrays[T_XBUF], arrays[T_GENW], arrays[T_GENF]
        self.ring = arrays[T_RING]
        self.vq, self.meter_x, self.meter_words = arrays[T_VQ], arrays[T_MX], arrays[T_MW]
        self.requantized = arrays[T_YQ]
        if init:
            self.kernel.rng_tag[:] = -1
            self.ctl[C_NCH] = self.channels
            self.ctl[C_MAX_FRAMES] = int(max_frames)
            self.ctl[C_CONTAINER_BITS] = int(container_bits)
            self.ctl[C_RING_FRAMES] = max(int(ring_frames), 1)
            self.ctl[C_TAP_ON] = 1 if ring_frames > 0 else 0
            self.ctl[C_SRC_FRAMES] = int(src_frames)
            self.ctl[C_MRING_FRAMES] = max(int(meter_frames), 1)
            self.ctl[C_METER_ON] = 1 if meter_frames > 0 else 0
        self._arrays = arrays  # kept alive: the table holds raw addresses
        self.table = np.array([a.ctypes.data for a in arrays], dtype=np.int64)

    @property
    def address(self):
        """Address of the table (the callback's userdata) in this process."""
        return int(self.table.ctypes.data)

    def counter(self, index):
        """One ``ctl`` value as a Python int."""
        return int(self.ctl[index])


@njit(nogil=True, cache=True, error_model="numpy")
def publish_params(ctl, pending_ip, pending_fp, new_ip, new_fp):
    """Seqlock writer: copy ``new_ip``/``new_fp`` into the pending block; returns the new (even) sequence number."""
    seq = ctl[C_PARAM_SEQ]
    ctl[C_PARAM_SEQ] = seq + 1
    fence()
    for i in range(pending_ip.shape[0]):
        pending_ip[i] = new_ip[i]
    for i in range(pending_fp.shape[0]):
        pending_fp[i] = new_fp[i]
    fence()
    ctl[C_PARAM_SEQ] = seq + 2
    return seq + 2


def publish_into(block, iparams, fparams):
    """:func:`publish_params` into ``block``'s seqlock block (an :class:`rtstage.engine.Engine` publish hook)."""
    return publish_params(block.ctl, block.pending_ip, block.pending_fp, iparams, fparams)


@njit(nogil=True, cache=True, error_model="numpy")
def applied(ctl):
    """(sequence number, sample index) of the parameters the callback last took, read in order."""
    seq = ctl[C_APPLIED_SEQ]
    fence()
    frame = ctl[C_APPLIED_FRAME]
    return seq, frame


@njit(nogil=True, cache=True, error_model="numpy")
def take_params(ctl, pending_ip, pending_fp, scratch_ip, scratch_fp, iparams, fparams, frame):
    """Seqlock reader (the callback's side): load new pending parameters if a consistent copy is available."""
    s1 = ctl[C_PARAM_SEQ]
    fence()
    if (s1 & 1) != 0 or s1 == ctl[C_APPLIED_SEQ]:
        return False
    for i in range(pending_ip.shape[0]):
        scratch_ip[i] = pending_ip[i]
    for i in range(pending_fp.shape[0]):
        scratch_fp[i] = pending_fp[i]
    fence()
    if ctl[C_PARAM_SEQ] != s1:
        return False
    for i in range(iparams.shape[0]):
        iparams[i] = scratch_ip[i]
    for i in range(fparams.shape[0]):
        fparams[i] = scratch_fp[i]
    ctl[C_APPLIED_FRAME] = frame
    fence()
    ctl[C_APPLIED_SEQ] = s1
    return True


@njit(nogil=True, cache=True, error_model="numpy")
def ring_write(ctl, ring, words, nframes):
    """Producer (callback): append ``nframes`` frames of ``words`` to the tap ring whole, or count them dropped."""
    head = R.reserve(ctl, C_TAP_ON, C_RING_HEAD, C_RING_TAIL, C_RING_DROPPED, C_RING_FRAMES, nframes)
    if head >= 0:
        R.copy_in(ring, head, words, nframes)
        R.advance(ctl, C_RING_HEAD, head, nframes)


@njit(nogil=True, cache=True, error_model="numpy")
def ring_read(ctl, ring, out):
    """Consumer (tap writer): copy up to ``out.shape[0]`` frames of the tap ring into ``out``; returns the count."""
    tail, n = R.available(ctl, C_RING_HEAD, C_RING_TAIL, out.shape[0])
    R.copy_out(ring, tail, out, 0, n)
    R.advance(ctl, C_RING_TAIL, tail, n)
    return n


@njit(nogil=True, cache=True, error_model="numpy")
def meter_ring_write(ctl, ring_x, ring_w, vq, words, nframes):
    """Producer (callback): append ``nframes`` frames of ``vq`` and ``words`` whole, or count them dropped."""
    head = R.reserve(ctl, C_METER_ON, C_MRING_HEAD, C_MRING_TAIL, C_MRING_DROPPED, C_MRING_FRAMES, nframes)
    if head >= 0:
        R.copy_in(ring_x, head, vq, nframes)
        R.copy_in(ring_w, head, words, nframes)
        R.advance(ctl, C_MRING_HEAD, head, nframes)


@njit(nogil=True, cache=True, error_model="numpy")
def meter_ring_reserve(ctl, nframes):
    """Producer (callback): the ring slot where ``nframes`` frames can be written in place, or -1.

    -1 when the meters are off, the block is empty, the ring lacks room or the
    run would cross the ring's end; the caller then writes through
    :func:`meter_ring_write` (which copies, or counts the frames dropped).
    After writing rows ``slot .. slot + nframes - 1`` (the kernel's taps point
    there), publish them with :func:`meter_ring_commit`.
    """
    return R.reserve_in_place(ctl, C_METER_ON, C_MRING_HEAD, C_MRING_TAIL, C_MRING_FRAMES, nframes)


@njit(nogil=True, cache=True, error_model="numpy")
def meter_ring_commit(ctl, nframes):
    """Producer (callback): publish ``nframes`` frames written in place after :func:`meter_ring_reserve`."""
    R.advance(ctl, C_MRING_HEAD, ctl[C_MRING_HEAD], nframes)


@njit(nogil=True, cache=True, error_model="numpy")
def meter_ring_read(ctl, ring_x, ring_w, out_x, out_w, start):
    """Consumer (meter thread): copy up to ``out_x.shape[0] - start`` frames into rows ``start..`` of the outputs.

    Returns the number of frames copied; the tail advances past them.
    """
    tail, n = R.available(ctl, C_MRING_HEAD, C_MRING_TAIL, out_x.shape[0] - start)
    R.copy_out(ring_x, tail, out_x, start, n)
    R.copy_out(ring_w, tail, out_w, start, n)
    R.advance(ctl, C_MRING_TAIL, tail, n)
    return n


def ring_backlog(ctl, head_at, tail_at):
    """Frames written to a ring and not yet read (Python side; for status)."""
    return int(ctl[head_at] - ctl[tail_at])
