"""RIFF/RF64/AIFF chunk reading: frames declared against frames present, and broadcast metadata carry.

libsndfile reads a truncated file (a header that declares more audio than the
file holds) without a word: it simply returns fewer frames.  :func:`scan`
walks the chunks itself and reports both counts, so a command can refuse such
a file (:func:`check_input`).

Metadata carried into a WAV output (:func:`carried_chunks`,
:func:`append_chunks`):

* ``bext``, the Broadcast Wave extension (EBU Tech 3285): every field kept
  byte for byte, with one line appended to its CodingHistory
  (:func:`coding_history_line`, the format of EBU R 98);
* ``iXML`` and ``LIST`` chunks of type ``INFO``, unchanged.

The chunks are appended after the output's ``data`` chunk and the RIFF (or
RF64 ``ds64``) size is updated; RIFF readers walk every chunk, wherever it
sits.

References
----------
.. [1] EBU Tech 3285, "Specification of the Broadcast Wave Format (BWF)",
   version 2, 2011 (the ``bext`` chunk layout).
.. [2] EBU R 98, "Format for the <CodingHistory> field in Broadcast Wave
   Format files, BWF", 1999.
.. [3] EBU Tech 3306, "MBWF / RF64: an extended file format for audio", 2009
   (the ``ds64`` chunk).
.. [4] Apple, "Audio Interchange File Format: AIFF", version 1.3, 1989, and
   the AIFF-C draft of 1991 (COMM and SSND chunks).
"""

import os
import struct
from dataclasses import dataclass, field

from ..errors import RtstageError

BEXT_FIXED_BYTES = 602
"""Size of the bext chunk's fixed fields before CodingHistory (EBU Tech 3285 v2: 256+32+32+10+8+8+2+64+10+180)."""

CARRIED_IDS = ("bext", "iXML", "LIST")
"""Chunks carried into a WAV output (LIST only when its type is INFO)."""

_UNKNOWN_SIZES = (0xFFFFFFFF,)


class InputRefused(RtstageError):
    """An input file rtstage will not read (truncated, no audio frames, malformed header); exit status 2."""

    exit_status = 2


@dataclass
class Chunk:
    """One chunk: its id, where its payload starts, its declared size and the bytes actually present."""

    id: str
    offset: int
    size: int
    present: int


@dataclass
class Layout:
    """What the chunk headers of a WAV/RF64/AIFF file say, and what the file holds."""

    path: str
    container: str
    channels: int = 0
    samplerate: float = 0.0
    bits: int = 0
    frame_bytes: int = 0
    declared_frames: object = None
    """Frames the header declares (None when the writer left the size unknown, as streaming writers do)."""
    present_frames: int = 0
    chunks: list = field(default_factory=list)

    @property
    def truncated(self):
        """True when the file holds fewer whole frames than its header declares."""
        return self.declared_frames is not None and self.present_frames < self.declared_frames

    def chunk(self, chunk_id):
        """The first chunk with this id, or None."""
        return next((c for c in self.chunks if c.id == chunk_id), None)


def _walk(f, start, end, file_size, big_endian):
    """Chunks from ``start`` to ``end``: (id, payload offset, declared size, present bytes)."""
    fmt = ">I" if big_endian else "<I"
    pos = start
    chunks = []
    while pos + 8 <= min(end, file_size):
        f.seek(pos)
        head = f.read(8)
        if len(head) < 8:
            break
        cid = head[:4].decode("latin-1")
        size = struct.unpack(fmt, head[4:])[0]
        offset = pos + 8
        chunks.append(Chunk(cid, offset, size, max(0, min(size, file_size - offset))))
        pos = offset + size + (size & 1)
    return chunks


def scan(path):
    """Read the chunk headers of a WAV, RF64/BW64 or AIFF/AIFF-C file.

    Returns
    -------
    Layout or None
        None when the file is none of these (FLAC, Ogg, raw …: libsndfile's
        own checks apply to those).

    Raises
    ------
    InputRefused
        The file starts like one of these containers but its format chunk is
        missing or malformed.
    """
    path = os.fspath(path)
    file_size = os.path.getsize(path)
    with open(path, "rb") as f:
        head = f.read(12)
        if len(head) < 12:
            return None
        magic, form = head[:4], head[8:12]
        if magic in (b"RIFF", b"RF64", b"BW64") and form == b"WAVE":
            return _scan_wave(f, path, magic.decode(), file_size)
        if magic == b"FORM" and form in (b"AIFF", b"AIFC"):
            return _scan_aiff(f, path, form.decode(), file_size)
    return None


