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


# ---- every declared constraint rejects a value that breaks it ----------------------------------

def _breaking_values(f):
    """Values that break each constraint declared on a field (bounds, choices, list rules)."""
    from prep.config.declare import default_of as _default
    m, d = f.metadata, _default(f)
    if isinstance(d, bool):
        return ["yes"]
    if isinstance(d, (int, float)):
        out = ["3", float("nan")] if isinstance(d, float) else ["3", 2.5]
        if m["lo"] is not None:
            out.append(m["lo"] if m["lo_open"] else m["lo"] - 1)
        if m["hi"] is not None:
            out.append(m["hi"] + 1)
        return out
    if isinstance(d, str):
        return [7] + (["no-such-choice"] if m["choices"] else [])
    rule = m["items"]
    out = ["not a list"]
    if rule is None:
        return out
    good = list(d) or (["a"] if rule.kind == "name" else [1.0])
    out += [[True] + good[1:], [None]] if rule.kind == "number" else [[""], [3]]
    if rule.lo is not None:
        out.append([rule.lo - 1] + good[1:])
    if rule.hi is not None:
        out.append([rule.hi + 1] + good[1:])
    if rule.length is not None:
        out.append(good + good[:1])
    if rule.ascending:
        out.append(good[::-1])
    if rule.distinct:
        out.append(["II", "ii"])
    if rule.nonempty:
        out.append([])
    if rule.positive_sum:
        out.append([0.0] * rule.length)
    return out


def test_every_constraint_rejects_a_value_that_breaks_it():
    # every bound, choice and list rule declared in prep/config/, each broken once
    import dataclasses

    from prep.config import SECTIONS
    n = 0
    for section, klass in SECTIONS.items():
        for f in dataclasses.fields(klass):
            for bad in _breaking_values(f):
                try:
                    cfg = Config.from_dict({section: {f.name: bad}})
                    problems = cfg.problems()
                except ConfigError as exc:
                    problems = [str(exc)]
                assert problems and any(f"'{f.name}'" in p or f.name in p for p in problems), \
                    (section, f.name, bad)
                n += 1
    assert n > 150


def test_a_renamed_key_names_its_new_name():
    with pytest.raises(ConfigError, match="now called 'max_hf_share'"):
        Config.from_dict({"windows": {"hf_ratio_max": 0.2}})
