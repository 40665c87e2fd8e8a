"""The engine object model: settings -> validated, encoded kernel parameters; state and counters owned.

The container rule (:func:`check_word_fits`), the encoding
(:func:`encode_params`) and the reading of the kernel's counters
(:class:`StateView`) are written here once, for the offline drivers and the
live engine alike; see :mod:`rtstage.engine` for the three phases.
"""

from dataclasses import replace

import numpy as np

from .. import kernel_layout as K
from ..kernel_aot import offline_kernel
from ..kernel_layout import container_bits_of, word_dtype
from ..dither import DITHER_BY_CODE, DITHER_KINDS, feedback_peak_lsb
from ..errors import RtstageError
from ..settings import (ERROR_CEILING_DBFS, GAIN_RAMP_SECONDS, MAX_CHANNELS, MAX_SAMPLERATE, MIN_SAMPLERATE,
                        MONITOR_MODES)


FORMAT_BITS = (16, 24, 32)
"""Sample formats in bits (``format_bits``): 16 (words in int16), 24 and 32 (words left-justified in int32).

One vocabulary across rtstage: ``format_bits`` is the sample format of files and
devices (16, 24 or 32), ``container_bits`` the integer the words travel in
(16 or 32, :func:`rtstage.kernel.container_bits_of`), ``bits`` the word length.
"""


def smallest_format_bits(bits):
    """Smallest sample format (16 or 24 bits) that holds a ``bits``-bit word."""
    return 16 if bits <= 16 else 24


def check_word_fits(bits, format_bits, exact=False):
    """Raise :class:`RtstageError` unless a ``bits``-bit word may use the ``format_bits``-bit sample format.

    The one rule: a word fits a format at least as wide as
    :func:`smallest_format_bits` of it.  With ``exact`` (a live stream, whose device
    format is fixed when it opens) the word must need exactly this format:
    a 16-bit stream takes words of at most 16 bits, a 24-bit one words of 17
    to 24 bits.
    """
    need = smallest_format_bits(bits)
    if need > format_bits or (exact and need != format_bits):
        if exact:
            allowed = "at most 16" if format_bits == 16 else "17 to 24"
        else:
            allowed = "at most 16" if format_bits == 16 else "at most 24"
        raise RtstageError(f"bits={bits} does not fit this engine's {format_bits}-bit output ({allowed} bits)")


class StateView:
    """Read access to kernel state: the one place the kernel's counters and applied parameters are read.

    Parameters
    ----------
    state : rtstage.kernel.KernelState
        The arrays (the engine's own, or views into the live shared block).
    """

    def __init__(self, state):
        self.state = state

    @property
    def frame(self):
        """Sample index of the next frame to be processed."""
        return int(self.state.clock[K.CLK_FRAME])

    @property
    def clipped(self):
        """Clipped samples per channel since the start."""
        return self.state.counts[:, K.CNT_CLIPPED].copy()

    @property
    def nonfinite(self):
        """Replaced NaN/Inf samples per channel since the start."""
        return self.state.counts[:, K.CNT_NONFINITE].copy()

    @property
    def auto_muted(self):
        """Per channel: True while auto-mute holds the channel muted."""
        return self.state.counts[:, K.CNT_AM_MUTED] != 0

    @property
    def auto_muted_frames(self):
        """Frames per channel during which auto-mute held the channel muted, since the start."""
        return self.state.counts[:, K.CNT_AM_FRAMES].copy()

    def meter_key(self):
        """(bits, dither id, dither scale, shaper taps, out_shift) of the parameters the kernel holds now.

        The decoding of :func:`encode_params` for what the meters need; on
        live memory, read it only while no parameter change is being taken.
        """
        iparams, fparams = self.state.iparams, self.state.fparams
        ntaps = int(iparams[K.IP_NTAPS])
        return (
            int(iparams[K.IP_BITS]),
            DITHER_BY_CODE[int(iparams[K.IP_DITHER])].id,
            float(fparams[K.FP_DITHER_SCALE]),
            tuple(float(h) for h in fparams[K.FP_COEF0 : K.FP_COEF0 + ntaps]),
            int(iparams[K.IP_OUT_SHIFT]),
        )


