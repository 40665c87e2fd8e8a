"""The parameter table agrees with the engine's own validation, and refuses what the engine refuses."""

import json
import math

import pytest

from rtstage import params
from rtstage.dither import DITHER_KINDS
from rtstage.engine import MAX_BITS, MIN_BITS, SEED_MAX, EngineSettings
from rtstage.errors import RtstageError
from rtstage.shapers import BUILTIN_SHAPERS


def _engine_accepts(**changes):
    try:
        EngineSettings(**changes).validate()
        return True
    except RtstageError:
        return False


class TestRangesMatchEngine:
    # One source of truth: each numeric range in the table must be exactly the
    # range EngineSettings.validate accepts (it accepts the bounds and refuses
    # the next representable value outside them).
    @pytest.mark.parametrize("name", ["bits", "gain_db", "dither_scale"])
    def test_bounds(self, name):
        spec = params.PARAMS[name]
        assert _engine_accepts(**{name: spec.minimum})
        assert _engine_accepts(**{name: spec.maximum})
        if spec.kind == "int":
            below, above = spec.minimum - 1, spec.maximum + 1
        else:
            below, above = math.nextafter(spec.minimum, -math.inf), math.nextafter(spec.maximum, math.inf)
        assert not _engine_accepts(**{name: below})
        assert not _engine_accepts(**{name: above})
        with pytest.raises(RtstageError, match=name):
            params.validate(name, below)
        with pytest.raises(RtstageError, match=name):
            params.validate(name, above)

    def test_bits_constants(self):
        assert (params.PARAMS["bits"].minimum, params.PARAMS["bits"].maximum) == (MIN_BITS, MAX_BITS)

    def test_choices_are_the_engines(self):
        assert params.PARAMS["dither"].allowed() == tuple(DITHER_KINDS)
        assert set(BUILTIN_SHAPERS) <= set(params.PARAMS["shaper"].allowed())

    def test_engine_fields_exist(self):
        fields = EngineSettings.__dataclass_fields__
        for name in params.ENGINE_FIELDS:
            assert name in fields and name in params.PARAMS


class TestValidate:
    @pytest.mark.parametrize(
        "name, value, reason",
        [
            ("nope", 1, "unknown parameter"),
            (7, 1, "unknown parameter"),
            ("bits", "12", "integer"),
            ("bits", True, "integer"),  # JSON true must not pass as 1
            ("bits", 12.5, "integer"),
            ("bits", float("nan"), "integer"),
            ("gain_db", float("inf"), "finite"),
            ("gain_db", None, "number"),
            ("dither", 2, "string"),
            ("dither", "triangle", "unknown dither"),
            ("shaper", "../../etc/passwd", "unknown shaper"),  # no paths over the control surfaces
            ("mute", 1, "true or false"),
            ("monitor", "loud", "unknown monitor"),
            ("seed", -1, "seed"),
            ("seed", SEED_MAX + 1, "seed"),
            ("error_gain_db", -1.0, "between"),
            ("auto_mute_hold_s", params.MAX_AUTO_MUTE_HOLD_S * 2, "between"),
        ],
    )
    def test_refused(self, name, value, reason):
        with pytest.raises(RtstageError, match=reason):
            params.validate(name, value)

    def test_canonical_types(self):
        assert params.validate("bits", 12.0) == 12 and isinstance(params.validate("bits", 12.0), int)
        assert isinstance(params.validate("gain_db", -3), float)
        assert params.validate("seed", None) is None
        assert params.validate("seed", SEED_MAX) == SEED_MAX

    def test_every_default_is_valid(self):
        for name, spec in params.PARAMS.items():
            assert params.validate(name, spec.default) == spec.default


class TestValidateValues:
    def test_combination_rule_from_engine(self):
        # EngineSettings.validate refuses a shaper without dither unless forced;
        # the merged check must refuse it whichever request brings the half.
        current = params.defaults()
        current["shaper"] = "wannamaker-f9"
        with pytest.raises(RtstageError, match="without dither"):
            params.validate_values({"dither": "none"}, current)
        assert params.validate_values({"dither": "none"}, current, accept_unsafe=True) == {"dither": "none"}

    def test_all_or_nothing(self):
        with pytest.raises(RtstageError, match="bits"):
            params.validate_values({"dither": "rpdf", "bits": 99})

    @pytest.mark.parametrize("values", [[], "bits=12", {}, None])
    def test_not_an_object(self, values):
        with pytest.raises(RtstageError):
            params.validate_values(values)

    def test_table_order(self):
        out = params.validate_values({"mute": True, "bits": 8})
        assert list(out) == ["bits", "mute"]


def test_spec_table_is_json():
    # RFC 8259 JSON: the list op must serialize without NaN or Infinity.
    table = params.spec_table()
    text = json.dumps(table, allow_nan=False)
    assert [row["name"] for row in json.loads(text)] == list(params.PARAMS)
    for row in table:
        assert row["description"] and row["type"] in ("int", "float", "bool", "enum", "seed")


def test_settings_with_keeps_seed():
    s = EngineSettings(seed=5)
    out = params.settings_with(s, {"bits": 12, "seed": 9, "mute": True})
    assert out.bits == 12 and out.seed == 5
