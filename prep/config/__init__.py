"""Typed, frozen configuration for every stage, with documented defaults and their sources.

The sections live in ``signal``, ``quality`` and ``labels`` (declared with
:func:`prep.config.declare.setting`); this module joins them into :class:`Config`, reads and
writes TOML and checks every constraint.

Each stage has one dataclass. Every field carries ``doc`` (what it means, with units), ``source``
(where the default comes from) and, where it applies, ``choices`` or a numeric ``range``. All checks
run in :meth:`Config.validate` before any record is read, and every problem is reported at once.

Example
-------
>>> from prep.config import Config
>>> cfg = Config().replace(bandpass={"high_hz": 35.0})
>>> cfg.bandpass.high_hz
35.0
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from prep.config.declare import Items, default_of
from prep.config.labels import LabelsConfig, SplitConfig
from prep.config.quality import QualityConfig, WindowsConfig
from prep.config.signal import (BandpassConfig, BaselineConfig, ChunksConfig, LeadsConfig,
                                NormalizeConfig, PowerlineConfig, ReadConfig, ResampleConfig,
                                RpeaksConfig, SegmentConfig)
from prep.errors import ConfigError

__all__ = ["Config", "SECTIONS", "RENAMED", "Items", "ReadConfig", "LeadsConfig",
           "PowerlineConfig", "BandpassConfig", "BaselineConfig", "RpeaksConfig", "SegmentConfig",
           "ResampleConfig", "NormalizeConfig", "QualityConfig", "WindowsConfig", "ChunksConfig",
           "LabelsConfig", "SplitConfig"]

SECTIONS: dict[str, type] = {
    "read": ReadConfig, "leads": LeadsConfig, "powerline": PowerlineConfig,
    "bandpass": BandpassConfig, "baseline": BaselineConfig, "rpeaks": RpeaksConfig,
    "segment": SegmentConfig, "resample": ResampleConfig, "normalize": NormalizeConfig,
    "quality": QualityConfig, "windows": WindowsConfig, "chunks": ChunksConfig, "labels": LabelsConfig, "split": SplitConfig,
}


# keys renamed in 0.1 (one name per idea), so an older file gets a message that names the new key
RENAMED = {("rpeaks", "min_rr_ms"): "refractory_ms", ("quality", "amplitude_z_max"): "max_amplitude_z",
           ("windows", "hf_ratio_max"): "max_hf_share", ("windows", "line_ratio_max"): "max_line_share",
           ("windows", "rr_ratio_max"): "max_rr_ratio", ("windows", "ksqi_min"): "min_ksqi",
           ("windows", "bassqi_min"): "min_bassqi"}


@dataclass(frozen=True)
class Config:
    """The whole resolved configuration: one frozen dataclass per stage."""

    read: ReadConfig = field(default_factory=ReadConfig)
    leads: LeadsConfig = field(default_factory=LeadsConfig)
    powerline: PowerlineConfig = field(default_factory=PowerlineConfig)
    bandpass: BandpassConfig = field(default_factory=BandpassConfig)
    baseline: BaselineConfig = field(default_factory=BaselineConfig)
    rpeaks: RpeaksConfig = field(default_factory=RpeaksConfig)
    segment: SegmentConfig = field(default_factory=SegmentConfig)
    resample: ResampleConfig = field(default_factory=ResampleConfig)
    normalize: NormalizeConfig = field(default_factory=NormalizeConfig)
    quality: QualityConfig = field(default_factory=QualityConfig)
    windows: WindowsConfig = field(default_factory=WindowsConfig)
    chunks: ChunksConfig = field(default_factory=ChunksConfig)
    labels: LabelsConfig = field(default_factory=LabelsConfig)
    split: SplitConfig = field(default_factory=SplitConfig)

    # ---- construction -------------------------------------------------------------------
    @classmethod
    def from_dict(cls, data: dict[str, Any], *, origin: str = "config") -> "Config":
        """Build and validate a config from nested dicts; unknown keys and bad values are errors."""
        problems: list[str] = []
        sections = {}
        for key in data:
            if key not in SECTIONS:
                problems.append(f"{origin}: unknown section [{key}]; known sections: "
                                f"{', '.join(SECTIONS)}")
        for name, klass in SECTIONS.items():
            given = data.get(name, {})
            if not isinstance(given, dict):
                problems.append(f"{origin}: [{name}] must be a table, got {type(given).__name__}")
                given = {}
            known = {f.name: f for f in fields(klass)}
            kwargs = {}
            for k, v in given.items():
                if k not in known and (name, k) in RENAMED:
                    problems.append(f"{origin}: key '{k}' in [{name}] is now called "
                                    f"'{RENAMED[name, k]}'; rename it in the file")
                    continue
                if k not in known:
                    problems.append(f"{origin}: unknown key '{k}' in [{name}]; known keys: "
                                    f"{', '.join(known)}")
                    continue
                if (isinstance(v, int) and not isinstance(v, bool)
                        and type(default_of(known[k])) is float):
                    v = float(v)  # 35 and 35.0 are the same setting and hash the same
                kwargs[k] = v
            sections[name] = klass(**kwargs)
        cfg = cls(**sections)
        problems += cfg.problems(origin=origin)
        if problems:
            raise ConfigError(problems)
        return cfg

    @classmethod
    def from_toml(cls, path: str | Path) -> "Config":
        """Read a TOML file (standard-library ``tomllib``) and validate it."""
        path = Path(path)
        try:
            data = tomllib.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ConfigError(f"config file {path} does not exist; write one with "
                              f"'beatmill config > {path.name}'") from None
        except IsADirectoryError:
            raise ConfigError(f"config file {path} is a folder; give the TOML file inside it "
                              "(write one with 'beatmill config > beatmill.toml')") from None
        except PermissionError:
            raise ConfigError(f"config file {path} cannot be read (permission denied)") from None
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise ConfigError(f"config file {path} is not valid TOML ({exc}); compare with "
                              "'beatmill config'") from None
        return cls.from_dict(data, origin=f"config file {path}")

    def replace(self, origin: str = "Config.replace", **changes: dict[str, Any]) -> "Config":
        """Return a validated copy with some keys of some sections changed; ``origin`` names
        where the change came from in messages (the command line passes its option).

        ``cfg.replace(bandpass={"high_hz": 35.0})``
        """
        data = self.to_dict()
        for section, values in changes.items():
            if section not in SECTIONS:
                raise ConfigError(f"unknown section '{section}'; known sections: {', '.join(SECTIONS)}")
            if not isinstance(values, dict):
                raise ConfigError(f"replace({section}=...) takes a dict of keys to change")
            data[section] = {**data[section], **values}
        return Config.from_dict(data, origin=origin)

    # ---- validation ---------------------------------------------------------------------
    def problems(self, *, origin: str = "config") -> list[str]:
        """Every rule broken by this config, as messages (empty when valid)."""
        out: list[str] = []
        for name in SECTIONS:
            section = getattr(self, name)
            for f in fields(section):
                out += _check_field(origin, name, f, getattr(section, f.name))
        if not out:
            b = self.bandpass
            if b.low_hz >= b.high_hz:
                out.append(f"{origin}: [bandpass] low_hz must be below high_hz; got low_hz="
                           f"{b.low_hz}, high_hz={b.high_hz}")
            if self.baseline.first_window_ms >= self.baseline.second_window_ms:
                out.append(f"{origin}: [baseline] first_window_ms must be shorter than "
                           f"second_window_ms; got {self.baseline.first_window_ms} and "
                           f"{self.baseline.second_window_ms}")
            if self.quality.template_beats % 2 == 0:
                out.append(f"{origin}: [quality] template_beats must be odd; got "
                           f"{self.quality.template_beats}; use {self.quality.template_beats + 1}")
            if self.quality.exclude_template_corr > self.quality.flag_template_corr:
                out.append(f"{origin}: [quality] exclude_template_corr must not exceed "
                           f"flag_template_corr; got {self.quality.exclude_template_corr} > "
                           f"{self.quality.flag_template_corr}")
            sp = self.split
            lists = [set(sp.train_patients), set(sp.val_patients), set(sp.test_patients)]
            for i, j, a, b in ((0, 1, "train", "val"), (0, 2, "train", "test"),
                               (1, 2, "val", "test")):
                both = sorted(lists[i] & lists[j])
                if both:
                    out.append(f"{origin}: [split] patients {both} are in both {a}_patients and "
                               f"{b}_patients; a patient belongs to one split")
            if sp.patient_pattern:
                import re
                try:
                    if re.compile(sp.patient_pattern).groups != 1:
                        out.append(f"{origin}: [split] patient_pattern must have exactly one "
                                   f"group; got {sp.patient_pattern!r}")
                except re.error as exc:
                    out.append(f"{origin}: [split] patient_pattern is not a valid regular "
                               f"expression ({exc})")
        return out

    def validate(self) -> "Config":
        problems = self.problems()
        if problems:
            raise ConfigError(problems)
        return self

    # ---- export -------------------------------------------------------------------------
    def to_dict(self) -> dict[str, dict[str, Any]]:
        return {name: dataclasses.asdict(getattr(self, name)) for name in SECTIONS}

    def sha256(self, extra: dict[str, Any] | None = None) -> str:
        """Hash of everything that changes outputs: the whole config plus ``extra`` (the contents
        of files it names, such as the patient map). Workers and paths of outputs are not part."""
        blob = json.dumps({"config": self.to_dict(), "extra": extra or {}}, sort_keys=True,
                          separators=(",", ":"))
        return hashlib.sha256(blob.encode()).hexdigest()

    def to_toml(self, *, comments: bool = True) -> str:
        """The config as TOML; with ``comments`` each key carries its meaning and source."""
        lines = ["# beatmill configuration. Every key is optional; unknown keys are errors.",
                 "# Each default names its source. Print this file with 'beatmill config'.", ""]
        for name, klass in SECTIONS.items():
            section = getattr(self, name)
            lines.append(f"[{name}]")
            for f in fields(klass):
                if comments:
                    lines += _comment(f.metadata["doc"])
                    allowed = f.metadata.get("choices")
                    if allowed:
                        lines += _comment(f"allowed: {', '.join(allowed)}")
                    lines += _comment(f"default source: {f.metadata['source']}")
                lines.append(f"{f.name} = {_toml_value(getattr(section, f.name))}")
            lines.append("")
        return "\n".join(lines)


def _comment(text: str, width: int = 99) -> list[str]:
    """A TOML comment wrapped to ``width`` characters a line."""
    import textwrap
    return textwrap.wrap(text, width, initial_indent="# ", subsequent_indent="# ",
                         break_on_hyphens=False, break_long_words=False)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {v!r} as TOML")


def _check_field(origin: str, section: str, f: dataclasses.Field, value: Any) -> list[str]:
    where = f"{origin}: The '{f.name}' parameter of [{section}]"
    meta = f.metadata
    kind = type(default_of(f))
    if kind is bool:
        if not isinstance(value, bool):
            return [f"{where} must be true or false. Got {value!r} instead."]
        return []
    if kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            return [f"{where} must be a whole number. Got {value!r} instead."]
    elif kind is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            return [f"{where} must be a finite number. Got {value!r} instead."]
    elif kind is str:
        if not isinstance(value, str):
            return [f"{where} must be a string. Got {value!r} instead."]
        if meta.get("choices") and value not in meta["choices"]:
            return [f"{where} must be one of {', '.join(repr(c) for c in meta['choices'])}. "
                    f"Got {value!r} instead."]
        return []
    elif kind is list:
        if not isinstance(value, list):
            return [f"{where} must be a list. Got {value!r} instead."]
        rule = meta.get("items")
        if rule is not None and rule.broken(value):
            return [f"{where} must be {rule.says}. Got {value!r} instead."]
        return []
    lo, hi = meta.get("lo"), meta.get("hi")
    if lo is not None and (value < lo or (meta.get("lo_open") and value == lo)):
        op = ">" if meta.get("lo_open") else ">="
        return [f"{where} must be {op} {lo}. Got {value!r} instead."]
    if hi is not None and value > hi:
        return [f"{where} must be <= {hi}. Got {value!r} instead."]
    return []
