"""RIFF/RF64/AIFF chunk reading and broadcast metadata carry (rtstage/files/riff.py).

Files are built here byte by byte from the published layouts (EBU Tech 3285
for bext, EBU Tech 3306 for ds64, the AIFF 1.3 specification), and read back
with independent readers: libsndfile through soundfile for frame counts,
the ``wavinfo`` package for bext, iXML and INFO.
"""

import struct

import numpy as np
import pytest
import soundfile as sf
from wavinfo import WavInfoReader

from rtstage.files import riff


def wav_bytes(frames, channels=2, bits=16, samplerate=48000, extra=(), declared=None, container=b"RIFF"):
    """A PCM WAV file: RIFF header, 'fmt ' (16 bytes), extra chunks, 'data' (declared size may lie)."""
    block = channels * bits // 8
    data = bytes(frames * block)
    fmt = struct.pack("<HHIIHH", 1, channels, samplerate, samplerate * block, block, bits)
    body = b"WAVE" + b"fmt " + struct.pack("<I", 16) + fmt
    for cid, payload in extra:
        body += cid + struct.pack("<I", len(payload)) + payload + (b"\0" if len(payload) & 1 else b"")
    size = len(data) if declared is None else declared * block
    body += b"data" + struct.pack("<I", size) + data
    return container + struct.pack("<I", len(body)) + body


def bext_payload(history=b"A=PCM,F=48000,W=24,M=stereo,T=studio desk\r\n"):
    """A bext chunk, version 2, every fixed field set (EBU Tech 3285 v2 layout)."""
    fixed = struct.pack(
        "<256s32s32s10s8sQH64shhhhh180s",
        b"Overnight feed, studio 2", b"studio desk", b"REF-0042", b"2026-11-30", b"23-59-58",
        48000 * 3600, 2, bytes(range(64)), -2300, 550, -120, -1800, -2000, b"",
    )
    assert len(fixed) == 602  # EBU Tech 3285 v2: 602 bytes before CodingHistory
    return fixed + history


def test_declared_and_present_frames_of_a_truncated_wav(tmp_path):
    path = tmp_path / "cut.wav"
    path.write_bytes(wav_bytes(1000, declared=1000)[:-400])  # 400 bytes = 100 stereo 16-bit frames missing
    layout = riff.scan(path)
    assert layout.declared_frames == 1000
    assert layout.present_frames == 900
    # libsndfile reads what is present and says nothing about the rest.
    assert sf.info(str(path)).frames == 900
    with pytest.raises(riff.InputRefused, match="declares 1000 frames, the file holds 900"):
        riff.check_input(path)
    warnings = []
    assert riff.check_input(path, accept_truncated=True, warn=warnings.append).present_frames == 900
    assert len(warnings) == 1 and warnings[0].startswith("warning:")


def test_whole_wav_and_zero_frames(tmp_path):
    path = tmp_path / "ok.wav"
    sf.write(str(path), np.zeros((480, 3)), 48000, subtype="PCM_24")
    layout = riff.check_input(path)
    info = sf.info(str(path))
    assert (layout.channels, layout.samplerate, layout.declared_frames, layout.present_frames) == (
        info.channels, info.samplerate, info.frames, info.frames)
    empty = tmp_path / "empty.wav"
    empty.write_bytes(wav_bytes(0))
    assert sf.info(str(empty)).frames == 0
    with pytest.raises(riff.InputRefused, match="holds no audio frames"):
        riff.check_input(empty)


def test_streaming_size_is_not_called_truncation(tmp_path):
    # A writer that cannot seek back leaves 0xFFFFFFFF in the data size (common practice of streaming encoders).
    raw = bytearray(wav_bytes(100))
    raw[40:44] = struct.pack("<I", 0xFFFFFFFF)
    path = tmp_path / "stream.wav"
    path.write_bytes(bytes(raw))
    layout = riff.check_input(path)
    assert layout.declared_frames is None and layout.present_frames == 100


def test_rf64_sizes_come_from_ds64(tmp_path):
    path = tmp_path / "a.rf64"
    sf.write(str(path), np.zeros((300, 2)), 48000, subtype="PCM_16", format="RF64")
    data = path.read_bytes()
    assert data[:4] == b"RF64"
    layout = riff.scan(path)
    assert layout.declared_frames == layout.present_frames == sf.info(str(path)).frames == 300
    path.write_bytes(data[:-40])
    assert riff.scan(path).truncated and riff.scan(path).present_frames == 290


