"""Lead names: canonical names and aliases, ECG or not, and the dataset's lead axis."""
from __future__ import annotations

import re

STANDARD_12 = ["I", "II", "III", "aVR", "aVL", "aVF", "V1", "V2", "V3", "V4", "V5", "V6"]

# Aliases seen in open databases and device exports; matched case-insensitively after removing
# spaces, dashes and underscores. MLx = modified limb lead x (Holter), Dx = European limb names.
_ALIASES = {s.lower(): s for s in STANDARD_12}
_ALIASES.update({"mli": "I", "mlii": "II", "mliii": "III", "ml1": "I", "ml2": "II", "ml3": "III",
                 "di": "I", "dii": "II", "diii": "III", "d1": "I", "d2": "II", "d3": "III",
                 "lead1": "I", "lead2": "II", "lead3": "III", "leadi": "I", "leadii": "II",
                 "leadiii": "III", "1": "I", "2": "II", "3": "III"})

# Channels that are not ECG, by name (checked on the lowered, squeezed name).
_NON_ECG = re.compile(r"^(abp|art|pap|cvp|icp|lap|rap|uap|ap|bp|nbp|nibp|sbp|dbp|mbp|pleth|ppg|"
                      r"spo2|sao2|so2|resp|rr|co2|etco2|awrr|temp|flow|pres.*|press.*|eeg.*|"
                      r"emg.*|eog.*|noise.*|pulse|hr|edr|status|marker|event|annotations?|"
                      r"thor.*|abd.*|chest|airflow|snore|position|light|acc.*|gyro.*|"
                      r"edf annotations)$")
_VOLT_UNITS = {"mv", "uv", "µv", "μv", "v", "nv", ""}
_SCALE_TO_MV = {"mv": 1.0, "uv": 1e-3, "µv": 1e-3, "μv": 1e-3, "v": 1e3, "nv": 1e-6, "": 1.0}


def _squeeze(name: str) -> str:
    return re.sub(r"[\s_\-]+", "", name.strip().lower())


def _strip_ecg_prefix(key: str) -> str:
    for prefix in ("ecg", "ekg"):
        if key.startswith(prefix) and key[len(prefix):] in _ALIASES and not key[len(prefix):].isdigit():
            return key[len(prefix):]
    return key


def canonical_lead(name: str) -> str:
    """Canonical lead name: the standard 12 (and MLII, DII... aliases) mapped, others stripped.

    >>> canonical_lead("MLII"), canonical_lead("avl"), canonical_lead("V5"), canonical_lead("ECG1")
    ('II', 'aVL', 'V5', 'ECG1')
    """
    key = _strip_ecg_prefix(_squeeze(name))  # "ECG II" -> II; "ECG1" stays a channel name
    return _ALIASES.get(key, name.strip())


def classify_channel(name: str, units: str) -> tuple[bool, str]:
    """Whether a channel is ECG, and if not, why (for the record's skipped list)."""
    key = _squeeze(name)
    u = (units or "").strip().lower()
    if _NON_ECG.match(key):
        return False, f"channel '{name}' is not ECG by its name"
    if u not in _VOLT_UNITS:
        return False, f"channel '{name}' is not ECG: units '{units}' are not a voltage"
    return True, ""


def scale_to_mv(units: str) -> float:
    return _SCALE_TO_MV.get((units or "").strip().lower(), 1.0)


def default_axis(record_leads: list[list[str]], min_share: float = 0.5) -> list[str]:
    """The lead axis when the user chooses none: the canonical ECG leads that at least
    ``min_share`` of the records have (default half; a record without one of them keeps its
    beats with that slot masked).

    Order: the standard twelve in their order (I, II, III, aVR, aVL, aVF, V1-V6), then the rest by
    name. When the standard twelve are all common, only those twelve (extra leads such as the
    Frank leads need ``--leads``).

    >>> default_axis([["II", "V1"]] * 46 + [["V5", "V2"]] * 2)
    ['II', 'V1']
    >>> default_axis([["II", "V5"], ["II"]])
    ['II', 'V5']
    """
    if not record_leads:
        return []
    count = lead_counts(record_leads)
    common = {lead for lead, c in count.items() if c >= min_share * len(record_leads)}
    if set(STANDARD_12) <= common:
        return list(STANDARD_12)
    std = [s for s in STANDARD_12 if s in common]
    rest = sorted((s for s in common if s not in STANDARD_12), key=str.lower)
    return std + rest


def nearest_lead(name: str, known: list[str], cutoff: float = 0.5) -> str | None:
    """The known name closest to a mistyped one, case-insensitively (None when nothing is
    within ``cutoff``, difflib's similarity ratio). Used for leads and for class names.

    >>> nearest_lead("V55", ["II", "V5", "V1"])
    'V5'
    """
    import difflib
    by_lower = {k.lower(): k for k in known}
    hit = difflib.get_close_matches(name.lower(), list(by_lower), n=1, cutoff=cutoff)
    return by_lower[hit[0]] if hit else None


def lead_counts(record_leads: list[list[str]]) -> dict[str, int]:
    """In how many records each lead appears (a record counts once per lead)."""
    count: dict[str, int] = {}
    for leads in record_leads:
        for lead in set(leads):
            count[lead] = count.get(lead, 0) + 1
    return count


def resolve_axis(select: list[str]) -> list[str]:
    return [canonical_lead(s) for s in select]


def match_lead(axis_name: str, record_leads: list[str]) -> int | None:
    """Index of ``axis_name`` among a record's canonical leads, case-insensitive; None if absent."""
    key = axis_name.lower()
    for i, lead in enumerate(record_leads):
        if lead.lower() == key:
            return i
    return None
