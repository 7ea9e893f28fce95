"""Reference labels: the beat annotation nearest each R within a window."""
from __future__ import annotations

import numpy as np

from prep.evaluate import match_pairs
from prep.model import BEAT_SYMBOLS, NON_BEAT_SYMBOLS, Annotations


def attach_labels(r: np.ndarray, ann: Annotations | None, fs: float, window_ms: float,
                  extra_symbols=()) -> np.ndarray:
    """Symbol of the nearest beat annotation within ``window_ms`` of each R ('' when none).
    Beat annotations: the WFDB beat codes and ``extra_symbols`` (a mapping file's symbols).

    >>> from prep.model import Annotations
    >>> a = Annotations(np.array([100, 400]), np.array(["N", "V"], dtype=object))
    >>> attach_labels(np.array([110, 260, 395]), a, 1000.0, 100).tolist()
    ['N', '', 'V']
    """
    out = np.full(r.size, "", dtype=object)
    if ann is None or r.size == 0:
        return out
    beats = BEAT_SYMBOLS | set(extra_symbols)
    is_beat = np.array([s in beats for s in ann.symbol], bool)
    samp, sym = ann.sample[is_beat], ann.symbol[is_beat]
    if samp.size == 0:
        return out
    order = np.argsort(samp, kind="stable")
    samp, sym = samp[order], sym[order]
    k = np.searchsorted(samp, r)
    lo, hi = np.clip(k - 1, 0, samp.size - 1), np.clip(k, 0, samp.size - 1)
    near = np.where(np.abs(samp[lo] - r) <= np.abs(samp[hi] - r), lo, hi)
    ok = np.abs(samp[near] - r) <= window_ms * fs / 1000
    out[ok] = sym[near[ok]]
    return out


#: ANSI/AAMI EC57 beat classes from MIT-BIH symbols. N L R e j -> N; A a J S -> S; V E -> V;
#: F -> F; / f Q -> Q (EC57 as reproduced in many papers); B -> N, n -> S, r -> V, ? -> Q from
#: memory (not checked against the standard's text).
AAMI_CLASSES: dict[str, str] = {
    **dict.fromkeys("NLRej", "N"), **dict.fromkeys("AaJS", "S"), **dict.fromkeys("VE", "V"),
    "F": "F", **dict.fromkeys("/fQ", "Q"), "B": "N", "n": "S", "r": "V", "?": "Q"}
UNLABELED = "unlabeled"


def load_mapping(path: str | None) -> dict[str, str]:
    """Symbol -> class overrides from a TOML ([classes] table) or CSV (symbol,class) file."""
    from pathlib import Path

    from prep.errors import ConfigError
    if not path:
        return {}
    p = Path(path)
    if not p.exists():
        raise ConfigError(f"[labels] mapping_file {p} does not exist")
    try:
        if p.suffix.lower() == ".toml":
            import tomllib
            table = tomllib.loads(p.read_text(encoding="utf-8")).get("classes", {})
        else:
            import csv
            with open(p, newline="", encoding="utf-8") as fh:
                rows = list(csv.DictReader(fh))
            table = {r["symbol"]: r["class"] for r in rows}
    except (KeyError, ValueError, UnicodeDecodeError) as exc:
        raise ConfigError(f"[labels] mapping_file {p}: cannot read a symbol -> class table "
                          f"({type(exc).__name__}: {exc}); use [classes] in TOML or CSV columns "
                          "symbol,class") from None
    bad = [k for k, v in table.items() if not isinstance(v, str) or not v or not k]
    if bad:
        raise ConfigError(f"[labels] mapping_file {p}: empty symbol or class for {bad}")
    return {str(k): str(v) for k, v in table.items()}


def unknown_symbols(ann: Annotations | None, mapping: dict[str, str] | None = None) -> dict:
    """Annotation symbols that are neither a WFDB code nor in the mapping, with their counts
    (such labels mark no beat here: a class table must name them).

    >>> from prep.model import Annotations
    >>> unknown_symbols(Annotations(np.array([1, 2, 3]), np.array(["N", "Normal", "+"], object)))
    {'Normal': 1}
    """
    if ann is None or ann.symbol.size == 0:
        return {}
    known = BEAT_SYMBOLS | NON_BEAT_SYMBOLS | set(mapping or {})
    sym, n = np.unique(np.asarray([str(s) for s in ann.symbol], dtype=object), return_counts=True)
    return {str(s): int(c) for s, c in zip(sym, n) if s not in known}


