"""Play the sequence and record what comes back, in one duplex stream with a compiled callback.

``rtstage linktest run`` opens one PortAudio duplex stream (output device D,
input device D2, same host API) whose callback is a numba ``cfunc`` called
by PortAudio directly, as in the live engine (:mod:`rtstage.live.cfunc`): it
copies the next words of the prepared sequence into the output buffer and the
input buffer into a preallocated capture array, advances one counter, and
returns ``paComplete`` after the last frame.  No Python, no GIL, no
allocation, no lock and no I/O run in the callback.  Output and input run on
one sample clock, so the latency the analyser reads from the capture is the
round trip of the path from D back to D2, exact to the frame.

Output words are integers (int16, or left-justified int32 for words of 17 to
24 bits) with PortAudio's clipping and dithering off, as in the live engine;
input is float32, which holds any word of up to 24 bits exactly (PortAudio's
integer conversions of input scale by 2^31 - 1 and would change words).

Caution: the sequence is full-scale noise; keep monitoring down or off while
it plays, and follow local codes and licensed practice for listening levels.
"""

import os
import time

os.environ.setdefault("JACK_NO_START_SERVER", "1")  # never let PortAudio's JACK client start a server

import numpy as np  # noqa: E402
from numba import carray, cfunc, njit  # noqa: E402

from ..errors import RtstageError  # noqa: E402
from ..live._ptr import address_to_voidptr, voidptr_to_address  # noqa: E402
from ..live.pa_abi import CALLBACK_SIGNATURE, PA_COMPLETE, PA_CONTINUE, PA_INPUT_OVERFLOW, PA_OUTPUT_UNDERFLOW  # noqa: E402
from . import sequence as seq  # noqa: E402
from .writer import left_justified  # noqa: E402

# Control array slots (int64).
L_PLAY = 0        # address of the words to play, (total, out_channels), int16 or int32
L_CAPTURE = 1     # address of the capture, (total, in_channels), float32
L_POS = 2         # frames done
L_TOTAL = 3       # frames to play and record
L_OUT_CH = 4
L_IN_CH = 5
L_OUT16 = 6       # 1: int16 output, 0: int32
L_CALLBACKS = 7
L_FLAGGED = 8     # callbacks with any status flag
L_IN_OVERFLOW = 9
L_OUT_UNDERFLOW = 10
L_LEN = 16

@njit(nogil=True, error_model="numpy")
def loop_core(in_addr, out_addr, frames, status_flags, ctl_addr):
    """One callback on raw addresses: play, record, count; returns paContinue or paComplete."""
    ctl = carray(address_to_voidptr(ctl_addr), (L_LEN,), np.int64)
    ctl[L_CALLBACKS] += 1
    if status_flags != 0:
        ctl[L_FLAGGED] += 1
        if status_flags & PA_INPUT_OVERFLOW:
            ctl[L_IN_OVERFLOW] += 1
        if status_flags & PA_OUTPUT_UNDERFLOW:
            ctl[L_OUT_UNDERFLOW] += 1
    total = ctl[L_TOTAL]
    pos = ctl[L_POS]
    nout = ctl[L_OUT_CH]
    nin = ctl[L_IN_CH]
    n = min(frames, total - pos)
    if n < 0:
        n = 0
    if ctl[L_OUT16] != 0:
        play16 = carray(address_to_voidptr(ctl[L_PLAY]), (total, nout), np.int16)
        out16 = carray(address_to_voidptr(out_addr), (frames, nout), np.int16)
        for i in range(n):
            for c in range(nout):
                out16[i, c] = play16[pos + i, c]
        for i in range(n, frames):
            for c in range(nout):
                out16[i, c] = 0
    else:
        play32 = carray(address_to_voidptr(ctl[L_PLAY]), (total, nout), np.int32)
        out32 = carray(address_to_voidptr(out_addr), (frames, nout), np.int32)
        for i in range(n):
            for c in range(nout):
                out32[i, c] = play32[pos + i, c]
        for i in range(n, frames):
            for c in range(nout):
                out32[i, c] = 0
    if in_addr != 0:
        cap = carray(address_to_voidptr(ctl[L_CAPTURE]), (total, nin), np.float32)
        inp = carray(address_to_voidptr(in_addr), (frames, nin), np.float32)
        for i in range(n):
            for c in range(nin):
                cap[pos + i, c] = inp[i, c]
    ctl[L_POS] = pos + n
    if pos + n >= total:
        return PA_COMPLETE
    return PA_CONTINUE