class Engine(StateView):
    """Requantizer for ``channels`` channels at ``samplerate``: settings in, encoded parameters and state owned.

    The offline drivers call :meth:`process`; the live engine moves the state
    into its shared block with :meth:`use_memory` and lets the compiled
    callback run the kernel on it.  Either way this object is the one that
    validates settings, checks the container, encodes parameters and reads
    the counters.

    Parameters
    ----------
    settings : EngineSettings
        Word length, dither, shaper, seed, gain.  A missing seed is drawn here
        and can be read back from ``engine.settings.seed``.
    channels : int
        Channel count, 1..64.
    samplerate : int
        Sample rate in Hz, 8000..384000.
    format_bits : int or None
        Output sample format in bits (16, 24 or 32); None picks the smallest
        of 16 and 24 that holds ``bits``.  24-bit words are left-justified in
        int32.
    start_frame : int
        Sample index of the first frame (dither is a function of it).
    exact_format : bool
        Later word lengths must need exactly this format (a live stream;
        see :func:`check_word_fits`).
    """

    def __init__(self, settings, channels, samplerate, format_bits=None, start_frame=0, exact_format=False):
        if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or not 1 <= channels <= MAX_CHANNELS:
            raise RtstageError(f"channel count must be between 1 and {MAX_CHANNELS}, got {channels}")
        if (isinstance(samplerate, bool) or not isinstance(samplerate, (int, float, np.integer, np.floating))
                or not MIN_SAMPLERATE <= samplerate <= MAX_SAMPLERATE):
            raise RtstageError(f"sample rate must be between {MIN_SAMPLERATE} and {MAX_SAMPLERATE} Hz, got {samplerate}")
        self.settings = settings.resolved(samplerate)
        self.channels = int(channels)
        self.samplerate = samplerate
        self.format_bits = smallest_format_bits(self.settings.bits) if format_bits is None else int(format_bits)
        if self.format_bits not in FORMAT_BITS:
            raise RtstageError(f"sample format must be one of {', '.join(map(str, FORMAT_BITS))} bits, got {self.format_bits}")
        check_word_fits(self.settings.bits, self.format_bits)
        self.exact_format = bool(exact_format)
        self.dtype = word_dtype(self.format_bits)
        super().__init__(K.KernelState(self.channels))
        self._publish = None
        self._no_tap = np.empty((0, self.channels), dtype=np.float64)
        self.process_block = offline_kernel()
        """The kernel this engine's :meth:`process` calls: :func:`rtstage.kernel.process_block`, built ahead of
        time when a current build exists (:mod:`rtstage.kernel_aot`), else through numba."""
        self.apply(self.settings, ramp=False)
        self.state.reset(start_frame)
        # Load the kernel now, on a block of no frames (which changes nothing), so that the first real
        # block does not pay numba's cache load (a few tenths of a second) inside a timed path.
        self.process_block(np.zeros((0, self.channels)), np.zeros((0, self.channels), dtype=self.dtype), self._no_tap,
                           0, *self.state.arrays())  # fmt: skip

    @property
    def container_bits(self):
        """Bits of the integer each word is stored in: 16 or 32."""
        return container_bits_of(self.format_bits)

    @property
    def full_scale(self):
        """Full scale of the stored words, 2^(container_bits-1)."""
        return float(2 ** (self.container_bits - 1))

    @property
    def out_shift(self):
        """Left shift from the word to its container."""
        return self.container_bits - self.settings.bits

    def check_bits(self, bits):
        """Raise :class:`RtstageError` when this engine cannot switch to ``bits``-bit words."""
        check_word_fits(bits, self.format_bits, exact=self.exact_format)

    def use_memory(self, state, publish=None):
        """Move the state into ``state`` (for instance views into the live shared block) and work there.

        Parameters
        ----------
        state : rtstage.kernel.KernelState
            Arrays of this engine's channel count; the current parameters and
            state are copied into them.
        publish : callable or None
            ``publish(iparams, fparams) -> int``: how later parameter changes
            reach the kernel once something else runs it (the live seqlock);
            :meth:`apply` then returns its sequence number.  None: changes are
            written in place, as offline.
        """
        for mine, theirs in zip(self.state.arrays(), state.arrays()):
            theirs[...] = mine
        self.state = state
        self._publish = publish
        if publish is not None:
            self._new_ip = np.zeros(K.IP_LEN, dtype=np.int64)
            self._new_fp = np.zeros(K.FP_LEN, dtype=np.float64)
        return self

    def accept(self, settings):
        """``settings`` resolved for this engine (its seed kept), or RtstageError when the word does not fit."""
        settings = replace(settings, seed=self.settings.seed).resolved(self.samplerate)
        self.check_bits(settings.bits)
        return settings

    def apply(self, settings, ramp=True):
        """Load new settings at the next block boundary; gain changes ramp unless ``ramp`` is False.

        The word length may not change the container (a 16-bit engine cannot
        switch to 20 bits).  The seed is kept from the engine's start.

        Returns
        -------
        int or None
            With a ``publish`` hook (:meth:`use_memory`), its sequence number
            for the change; otherwise None (the change is in place).
        """
        settings = self.accept(settings)
        self.settings = settings
        if self._publish is not None:
            encode_params(settings, self.samplerate, self.out_shift, self._new_ip, self._new_fp)
            return int(self._publish(self._new_ip, self._new_fp))
        st = self.state
        encode_params(settings, self.samplerate, self.out_shift, st.iparams, st.fparams)
        if not ramp:
            st.settle()
        return None

    def process(self, x, out=None, quantizer_in=None, requantized=None):
        """Requantize a block ``x`` of shape (frames, channels), float32 or float64.

        Returns the output words, shape (frames, channels), int16 for a 16-bit
        container and left-justified int32 otherwise: the monitored signal
        (the requantized words unless ``monitor`` says otherwise).  Pass
        ``out`` to reuse an array; then nothing is allocated.  Pass
        ``quantizer_in`` (float64, at least as many rows as ``x``) to receive
        ``x·gain`` as the quantizer saw it, for meters, and ``requantized``
        (the output dtype, at least as many rows) to receive the requantized
        words whatever the monitor mode and mute.
        """
        x = np.asarray(x)
        if x.ndim != 2 or x.shape[1] != self.channels:
            raise RtstageError(f"expected a block of shape (frames, {self.channels}), got {x.shape}")
        if x.dtype not in (np.float32, np.float64):
            x = x.astype(np.float64)
        if out is None:
            out = np.empty(x.shape, dtype=self.dtype)
        if quantizer_in is None:
            quantizer_in = self._no_tap
        if requantized is None:
            self.process_block(x, out, quantizer_in, x.shape[0], *self.state.arrays())
        else:
            if requantized.dtype != out.dtype or requantized.ndim != 2 or requantized.shape[0] < x.shape[0]:
                raise RtstageError("requantized must be an array of the output dtype with at least as many rows as x")
            self.process_block(x, out, quantizer_in, x.shape[0], *self.state.arrays(), requantized)
        return out


