"""The output policy and metadata carry as the commands use them.

* ``rtstage render`` carries a Broadcast WAV's bext (EBU Tech 3285), iXML and
  LIST/INFO into its output, read back field by field with the independent
  ``wavinfo`` package, with one CodingHistory line in the EBU R 98 form;
  FLAC/AIFF text tags are carried as libsndfile (soundfile) reads them.
* The socket's ``preset_save`` takes plain names only, stays in the preset
  folder and replaces a preset only when asked.
* Accepting unsafe shaping warns, naming the risk's source and the paper,
  from the command line, a preset, an automation file and the socket.
"""

import os
import struct

import numpy as np
import pytest
import soundfile as sf
from wavinfo import WavInfoReader

from rtstage.cli import main
from rtstage.control.protocol import Controller, PresetStore, RequestError
from rtstage.control.target import EngineTarget
from rtstage.engine import Engine
from rtstage.settings import EngineSettings


def wav_with_chunks(path, x, samplerate, chunks):
    """A 24-bit WAV written by libsndfile, with extra chunks inserted before 'data' (built by hand)."""
    sf.write(path, x, samplerate, subtype="PCM_24")
    raw = open(path, "rb").read()
    data_at = raw.index(b"data")
    extra = b"".join(cid + struct.pack("<I", len(p)) + p + (b"\0" if len(p) & 1 else b"") for cid, p in chunks)
    body = raw[12:data_at] + extra + raw[data_at:]
    open(path, "wb").write(b"RIFF" + struct.pack("<I", len(body) + 4) + b"WAVE" + body)


def bext(history):
    # EBU Tech 3285 v2 layout: 602 bytes of fixed fields, then CodingHistory.
    return struct.pack("<256s32s32s10s8sQH64shhhhh180s", b"Late news, studio 2", b"desk 2", b"NEWS-0043",
                       b"2026-12-01", b"22-00-00", 48000 * 79200, 2, bytes(range(1, 65)), -2310, 420, -150,
                       -1500, -1900, b"") + history


@pytest.fixture
def programme():
    rng = np.random.default_rng(98)
    return rng.uniform(-0.3, 0.3, (4800, 2))


def test_render_carries_bext_ixml_info(tmp_path, programme):
    src, out = str(tmp_path / "in.wav"), str(tmp_path / "out.wav")
    history = b"A=PCM,F=48000,W=24,M=stereo,T=studio desk 2\r\n"
    ixml = b"<?xml version='1.0'?><BWFXML><PROJECT>late-news</PROJECT><TAKE>3</TAKE></BWFXML>"
    info = b"INFO" + b"INAM" + struct.pack("<I", 10) + b"Late news\0" + b"IART" + struct.pack("<I", 8) + b"Studio2\0"
    wav_with_chunks(src, programme, 48000, [(b"bext", bext(history)), (b"iXML", ixml), (b"LIST", info)])
    assert main(["render", src, out, "--bits", "16", "--shaper", "thr9", "--seed", "41"]) == 0
    a, b = WavInfoReader(src), WavInfoReader(out)
    for name in ("description", "originator", "originator_ref", "originator_date", "originator_time",
                 "time_reference", "version", "umid", "loudness_value", "loudness_range", "max_true_peak",
                 "max_momentary_loudness", "max_shortterm_loudness"):
        assert getattr(b.bext, name) == getattr(a.bext, name), name
    # EBU R 98: A=coding algorithm, F=sampling frequency, W=word length, M=mode, T=free text; CR/LF ends each line.
    added = b.bext.coding_history[len(a.bext.coding_history):]
    assert b.bext.coding_history.startswith(a.bext.coding_history)
    assert added.startswith("A=PCM,F=48000,W=16,M=stereo,T=rtstage ") and added.endswith(" seed 41\r\n")
    assert "TPDF thr9-48k" in added
    assert b.ixml.project == "late-news"
    assert b.info.to_dict() == a.info.to_dict()
    assert sf.info(out).frames == programme.shape[0]


def test_no_bext_invented_unless_asked(tmp_path, programme):
    src = str(tmp_path / "in.wav")
    sf.write(src, programme, 48000, subtype="PCM_24")
    plain, asked = str(tmp_path / "plain.wav"), str(tmp_path / "asked.wav")
    assert main(["render", src, plain, "--seed", "1"]) == 0
    assert WavInfoReader(plain).bext is None
    assert main(["render", src, asked, "--seed", "1", "--new-bext"]) == 0
    history = WavInfoReader(asked).bext.coding_history
    assert history.startswith("A=PCM,F=48000,W=16,M=stereo,T=rtstage ") and history.endswith("\r\n")


@pytest.mark.parametrize("ext", ["flac", "aiff"])
def test_text_tags_carried(tmp_path, programme, ext):
    src, out = str(tmp_path / f"in.{ext}"), str(tmp_path / f"out.{ext}")
    with sf.SoundFile(src, "w", 48000, 2, "PCM_24") as f:
        f.title, f.artist, f.comment = "Late news", "Studio 2", "take 3"
        f.write(programme)
    assert main(["render", src, out, "--seed", "2"]) == 0
    with sf.SoundFile(src) as a, sf.SoundFile(out) as b:
        for tag in ("title", "artist", "comment"):
            assert getattr(b, tag) == getattr(a, tag), tag