def _callback(input_ptr, output_ptr, frames, time_info, status_flags, user_data):
    return loop_core(voidptr_to_address(input_ptr), voidptr_to_address(output_ptr), frames, status_flags,
                     voidptr_to_address(user_data))


_BUILT = {}


def compile_loop_callback():
    """Compile the play-and-record callback as a numba ``cfunc`` (``error_model="numpy"``: no raising path)."""
    return cfunc(CALLBACK_SIGNATURE, nopython=True, error_model="numpy")(_callback)


def build_loop_callback():
    """The compiled PortAudio callback (a numba ``CFunc``; ``.address`` goes to PortAudio)."""
    if "cfunc" not in _BUILT:
        _BUILT["cfunc"] = compile_loop_callback()
    return _BUILT["cfunc"]


class LoopBuffers:
    """The words to play and the capture array, with the control array the callback reads.

    Parameters
    ----------
    words : numpy.ndarray
        N-bit integer words, shape ``(frames, out_channels)``.
    bits : int
        Word length N (chooses int16 or left-justified int32 output).
    in_channels : int
        Channels recorded.
    preroll_frames, tail_frames : int
        Digital silence played before and after the sequence (and recorded).
    """

    def __init__(self, words, bits, in_channels, preroll_frames=0, tail_frames=0):
        nout = words.shape[1]
        total = int(preroll_frames) + words.shape[0] + int(tail_frames)
        self.out16 = int(bits) <= 16
        dtype = np.int16 if self.out16 else np.int32
        self.play = np.zeros((total, nout), dtype=dtype)
        body = words.astype(np.int32) << (16 - int(bits)) if self.out16 else left_justified(words, bits)
        self.play[preroll_frames : preroll_frames + words.shape[0]] = body.astype(dtype)
        self.capture = np.zeros((total, int(in_channels)), dtype=np.float32)
        self.ctl = np.zeros(L_LEN, dtype=np.int64)
        self.ctl[L_PLAY] = self.play.ctypes.data
        self.ctl[L_CAPTURE] = self.capture.ctypes.data
        self.ctl[L_TOTAL] = total
        self.ctl[L_OUT_CH] = nout
        self.ctl[L_IN_CH] = int(in_channels)
        self.ctl[L_OUT16] = 1 if self.out16 else 0

    @property
    def address(self):
        """Address of the control array (the callback's userdata)."""
        return int(self.ctl.ctypes.data)

    @property
    def frames_done(self):
        return int(self.ctl[L_POS])

    @property
    def total(self):
        return int(self.ctl[L_TOTAL])

    def counters(self):
        """Callback counters as a dict."""
        return {"callbacks": int(self.ctl[L_CALLBACKS]), "flagged_callbacks": int(self.ctl[L_FLAGGED]),
                "input_overflows": int(self.ctl[L_IN_OVERFLOW]), "output_underflows": int(self.ctl[L_OUT_UNDERFLOW])}


def warm(cb, bits, in_channels, out_channels, blocksize):
    """Run the compiled callback once on scratch buffers, so nothing compiles or faults in the first real call."""
    import ctypes

    scratch = LoopBuffers(np.zeros((blocksize, out_channels), dtype=np.int32), bits, in_channels)
    width = 2 if scratch.out16 else 4
    out = np.zeros(blocksize * out_channels * width, dtype=np.uint8)
    inp = np.zeros(blocksize * in_channels, dtype=np.float32)
    cb.ctypes(ctypes.c_void_p(inp.ctypes.data), ctypes.c_void_p(out.ctypes.data), blocksize, None, 0,
              ctypes.c_void_p(scratch.address))


def _resolve(output_device, input_device, hostapi):
    """PortAudio indices (output, input) and the host API name; RtstageError when unusable."""
    from ..live.devices import describe_device, find_device, find_hostapi

    api = find_hostapi(hostapi)
    out_index = find_device(output_device, "output", api)
    in_index = find_device(input_device, "input", api)
    out_name, out_api = describe_device(out_index)
    in_name, in_api = describe_device(in_index)
    if out_api != in_api:
        raise RtstageError(f"output device '{out_name}' ({out_api}) and input device '{in_name}' ({in_api}) are on "
                           "different host APIs; the link test needs one duplex stream")
    return out_index, in_index, out_name, in_name, out_api