def _scan_wave(f, path, container, file_size):
    layout = Layout(path, "WAV" if container == "RIFF" else container)
    layout.chunks = _walk(f, 12, file_size, file_size, big_endian=False)
    fmt = layout.chunk("fmt ")
    if fmt is None or fmt.present < 16:
        raise InputRefused(f"{path}: WAV file without a complete 'fmt ' chunk")
    f.seek(fmt.offset)
    _tag, channels, samplerate, _byterate, block_align, bits = struct.unpack("<HHIIHH", f.read(16))
    if channels == 0 or block_align == 0:
        raise InputRefused(f"{path}: WAV 'fmt ' chunk declares {channels} channels and {block_align}-byte frames")
    layout.channels, layout.samplerate, layout.bits, layout.frame_bytes = channels, float(samplerate), bits, block_align
    data = layout.chunk("data")
    if data is None:
        layout.declared_frames, layout.present_frames = 0, 0
        return layout
    declared = data.size
    if container in ("RF64", "BW64") and data.size == 0xFFFFFFFF:
        ds64 = layout.chunk("ds64")
        if ds64 is not None and ds64.present >= 16:
            f.seek(ds64.offset)
            _riff_size, declared = struct.unpack("<QQ", f.read(16))
    present = max(0, min(declared, file_size - data.offset))
    data.size, data.present = declared, present
    if container == "RIFF" and declared in _UNKNOWN_SIZES:
        layout.declared_frames = None
        present = file_size - data.offset
    else:
        layout.declared_frames = declared // block_align
    layout.present_frames = present // block_align
    return layout


def _extended_to_float(b):
    """An 80-bit IEEE 754 extended value (AIFF sample rate) as a float."""
    exponent, mantissa = struct.unpack(">HQ", b)
    sign = -1.0 if exponent & 0x8000 else 1.0
    exponent &= 0x7FFF
    if exponent == 0 and mantissa == 0:
        return 0.0
    return sign * mantissa * 2.0 ** (exponent - 16383 - 63)


_AIFC_SAMPLE_BYTES = {b"fl32": 4, b"FL32": 4, b"fl64": 8, b"FL64": 8, b"ulaw": 1, b"ULAW": 1, b"alaw": 1, b"ALAW": 1}


