"""PortAudio's ALSA host API without hardware: the bytes an ALSA device receives, against ``rtstage render``.

A private ALSA configuration (``~/.asoundrc`` in a temporary ``HOME``; the
system's ``alsa.conf`` reads it) defines a PCM of the ``file`` plugin type,
which writes every byte the application writes to the PCM into a file and
passes the stream on to the ``null`` PCM (alsa-lib's PCM plugin documentation:
"File plugin", "Null plugin").  rtstage opens it by name through PortAudio's
ALSA host API as it would a sound card, so the file holds exactly what a card
would have been sent: interleaved signed 16-bit little-endian words
(``S16_LE``) or left-justified 24-in-32-bit words (``S32_LE``).

The file must hold PortAudio's start-up silence, then the render's words
exactly, then the zeros of the last partial buffer.
"""

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from numpy.testing import assert_array_equal

from rtstage.live.sources import generate

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SR = 48000


@pytest.mark.parametrize("bits,blocksize", [(16, 256), (24, 64)])
def test_alsa_file_plugin_receives_the_render(tmp_path, bits, blocksize):
    home = tmp_path / "home"
    home.mkdir()
    raw_path = tmp_path / "card.raw"
    (home / ".asoundrc").write_text(
        "pcm.rtstage_test_card {\n"
        "    type file\n"
        "    slave.pcm \"null\"\n"
        f"    file \"{raw_path}\"\n"
        "    format \"raw\"\n"
        "}\n")
    x = generate("noise:level_dbfs=-14,seed=3", SR, 2, 0, SR)
    src = str(tmp_path / "src.wav")
    sf.write(src, x, SR, subtype="DOUBLE")
    args = ["--bits", str(bits), "--dither", "tpdf", "--shaper", "lvw-e5", "--seed", "5"]
    env = dict(os.environ, HOME=str(home))
    env.pop("JACK_DEFAULT_SERVER", None)
    ref_path = str(tmp_path / "render.wav")
    subprocess.run([sys.executable, "-m", "rtstage", "render", src, ref_path, *args], cwd=ROOT, env=env, check=True,
                   capture_output=True)
    status_path = str(tmp_path / "status.json")
    run = subprocess.run([sys.executable, "-m", "rtstage", "run", "--hostapi", "ALSA", "--device", "rtstage_test_card",
                          "--source", src, *args, "--blocksize", str(blocksize), "--quiet", "--status-file", status_path],
                         cwd=ROOT, env=env, capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, run.stderr
    status = json.load(open(status_path))
    assert status["device"]["hostapi"] == "ALSA" and status["source_done"]
    if status["realtime"]["stream_process"]["memory_locked"]:  # realtime granted here (root in CI)
        # The promotion of PortAudio's ALSA callback thread to SCHED_FIFO ran when the stream started.  The list
        # may be empty: the null PCM takes data as fast as it is written, so with a short source the callback
        # thread can have finished before the worker looks for new threads.
        assert status["realtime"]["stream_process"]["promoted_threads"] is not None, status["realtime"]

    if bits <= 16:
        reference = sf.read(ref_path, dtype="int16", always_2d=True)[0].astype(np.int64)
        card = np.fromfile(raw_path, dtype="<i2").reshape(-1, 2).astype(np.int64)
    else:
        # PCM_24 read as int32 is left-justified, as the 32-bit container rtstage sends (S32_LE)
        reference = sf.read(ref_path, dtype="int32", always_2d=True)[0].astype(np.int64)
        card = np.fromfile(raw_path, dtype="<i4").reshape(-1, 2).astype(np.int64)
    nonzero = np.flatnonzero(np.any(card != 0, axis=1))
    start = int(nonzero[0])
    assert np.all(card[:start] == 0)  # PortAudio's start-up silence
    assert_array_equal(card[start:start + reference.shape[0]], reference)
    assert np.all(card[start + reference.shape[0]:] == 0)  # the rest of the last buffer (the source ended)