def test_aiff_declared_and_present(tmp_path):
    path = tmp_path / "a.aiff"
    sf.write(str(path), np.zeros((500, 2)), 44100, subtype="PCM_24", format="AIFF")
    layout = riff.scan(path)
    assert (layout.samplerate, layout.declared_frames, layout.present_frames) == (44100.0, 500, 500)
    path.write_bytes(path.read_bytes()[:-60])  # 10 frames of 2 x 3 bytes
    layout = riff.scan(path)
    assert (layout.declared_frames, layout.present_frames) == (500, 490)
    assert sf.info(str(path)).frames == 490


def test_non_riff_files_are_left_to_libsndfile(tmp_path):
    path = tmp_path / "a.flac"
    sf.write(str(path), np.zeros((10, 1)), 48000, subtype="PCM_16")
    assert riff.scan(path) is None and riff.check_input(path) is None


def test_bext_ixml_info_carried_field_by_field(tmp_path):
    ixml = b'<?xml version="1.0"?><BWFXML><PROJECT>night-feed</PROJECT><SCENE>2</SCENE></BWFXML>'
    info = b"INFO" + b"INAM" + struct.pack("<I", 12) + b"Night feed\0\0" + b"ICOP" + struct.pack("<I", 6) + b"(c) x\0"
    src = tmp_path / "src.wav"
    src.write_bytes(wav_bytes(200, extra=[(b"bext", bext_payload()), (b"iXML", ixml), (b"LIST", info),
                                          (b"LIST", b"adtlnote")]))
    carried = riff.carried_chunks(src)
    assert [cid for cid, _ in carried] == ["bext", "iXML", "LIST"]  # the adtl LIST is not INFO
    line = riff.coding_history_line(48000, 16, 2, "rtstage 0.2 TPDF thr9-48k seed 41")
    assert line == "A=PCM,F=48000,W=16,M=stereo,T=rtstage 0.2 TPDF thr9-48k seed 41\r\n"  # EBU R 98 example form
    chunks = [(cid, riff.append_coding_history(p, line) if cid == "bext" else p) for cid, p in carried]
    out = tmp_path / "out.wav"
    sf.write(str(out), np.zeros((200, 2)), 48000, subtype="PCM_16")
    riff.append_chunks(out, chunks)
    a, b = WavInfoReader(str(src)), WavInfoReader(str(out))
    for name in ("description", "originator", "originator_ref", "originator_date", "originator_time",
                 "time_reference", "version", "umid", "loudness_value", "loudness_range", "max_true_peak",
                 "max_momentary_loudness", "max_shortterm_loudness"):
        assert getattr(b.bext, name) == getattr(a.bext, name), name
    assert b.bext.coding_history == a.bext.coding_history + line
    assert b.ixml.project == a.ixml.project == "night-feed"
    assert b.info.to_dict() == a.info.to_dict()
    assert b.info.title == "Night feed"
    # The audio is still what libsndfile wrote.
    assert sf.info(str(out)).frames == 200
    assert not riff.scan(out).truncated


def test_new_bext_only_when_asked(tmp_path):
    line = riff.coding_history_line(44100, 16, 1, "rtstage test")
    out = tmp_path / "out.wav"
    sf.write(str(out), np.zeros((10, 1)), 44100, subtype="PCM_16")
    riff.append_chunks(out, [("bext", riff.new_bext(line))])
    b = WavInfoReader(str(out)).bext
    assert b.coding_history == "A=PCM,F=44100,W=16,M=mono,T=rtstage test\r\n"
    assert b.originator == "rtstage" and len(b.originator_date) == 10 and len(b.originator_time) == 8
    plain = tmp_path / "plain.wav"
    sf.write(str(plain), np.zeros((10, 1)), 44100, subtype="PCM_16")
    assert riff.carried_chunks(plain) == []


def test_history_without_final_crlf_and_padding():
    payload = bext_payload(b"A=PCM,F=48000,W=24\0\0\0")
    new = riff.append_coding_history(payload, "A=PCM,F=48000,W=16,M=mono,T=x\r\n")
    assert new[:602] == payload[:602]
    assert new[602:] == b"A=PCM,F=48000,W=24\r\nA=PCM,F=48000,W=16,M=mono,T=x\r\n"


def test_soundfile_text_tags_for_flac_and_aiff(tmp_path):
    for name in ("a.flac", "a.aiff"):
        path = str(tmp_path / name)
        with sf.SoundFile(path, "w", 48000, 1, "PCM_16") as f:
            f.title = "Night feed"
            f.artist = "Studio 2"
            f.write(np.zeros(10))
        with sf.SoundFile(path) as f:
            tags = riff.text_tags(f)
        assert tags["title"] == "Night feed" and tags["artist"] == "Studio 2"