def _scan_aiff(f, path, form, file_size):
    layout = Layout(path, form)
    layout.chunks = _walk(f, 12, file_size, file_size, big_endian=True)
    comm = layout.chunk("COMM")
    if comm is None or comm.present < 18:
        raise InputRefused(f"{path}: AIFF file without a complete COMM chunk")
    f.seek(comm.offset)
    raw = f.read(min(comm.present, 22))
    channels, frames, bits = struct.unpack(">hIh", raw[:8])
    samplerate = _extended_to_float(raw[8:18])
    compression = raw[18:22] if form == "AIFC" and len(raw) >= 22 else b"NONE"
    sample_bytes = _AIFC_SAMPLE_BYTES.get(compression, (bits + 7) // 8)
    if channels <= 0 or sample_bytes <= 0:
        raise InputRefused(f"{path}: AIFF COMM chunk declares {channels} channels of {bits} bits")
    layout.channels, layout.samplerate, layout.bits = channels, samplerate, bits
    layout.frame_bytes = channels * sample_bytes
    layout.declared_frames = frames
    ssnd = layout.chunk("SSND")
    if ssnd is None or ssnd.present < 8:
        layout.present_frames = 0
        return layout
    f.seek(ssnd.offset)
    data_offset, _block = struct.unpack(">II", f.read(8))
    audio_bytes = max(0, ssnd.present - 8 - data_offset)
    layout.present_frames = min(audio_bytes // layout.frame_bytes, frames)
    return layout


def check_input(path, accept_truncated=False, warn=None):
    """Refuse a file whose data is shorter than its header declares, or which holds no audio frames.

    Parameters
    ----------
    path : str
        The input file (WAV, RF64, AIFF are checked; other formats pass).
    accept_truncated : bool
        Read a truncated file anyway (its present frames), after a warning.
    warn : callable or None
        Called with the warning line when a truncated file is accepted.

    Returns
    -------
    Layout or None
        The layout (None for formats this module does not read).
    """
    layout = scan(path)
    if layout is None:
        return None
    if layout.truncated:
        text = (f"{path} is truncated: its header declares {layout.declared_frames} frames, "
                f"the file holds {layout.present_frames}")
        if not accept_truncated:
            raise InputRefused(f"{text} (--accept-truncated reads what is there)")
        if warn is not None:
            warn(f"warning: {text}; reading the {layout.present_frames} frames present (--accept-truncated)")
    if layout.present_frames == 0:
        raise InputRefused(f"{path} holds no audio frames")
    return layout


# -- metadata carry ------------------------------------------------------------


def carried_chunks(path, layout=None):
    """The chunks a WAV output carries over from ``path``: [(id, payload bytes)] for bext, iXML and LIST-INFO.

    Only complete chunks are carried; a chunk cut off by the end of the file
    is left out.
    """
    layout = layout if layout is not None else scan(path)
    if layout is None or layout.container not in ("WAV", "RF64", "BW64"):
        return []
    out = []
    with open(path, "rb") as f:
        for c in layout.chunks:
            if c.id not in CARRIED_IDS or c.present < c.size:
                continue
            f.seek(c.offset)
            payload = f.read(c.size)
            if c.id == "LIST" and payload[:4] != b"INFO":
                continue
            out.append((c.id, payload))
    return out


def coding_history_line(samplerate, bits, channels, text, algorithm="PCM"):
    """One CodingHistory line in the EBU R 98 format, CR/LF terminated.

    ``A=<algorithm>,F=<sampling frequency>,W=<word length>,M=<mode>,T=<text>``;
    the mode is ``mono`` or ``stereo`` for one or two channels (R 98), and
    ``multichannel`` above (our wording: R 98 names only mono and two-channel
    modes). Commas in the text would start a new field, so they become
    semicolons.

    References
    ----------
    .. [1] EBU R 98, "Format for the <CodingHistory> field in Broadcast Wave
       Format files, BWF", 1999.
    """
    mode = {1: "mono", 2: "stereo"}.get(int(channels), "multichannel")
    text = str(text).replace(",", ";").replace("\r", " ").replace("\n", " ")
    return f"A={algorithm},F={int(round(samplerate))},W={int(bits)},M={mode},T={text}\r\n"


def append_coding_history(bext_payload, line):
    """A bext payload with ``line`` appended to its CodingHistory, every other byte unchanged.

    Trailing NUL padding after the existing history is dropped; an existing
    history that does not end in CR/LF gets one before the new line (EBU R 98
    ends every line with CR/LF).
    """
    if len(bext_payload) < BEXT_FIXED_BYTES:
        bext_payload = bext_payload + b"\0" * (BEXT_FIXED_BYTES - len(bext_payload))
    fixed, history = bext_payload[:BEXT_FIXED_BYTES], bext_payload[BEXT_FIXED_BYTES:]
    history = history.split(b"\0", 1)[0]
    if history and not history.endswith(b"\r\n"):
        history += b"\r\n"
    return fixed + history + line.encode("ascii", "replace")


def new_bext(line, description="", originator="rtstage", date_time=None):
    """A new bext payload (version 1, no UMID, no loudness fields) whose CodingHistory is ``line``.

    ``date_time`` is a :class:`datetime.datetime` (default: now, local time)
    for OriginationDate (yyyy-mm-dd) and OriginationTime (hh-mm-ss), the
    forms EBU Tech 3285 gives.
    """
    import datetime

    when = date_time or datetime.datetime.now()
    fixed = struct.pack(
        "<256s32s32s10s8sQH64s10s180s",
        description.encode("ascii", "replace")[:256],
        originator.encode("ascii", "replace")[:32],
        b"",
        when.strftime("%Y-%m-%d").encode("ascii"),
        when.strftime("%H-%M-%S").encode("ascii"),
        0,
        1,
        b"",
        b"",
        b"",
    )
    assert len(fixed) == BEXT_FIXED_BYTES
    return fixed + line.encode("ascii", "replace")


def append_chunks(path, chunks):
    """Append chunks ``[(id, payload)]`` to a WAV or RF64 file written by libsndfile, updating its size fields.

    Raises
    ------
    RtstageError
        When the file is not WAV/RF64, or a plain RIFF file would pass 4 GiB.
    """
    if not chunks:
        return
    layout = scan(path)
    if layout is None or layout.container not in ("WAV", "RF64", "BW64"):
        raise RtstageError(f"{path}: metadata chunks can only be added to WAV or RF64 files")
    blob = bytearray()
    for cid, payload in chunks:
        blob += cid.encode("latin-1")[:4].ljust(4, b" ") + struct.pack("<I", len(payload)) + payload
        if len(payload) & 1:
            blob += b"\0"
    with open(path, "r+b") as f:
        f.seek(0, os.SEEK_END)
        end = f.tell()
        if end & 1:
            f.write(b"\0")
            end += 1
        f.write(blob)
        riff_size = end + len(blob) - 8
        if layout.container == "WAV":
            if riff_size > 0xFFFFFFFF:
                raise RtstageError(f"{path}: the metadata would take the WAV file past 4 GiB; use an .rf64 output")
            f.seek(4)
            f.write(struct.pack("<I", riff_size))
        else:
            ds64 = layout.chunk("ds64")
            f.seek(4)
            f.write(struct.pack("<I", 0xFFFFFFFF))
            if ds64 is not None:
                f.seek(ds64.offset)
                f.write(struct.pack("<Q", riff_size))
        f.flush()


SOUNDFILE_TAGS = ("title", "copyright", "software", "artist", "comment", "date", "album", "license", "tracknumber", "genre")
"""Text tags soundfile exposes (libsndfile's string fields), carried for FLAC and AIFF outputs."""


def text_tags(sound_file):
    """Non-empty text tags of an open :class:`soundfile.SoundFile`, as a dict."""
    tags = {}
    for name in SOUNDFILE_TAGS:
        try:
            value = getattr(sound_file, name)
        except Exception:  # libsndfile may refuse a field for some formats
            continue
        if value:
            tags[name] = value
    return tags
