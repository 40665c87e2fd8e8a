"""Opening and closing the PortAudio stream through sounddevice.

The stream is a :class:`sounddevice._StreamBase` (documented by sounddevice
for library authors) given the compiled callback as a C function pointer and
the shared table's address as userdata.  Output words are integers (int16, or
left-justified int32 for 17..24-bit words); input, when the device is the
source, is float32.  PortAudio's clipping and dithering are off
(``paClipOff | paDitherOff``), so no conversion inside PortAudio changes a word.
"""

import os

os.environ.setdefault("JACK_NO_START_SERVER", "1")  # PortAudio's JACK client must never start a server itself

import sounddevice as sd  # noqa: E402

from ..errors import RtstageError  # noqa: E402
from .cfunc import build_callback, callback_core  # noqa: E402
from .packing import C_PACKED24  # noqa: E402


def reinitialize_portaudio():
    """Terminate and initialise PortAudio again, so that it sees devices and servers as they are now."""
    try:
        sd._terminate()
    except Exception:
        pass
    sd._initialize()


def _python_callback(table_addr):
    """Diagnostic mode: a cffi (Python) callback calling the same compiled core."""
    ffi = sd._ffi

    def callback(input_ptr, output_ptr, frames, time_info, status_flags, user_data):
        return callback_core(int(ffi.cast("intptr_t", input_ptr)), int(ffi.cast("intptr_t", output_ptr)),
                             frames, status_flags, table_addr)

    return ffi.callback("PaStreamCallback", error=sd._lib.paAbort)(callback)


def open_stream(block, samplerate, blocksize, output_device, input_device=None, latency=None, mode="compiled"):
    """Open (not start) a stream feeding ``block``'s callback.

    Parameters
    ----------
    block : SharedBlock
        Shared arrays; its table's address is the userdata.
    samplerate : int
        Sample rate in Hz.
    blocksize : int
        Frames per callback (fixed).
    output_device : int
        PortAudio device index for output.
    input_device : int or None
        Device index for input; None opens an output-only stream.
    latency : float or None
        Suggested latency in seconds; None takes sounddevice's default.
    mode : {'compiled', 'python'}
        ``compiled``: the numba cfunc (the default and the only real-time
        mode); ``python``: a cffi Python callback around the same core, for
        diagnosis.

    Returns
    -------
    sounddevice._StreamBase
    """
    ffi = sd._ffi
    if mode == "compiled":
        callback = ffi.cast("PaStreamCallback *", build_callback().address)
    elif mode == "python":
        callback = _python_callback(block.address)
    else:
        raise RtstageError(f"unknown callback mode '{mode}' (compiled, python)")
    userdata = ffi.cast("void *", block.address)
    out_dtype = "int16" if block.out_dtype.__name__ == "int16" else "int32"
    if int(block.ctl[C_PACKED24]):  # packed three-byte samples (rtstage.live.packing)
        out_dtype = "int24"
    nch = block.channels
    try:
        if input_device is None:
            stream = sd._StreamBase(
                kind="output", samplerate=samplerate, blocksize=blocksize, device=output_device, channels=nch,
                dtype=out_dtype, latency=latency, callback=callback, userdata=userdata, clip_off=True, dither_off=True,
                wrap_callback=None)
        else:
            stream = sd._StreamBase(
                kind="duplex", samplerate=samplerate, blocksize=blocksize, device=(input_device, output_device),
                channels=(nch, nch), dtype=("float32", out_dtype), latency=latency, callback=callback,
                userdata=userdata, clip_off=True, dither_off=True, wrap_callback=None)
    except (sd.PortAudioError, ValueError) as exc:
        raise RtstageError(f"cannot open the audio stream: {exc}") from None
    stream._rtstage_callback = callback  # keep the cffi object alive as long as the stream
    return stream


def close_stream(stream, abort=False):
    """Stop (or abort) and close ``stream``, ignoring errors from a device that is already gone."""
    if stream is None:
        return
    try:
        if abort:
            stream.abort(ignore_errors=True)
        else:
            stream.stop(ignore_errors=True)
    except Exception:
        pass
    try:
        stream.close(ignore_errors=True)
    except Exception:
        pass
