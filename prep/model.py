"""The shared data model: a record in memory, and the small log each stage returns.

Stages never pass a free-form metadata dict along; each returns its output and a :class:`StageLog`,
and the orchestrator collects the logs into the manifest.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

#: Beat symbols that mark a QRS in WFDB annotations (PhysioNet annotation codes).
BEAT_SYMBOLS = frozenset("NLRBAaJSVrFejnE/fQ?")
#: WFDB annotation codes that mark no beat (rhythm, noise, signal quality, waves, comments;
#: PhysioNet's annotation code table, from memory)
NON_BEAT_SYMBOLS = frozenset(["+", "~", "|", "x", '"', "[", "]", "!", "p", "t", "u", "(", ")",
                              "^", "`", "'", "s", "T", "*", "D", "=", "@", "N/A"])


@dataclass
class StageLog:
    """What one stage did to one record: its parameters, derived values, counts and warnings."""

    stage: str
    params: dict[str, Any] = field(default_factory=dict)
    derived: dict[str, Any] = field(default_factory=dict)
    counts: dict[str, int] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {"stage": self.stage, "params": self.params, "derived": self.derived,
                "counts": self.counts, "warnings": self.warnings}


@dataclass
class Annotations:
    """Reference annotations of a record: sample indices (native rate) and symbols."""

    sample: np.ndarray
    symbol: np.ndarray
    aux: np.ndarray | None = None
    source: str = ""
    subtype: np.ndarray | None = None


@dataclass
class Record:
    """One ECG record in physical units.

    Attributes
    ----------
    signals : ndarray, shape (n_leads, n_samples)
        ECG leads in mV; NaN marks missing samples (gaps).
    lead_names : list of str
        Names as the source gives them.
    leads : list of str
        Canonical names (see :func:`prep.leads.canonical_lead`).
    """

    name: str
    fs: float
    signals: np.ndarray
    lead_names: list[str]
    leads: list[str]
    units: list[str]
    inputs: list[tuple[str, str]] = field(default_factory=list)
    skipped: list[tuple[str, str]] = field(default_factory=list)
    annotations: Annotations | None = None
    comments: list[str] = field(default_factory=list)
    path: str = ""
    channels: list[int] = field(default_factory=list)  # source channel number of each lead
    warnings: list[str] = field(default_factory=list)  # problems the reader worked around
    first_sample: int = 0  # sample number of signals[:, 0] in the source (a chunk's start)

    @property
    def n_samples(self) -> int:
        return int(self.signals.shape[-1])

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.fs