def encode_params(settings, samplerate, out_shift, iparams, fparams):
    """Write resolved ``settings`` into kernel parameter arrays.

    Parameters
    ----------
    settings : EngineSettings
        Resolved settings (concrete seed, :class:`Shaper` object).
    samplerate : int
        Sample rate in Hz (sets the gain-ramp length).
    out_shift : int
        Left shift from the word to its container.
    iparams, fparams : ndarray
        Arrays laid out as ``rtstage.kernel.IP_*`` / ``FP_*``; the live engine
        passes its pending parameter block here, the offline engine its own.
    """
    kind = DITHER_KINDS[settings.dither]
    shaper = settings.shaper
    iparams[K.IP_BITS] = settings.bits
    iparams[K.IP_DITHER] = kind.code
    iparams[K.IP_NTAPS] = shaper.ntaps
    iparams[K.IP_SEED] = np.uint64(settings.seed).view(np.int64)
    iparams[K.IP_OUT_SHIFT] = out_shift
    iparams[K.IP_RAMP_FRAMES] = max(1, round(GAIN_RAMP_SECONDS * samplerate))
    fparams[K.FP_COEF0 : K.FP_COEF0 + K.MAX_TAPS] = 0.0
    fparams[K.FP_COEF0 : K.FP_COEF0 + shaper.ntaps] = shaper.coefs
    fparams[K.FP_DITHER_SCALE] = settings.dither_scale
    fparams[K.FP_FEEDBACK_PEAK] = feedback_peak_lsb(kind, settings.dither_scale)
    fparams[K.FP_GAIN] = 10.0 ** (settings.gain_db / 20.0)
    iparams[K.IP_MONITOR] = MONITOR_MODES.index(settings.monitor)
    iparams[K.IP_MUTE] = 1 if settings.mute else 0
    iparams[K.IP_AUTO_MUTE] = 1 if settings.auto_mute else 0
    iparams[K.IP_HOLD_FRAMES] = max(1, round(settings.auto_mute_hold_s * samplerate))
    fparams[K.FP_ERROR_GAIN] = 10.0 ** (settings.error_gain_db / 20.0)
    fparams[K.FP_ERROR_CEIL] = 10.0 ** (ERROR_CEILING_DBFS / 20.0)