def test_output_mode_follows_the_umask(tmp_path, programme):
    src = str(tmp_path / "in.wav")
    sf.write(src, programme, 48000, subtype="PCM_24")
    old = os.umask(0o022)
    try:
        assert main(["render", src, str(tmp_path / "o.wav"), "--seed", "1", "--report", str(tmp_path / "r.json")]) == 0
    finally:
        os.umask(old)
    # POSIX: a new file gets 0666 & ~umask (no 0600 reports, no executable audio).
    assert os.stat(tmp_path / "o.wav").st_mode & 0o777 == 0o644
    assert os.stat(tmp_path / "r.json").st_mode & 0o777 == 0o644


def make_controller(tmp_path, accept_unsafe=False):
    engine = Engine(EngineSettings(bits=16, dither="tpdf", shaper="diff1", seed=1, accept_unsafe=accept_unsafe), 2, 48000)
    return Controller(EngineTarget(engine), PresetStore(str(tmp_path / "presets")), accept_unsafe=accept_unsafe)


@pytest.mark.parametrize("name", ["../evil", "/tmp/evil", "a/b", "..", ".hidden", "", "x" * 65])
def test_preset_save_takes_plain_names_only(tmp_path, name):
    controller = make_controller(tmp_path)
    with pytest.raises(RequestError):
        controller.presets.save(name, controller.target.get())
    assert not os.path.exists(tmp_path / "evil")
    assert not os.path.exists("/tmp/evil.toml")


def test_preset_save_replaces_only_when_asked(tmp_path):
    controller = make_controller(tmp_path)
    store = controller.presets
    store.save("night", controller.target.get())
    first = open(tmp_path / "presets" / "night.toml").read()
    with pytest.raises(RequestError, match="overwrite: true"):
        store.save("night", {**controller.target.get(), "bits": 12})
    assert open(tmp_path / "presets" / "night.toml").read() == first
    store.save("night", {**controller.target.get(), "bits": 12}, overwrite=True)
    assert "bits = 12" in open(tmp_path / "presets" / "night.toml").read()
    assert sorted(os.listdir(tmp_path / "presets")) == ["night.toml"]


def test_preset_save_stays_in_the_folder_through_links(tmp_path):
    controller = make_controller(tmp_path)
    (tmp_path / "presets").mkdir()
    outside = tmp_path / "outside.toml"
    outside.write_text("# keep\n")
    os.symlink(outside, tmp_path / "presets" / "link.toml")
    with pytest.raises(RequestError, match="outside the preset folder"):
        controller.presets.save("link", controller.target.get(), overwrite=True)
    assert outside.read_text() == "# keep\n"


def test_unsafe_from_the_socket_warns(tmp_path, capsys):
    refused = make_controller(tmp_path)
    with pytest.raises(Exception, match="without dither"):
        refused.change({"dither": "none"}, source="socket")
    controller = make_controller(tmp_path, accept_unsafe=True)
    controller.change({"dither": "none"}, source="socket")
    err = capsys.readouterr().err
    # Source of the risk statement: Lipshitz, Wannamaker & Vanderkooy, JAES 2004.
    assert "warning: accepting shaper 'diff1' without dither (from control source 'socket'" in err
    assert "JAES 2004" in err


def test_unsafe_from_command_line_preset_and_automation_warns(tmp_path, programme, capsys):
    src = str(tmp_path / "in.wav")
    sf.write(src, programme, 48000, subtype="PCM_24")
    preset = tmp_path / "raw.toml"
    preset.write_text('description = "undithered shaping"\ndither = "none"\nshaper = "diff2"\n')
    auto = tmp_path / "auto.jsonl"
    auto.write_text('{"at_frame": 100, "values": {"dither": "tpdf-hp"}}\n{"at_frame": 200, "values": {"gain_db": 0.0}}\n'
                    '{"at_frame": 900000, "values": {"gain_db": -1.0}}\n')
    runs = {
        "the command line": ["--dither", "none", "--shaper", "diff2"],
        f"preset {preset}": ["--preset", str(preset)],
        f"automation file {auto} at frame 100": ["--shaper", "diff1", "--automation", str(auto)],
    }
    for i, (source, extra) in enumerate(runs.items()):
        assert main(["render", src, str(tmp_path / f"o{i}.wav"), "--seed", "1", "--accept-unsafe-shaping", *extra]) == 0
        err = capsys.readouterr().err
        assert f"(from {source}, --accept-unsafe-shaping)" in err and "JAES 2004" in err, err
    # The automation file's change past the end and its repeat of the current gain: one warning line.
    assert main(["render", src, str(tmp_path / "o9.wav"), "--seed", "1", "--automation", str(auto),
                 "--accept-unsafe-shaping"]) == 0
    lines = [line for line in capsys.readouterr().err.splitlines() if "past the end" in line]
    assert len(lines) == 1 and "1 change(s) at or past the end" in lines[0] and "1 change(s) repeating" in lines[0]