def play_and_record(words, bits, samplerate, output_device=None, input_device=None, hostapi=None, in_channels=None,
                    blocksize=256, latency=None, preroll_s=0.5, tail_s=0.5, log=None, on_open=None):
    """Play ``words`` on the output device and record the input device at once.

    Parameters
    ----------
    words : numpy.ndarray
        The sequence, N-bit integers, shape ``(frames, channels)``.
    bits : int
        Word length N.
    samplerate : int
        Sample rate in Hz.
    output_device, input_device : str or int or None
        Devices (index or name, as ``rtstage run``); None: the host API's default.
    hostapi : str or int or None
        Host API to choose devices from.
    in_channels : int or None
        Channels to record (default: as many as played).
    blocksize : int
        Frames per callback (fixed).
    latency : float or None
        Suggested device latency in seconds.
    preroll_s, tail_s : float
        Digital silence before and after the sequence, in seconds; the tail
        must exceed the path's latency, or the end of the sequence is not
        recorded.
    log : callable or None
        Receives one-line messages.
    on_open : callable or None
        Called with the stream after it started (tests use it to wire ports).

    Returns
    -------
    (numpy.ndarray, dict)
        The capture as float64 (full scale 1.0), shape ``(frames, in_channels)``,
        and the stream's figures (device names, latency, callback counters).
    """
    from ..live.stream import close_stream, reinitialize_portaudio
    import sounddevice as sd

    reinitialize_portaudio()
    out_index, in_index, out_name, in_name, api_name = _resolve(output_device, input_device, hostapi)
    nout = words.shape[1]
    nin = int(in_channels or nout)
    buffers = LoopBuffers(words, bits, nin, int(round(preroll_s * samplerate)), int(round(tail_s * samplerate)))
    cb = build_loop_callback()
    warm(cb, bits, nin, nout, int(blocksize))
    ffi = sd._ffi
    try:
        stream = sd._StreamBase(
            kind="duplex", samplerate=int(samplerate), blocksize=int(blocksize), device=(in_index, out_index),
            channels=(nin, nout), dtype=("float32", "int16" if buffers.out16 else "int32"), latency=latency,
            callback=ffi.cast("PaStreamCallback *", cb.address), userdata=ffi.cast("void *", buffers.address),
            clip_off=True, dither_off=True, wrap_callback=None)
    except (sd.PortAudioError, ValueError) as exc:
        raise RtstageError(f"cannot open the duplex stream ({out_name} -> {in_name}, {api_name}): {exc}") from None
    figures = {"output_device": out_name, "input_device": in_name, "hostapi": api_name, "samplerate": int(samplerate),
               "blocksize": int(blocksize)}
    try:
        stream.start()
        figures["stream_latency_s"] = list(stream.latency)
        if log:
            log(f"playing {words.shape[0]} frames to '{out_name}', recording '{in_name}' ({api_name})")
        if on_open is not None:
            on_open(stream)
        deadline = time.monotonic() + buffers.total / samplerate + 30.0
        last = (-1, time.monotonic())
        while stream.active and buffers.frames_done < buffers.total:
            now = time.monotonic()
            done = buffers.frames_done
            if done != last[0]:
                last = (done, now)
            elif now - last[1] > 5.0:
                raise RtstageError(f"the stream stopped moving after {done} of {buffers.total} frames")
            if now > deadline:
                raise RtstageError("the stream did not finish in time")
            time.sleep(0.02)
    finally:
        close_stream(stream, abort=False)
    figures.update(buffers.counters())
    figures["frames_recorded"] = buffers.frames_done
    return buffers.capture[: buffers.frames_done].astype(np.float64), figures


def run_linktest(seed, bits, samplerate, channels, frames, **kwargs):
    """Generate, play and record; returns ``(capture, figures)`` (see :func:`play_and_record`)."""
    words = seq.sequence_words(seed, bits, samplerate, channels, frames)
    return play_and_record(words, bits, samplerate, **kwargs)
