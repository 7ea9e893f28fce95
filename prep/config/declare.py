"""How a setting is declared: :func:`setting` (default, meaning, source, constraints) and
:class:`Items` (the rule a list-valued setting follows)."""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any


@dataclass(frozen=True)
class Items:
    """What a list-valued setting must hold, declared beside the field and checked generically.

    ``kind``: "number" (each within ``lo``..``hi``) or "name" (non-empty text); ``length``: an
    exact length; ``ascending``: [low, high] with low < high; ``distinct``: no repeats (names
    compared case-insensitively); ``nonempty``; ``positive_sum``. ``says``: the rule in words.
    """

    kind: str
    says: str
    lo: float | None = None
    hi: float | None = None
    length: int | None = None
    ascending: bool = False
    distinct: bool = False
    nonempty: bool = False
    positive_sum: bool = False

    def broken(self, value: list) -> bool:
        if self.kind == "number":
            if any(isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v)
                   for v in value):
                return True
            if any((self.lo is not None and v < self.lo) or (self.hi is not None and v > self.hi)
                   for v in value):
                return True
        elif any(not isinstance(v, str) or not v.strip() for v in value):
            return True
        keys = [v.strip().lower() if isinstance(v, str) else v for v in value]
        return bool((self.length is not None and len(value) != self.length)
                    or (self.ascending and len(value) == 2 and not value[0] < value[1])
                    or (self.distinct and len(set(keys)) != len(keys))
                    or (self.nonempty and not value)
                    or (self.positive_sum and sum(value) <= 0))


def setting(default, doc: str, source: str, *, choices=None, lo=None, hi=None, lo_open=False,
       items: Items | None = None, factory=None):
    meta = {"doc": doc, "source": source, "choices": choices, "lo": lo, "hi": hi,
            "lo_open": lo_open, "items": items}
    if factory is not None:
        return field(default_factory=factory, metadata=meta)
    return field(default=default, metadata=meta)


def default_of(f: dataclasses.Field) -> Any:
    return f.default if f.default is not dataclasses.MISSING else f.default_factory()
