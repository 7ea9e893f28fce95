import tomllib

import pytest

from prep.config import Config
from prep.errors import ConfigError


def test_default_toml_round_trips_and_is_commented():
    text = Config().to_toml()
    assert "# default source:" in text
    assert Config.from_dict(tomllib.loads(text)) == Config()


def test_every_field_names_a_source():
    from dataclasses import fields

    from prep.config import SECTIONS
    for klass in SECTIONS.values():
        for f in fields(klass):
            assert f.metadata["doc"] and f.metadata["source"], (klass.__name__, f.name)


def test_all_problems_reported_at_once():
    with pytest.raises(ConfigError) as e:
        Config.from_dict({"bandpass": {"high_hz": "x", "bogus": 1}, "nope": {},
                          "normalize": {"method": "zz"}})
    msgs = e.value.problems
    assert len(msgs) == 4
    assert any("unknown section [nope]" in m for m in msgs)
    assert any("unknown key 'bogus'" in m for m in msgs)
    assert any("'method' parameter of [normalize] must be one of" in m for m in msgs)


def test_cross_field_rule():
    with pytest.raises(ConfigError, match="low_hz must be below high_hz"):
        Config().replace(bandpass={"low_hz": 5.0, "high_hz": 4.0})


def test_hash_ignores_int_float_spelling_and_changes_with_values():
    a = Config.from_dict({"bandpass": {"high_hz": 35}})
    b = Config.from_dict({"bandpass": {"high_hz": 35.0}})
    assert a.sha256() == b.sha256() != Config().sha256()


def test_from_toml_errors_name_the_file(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[bandpass\n")
    with pytest.raises(ConfigError, match="bad.toml is not valid TOML"):
        Config.from_toml(p)
    with pytest.raises(ConfigError, match="does not exist"):
        Config.from_toml(tmp_path / "missing.toml")