def beat_classes(labels: np.ndarray, mapping: dict[str, str] | None = None) -> np.ndarray:
    """Class of each label symbol: AAMI EC57 (with overrides); '' -> 'unlabeled'; unknown -> 'Q'.

    >>> beat_classes(np.array(["N", "V", "", "A", "/"], dtype=object)).tolist()
    ['N', 'V', 'unlabeled', 'S', 'Q']
    """
    table = {**AAMI_CLASSES, **(mapping or {})}
    return np.array([table.get(s, "Q") if s else UNLABELED for s in labels], dtype=object)


def rhythm_at(r: np.ndarray, ann: Annotations | None) -> np.ndarray:
    """Rhythm in force at each R, from '+' annotations whose aux text is '(NAME' ('' if none)."""
    out = np.full(r.size, "", dtype=object)
    if ann is None or ann.aux is None or r.size == 0:
        return out
    sel = np.array([s == "+" for s in ann.symbol], bool)
    if not sel.any():
        return out
    samp = ann.sample[sel]
    names = np.array([str(a).replace("\x00", "").strip().lstrip("(") for a in ann.aux[sel]],
                     dtype=object)
    order = np.argsort(samp, kind="stable")
    samp, names = samp[order], names[order]
    k = np.searchsorted(samp, r, side="right") - 1
    out[k >= 0] = names[k[k >= 0]]
    return out


def noise_stretches(ann: Annotations | None, n_samples: int, channels: list[int]) -> np.ndarray:
    """(n_leads, n_samples) True where the annotator marked a lead noisy or unreadable.

    WFDB '~' annotations change signal quality: subtype 0 means clean; otherwise its low four
    bits flag noisy signals and the high four bits unreadable ones, by signal number (WFDB
    annotation conventions, from memory); a negative subtype marks every signal.
    """
    out = np.zeros((len(channels), n_samples), bool)
    if ann is None or ann.subtype is None:
        return out
    sel = np.array([s == "~" for s in ann.symbol], bool)
    samp, sub = ann.sample[sel], ann.subtype[sel]
    order = np.argsort(samp, kind="stable")
    samp, sub = samp[order], sub[order]
    ends = np.r_[samp[1:], n_samples]
    for a, b, st in zip(samp, ends, sub):  # one step per annotation
        if st == 0:
            continue
        flags = (st & 0x0F) | ((st >> 4) & 0x0F)
        for j, ch in enumerate(channels):
            if st < 0 or (ch < 4 and flags & (1 << ch)):
                out[j, a:b] = True
    return out


def class_yield(r: np.ndarray, included: np.ndarray, ann, fs: float, window_ms: float,
                mapping: dict[str, str] | None = None) -> dict[str, dict[str, int]]:
    """Per reference class: reference beats, those a row was found for, and those kept.

    Reference beats and rows are matched one to one within ``window_ms`` (the EC57 walk of
    :func:`prep.evaluate.match_pairs`), so a reference beat is counted once whatever labels
    the rows got. Empty where the record has no reference beat annotations.

    >>> from prep.model import Annotations
    >>> a = Annotations(np.array([100, 400, 700]), np.array(["N", "V", "N"], dtype=object))
    >>> class_yield(np.array([101, 402]), np.array([True, False]), a, 1000.0, 150)
    {'N': {'reference': 2, 'detected': 1, 'kept': 1}, 'V': {'reference': 1, 'detected': 1, 'kept': 0}}
    """
    if ann is None:
        return {}
    sel = np.isin(ann.symbol, list(BEAT_SYMBOLS))
    if not sel.any():
        return {}
    order = np.argsort(ann.sample[sel], kind="stable")
    ref, sym = ann.sample[sel][order], ann.symbol[sel][order]
    cls = beat_classes(sym, mapping).astype(str)
    _, ref_to_row = match_pairs(r, ref, fs, window_ms)
    found = ref_to_row >= 0
    kept = found & included[np.maximum(ref_to_row, 0)]
    return {str(c): {"reference": int((cls == c).sum()), "detected": int((found & (cls == c)).sum()),
                     "kept": int((kept & (cls == c)).sum())} for c in sorted(set(cls))}
