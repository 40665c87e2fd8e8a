"""Presets: the shipped files load and say what their names promise; bad presets name file and field."""

import pytest

from rtstage.errors import RtstageError
from rtstage.presets import list_presets, load_preset, settings_from


def test_shipped_presets_load_and_validate():
    names = list_presets()
    for required in ("link16", "encoder16", "master16"):
        assert required in names
    for name in names:
        settings_from(name).resolved()


def test_encoder_preset_is_flat_tpdf():
    # Common practice: a lossy encoder gets TPDF once, unshaped.
    s = settings_from("encoder16").resolved()
    assert (s.bits, s.dither, s.shaper.id) == (16, "tpdf", "flat")


def test_master_preset_is_shaped_for_the_rate():
    s = settings_from("master16").resolved(44100)
    assert s.bits == 16 and s.dither == "tpdf" and s.shaper.design_samplerate_hz == 44100.0


@pytest.mark.parametrize(
    "text,field",
    [
        ("bits = 'sixteen'\n", "bits"),
        ("bits = 30\n", "bits"),
        ("dither = 'violet'\n", "dither"),
        ("colour = 'red'\n", "colour"),
        ("gain_db = true\n", "gain_db"),
        ("shaper = 'nowhere'\n", "shaper"),
    ],
)
def test_bad_preset_names_file_and_field(tmp_path, text, field):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(RtstageError) as info:
        settings_from(str(path)).resolved()
    assert str(path) in str(info.value)
    assert field in str(info.value)


def test_malformed_toml(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text("bits = = 16\n")
    with pytest.raises(RtstageError, match="not valid TOML"):
        load_preset(str(path))
