"""Window quality stage: grade every lead in fixed windows with signal-quality indices.

For each lead and window (default 10 s) the stage computes direct fault shares, published noise
indices and rhythm measures. The grade (``good``, ``noisy`` or ``unusable``, with the indices that
decided) comes from the noise tests alone; rhythm findings (irregular RR, a long RR, a rate
outside a range) go to their own column, ``rhythm_findings``, and never change the grade: ectopy
and pauses are findings about the heart, not noise. Definitions and thresholds: docs/quality.md; the indices and their tests are registered in
:mod:`prep.quality.indices`.

Indices (per lead and window):

- ``fault_fraction`` (flat + clipped + missing share) and its parts;
- ``amplitude_mv``: 99th minus 1st percentile of the filtered lead;
- ``ksqi``: kurtosis of the filtered lead; ``ssqi``: its skewness (Li, Mark & Clifford 2008);
- ``psqi``: power 5-15 Hz over 5-40 Hz; ``bassqi``: 1 - power 0-1 Hz over 0-40 Hz, before baseline
  removal (Li et al. 2008; Clifford et al. 2012);
- ``bsqi``: agreement of our detector with ``neurokit2``'s within 150 ms, matched over the union;
- ``line_share``: power within 1 Hz of mains and harmonics after the notch, over total;
- ``hf_share``: power above 40 Hz over total (muscle);
- ``tsqi``: beat-to-beat similarity, after Orphanidou et al. 2015, but each beat is compared with
  the beats of the whole lead that resemble it most (its ``k``-th best correlation), not with one
  average: a window of bigeminy is as similar as a window of sinus beats, noise is not;
- rhythm (reported, never graded): ``hr_bpm``, ``max_rr_s``, ``rr_ratio``.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from prep.config import WindowsConfig
from prep.quality.indices import INDICES, NOISE_TESTS, RHYTHM_TESTS, SIGNAL_INDICES, Frames

GRADES = ("good", "noisy", "unusable")
_FAULTS = ("flat", "clipped", "missing")
INDEX_COLUMNS = ["fault_fraction", "flat_fraction", "clipped_fraction", "missing_fraction",
                 "amplitude_mv", "ksqi", "ssqi", "psqi", "bassqi", "bsqi", "line_share",
                 "hf_share", "hr_bpm", "max_rr_s", "rr_ratio", "tsqi", "tsqi_average", "n_beats"]


def lead_windows(notched: np.ndarray, filtered: np.ndarray, bad: dict[str, np.ndarray], fs: float,
                 ours: np.ndarray, other: np.ndarray, mains_hz: float | None,
                 cfg: WindowsConfig = WindowsConfig(), grade: bool = True) -> pd.DataFrame:
    """Indices and grade of every window of one lead.

    Parameters
    ----------
    notched, filtered : (n_samples,) the lead after the notch only, and after every filter.
    bad : {"flat", "clipped", "missing"} -> bool masks (n_samples,).
    ours, other : sorted R positions from our detector and from the second detector.

    Returns a DataFrame with ``start``, ``end``, ``grade``, ``decided_by``,
    ``rhythm_findings`` and the indices of :data:`prep.quality.indices.INDICES`. With
    ``grade=False`` only the fault shares are computed and every window is ``good``.

    >>> fs = 250.0; t = np.arange(int(30 * fs)) / fs
    >>> x = np.zeros(t.size); x[125::250] = 1.0; x = np.convolve(x, np.hanning(11), "same")
    >>> r = np.arange(125, t.size, 250)
    >>> z = np.zeros(t.size, bool); w = lead_windows(x, x, {"flat": z, "clipped": z, "missing": z},
    ...                                            fs, r, r, None)
    >>> w.grade.tolist()
    ['good', 'good', 'good']
    """
    return pd.DataFrame(window_columns(notched, filtered, bad, fs, ours, other, mains_hz, cfg,
                                       grade))


def window_columns(notched: np.ndarray, filtered: np.ndarray, bad: dict[str, np.ndarray],
                   fs: float, ours: np.ndarray, other: np.ndarray, mains_hz: float | None,
                   cfg: WindowsConfig = WindowsConfig(), grade: bool = True,
                   signal_columns: dict | None = None, verdicts: bool = True) -> dict:
    """:func:`lead_windows` as a mapping of column name -> values (numpy arrays, lists for the
    text columns), in the table's column order: the pipeline joins the leads' columns into one
    table per record instead of building a table per lead. ``signal_columns``: this lead's
    index results of :data:`prep.quality.indices.SIGNAL_INDICES` (by function name) from
    :func:`signal_index_columns`. ``verdicts=False`` leaves ``grade``, ``decided_by`` and
    ``rhythm_findings`` None, for :func:`add_verdicts` to fill for all leads at once."""
    fr = Frames(filtered, notched, fs, int(round(cfg.window_s * fs)), ours, other, mains_hz)
    out = {"start": fr.starts, "end": fr.starts + fr.count.astype(np.int64)}
    out.update(fault_shares(bad, fr.starts, fr.count))
    n = fr.n_win
    if not grade:
        out.update({c: np.full(n, np.nan) for c in INDEX_COLUMNS if c not in out})
        return _columns(out, ["good"] * n, [""] * n, [""] * n)
    for index in INDICES:
        if signal_columns is not None and index in SIGNAL_INDICES:
            out.update(signal_columns[index.__name__])
        else:
            out.update(index(fr))
    if not verdicts:
        return _columns(out, None, None, None)
    grades, why = grade_windows(out, cfg)
    return _columns(out, grades, why, rhythm_findings(out, cfg))


def add_verdicts(tables: list[dict], cfg: WindowsConfig = WindowsConfig()) -> None:
    """Fill ``grade``, ``decided_by`` and ``rhythm_findings`` of several leads'
    :func:`window_columns` (made with ``verdicts=False``) in place, by one pass of the tests over
    all their windows: a window's verdict reads only its own row, so this is the same as lead
    by lead (tests/quality/test_quality.py)."""
    if not tables:
        return
    joined = {k: np.concatenate([np.asarray(t[k], dtype=float) for t in tables])
              for k in INDEX_COLUMNS if k in tables[0]}
    grades, why = grade_windows(joined, cfg)
    rhythm = rhythm_findings(joined, cfg)
    a = 0
    for t in tables:
        b = a + len(t["start"])
        t["grade"], t["decided_by"], t["rhythm_findings"] = grades[a:b], why[a:b], rhythm[a:b]
        a = b


def signal_index_columns(notched: np.ndarray, filtered: np.ndarray, fs: float,
                         mains_hz: float | None, cfg: WindowsConfig = WindowsConfig()
                         ) -> list[dict]:
    """The columns of :data:`prep.quality.indices.SIGNAL_INDICES` for every lead of
    ``notched``/``filtered`` (n_leads, n), computed in one pass over all leads (the same values
    as lead by lead: tests/quality/test_quality.py); per lead, index name -> its columns."""
    empty = np.zeros(0, np.int64)
    fr = Frames(filtered, notched, fs, int(round(cfg.window_s * fs)), empty, empty, mains_hz)
    shape = (fr.n_leads, fr.per_lead)
    cols = {index.__name__: index(fr) for index in SIGNAL_INDICES}
    return [{name: {k: v.reshape(shape)[j] for k, v in c.items()} for name, c in cols.items()}
            for j in range(fr.n_leads)]


def fault_shares(bad: dict[str, np.ndarray], starts: np.ndarray, count: np.ndarray) -> dict:
    """Share of each window that is flat, clipped or missing, and their sum (at most 1)."""
    out, total = {}, np.zeros(starts.size)
    for key in _FAULTS:
        share = np.add.reduceat(bad[key].astype(np.int32), starts) / count
        out[f"{key}_fraction"] = share
        total += share
    out["fault_fraction"] = np.minimum(total, 1.0)
    return out


def _columns(out: dict, grades, why, rhythm) -> dict:
    """The window table's columns: start, end, the verdicts, then the indices."""
    cols = {"start": out["start"], "end": out["end"], "grade": grades, "decided_by": why,
            "rhythm_findings": rhythm}
    cols.update((k, v) for k, v in out.items() if k not in ("start", "end"))
    return cols


def join_columns(parts: list[dict]) -> pd.DataFrame:
    """One table from several leads' :func:`window_columns`, in order (as ``pd.concat`` of their
    tables with a fresh index)."""
    if not parts:
        return pd.DataFrame()
    cols = {}
    for k, v in parts[0].items():
        if isinstance(v, list):
            cols[k] = [x for p in parts for x in p[k]]
        else:
            cols[k] = np.concatenate([np.asarray(p[k]) for p in parts])
    return pd.DataFrame(cols)


def _joined(d, tests, cfg) -> list[str]:
    """';'-joined names of the tests each window fails (``d``: a window table or a mapping of
    index name -> array)."""
    cols = {k: np.asarray(d[k], dtype=float) for k in INDEX_COLUMNS if k in d}
    n = len(next(iter(cols.values()))) if cols else 0
    hit = (np.column_stack([np.asarray(t.fails(cols, cfg), bool) for t in tests]) if n
           else np.zeros((0, len(tests)), bool))
    return [";".join(t.name for t, b in zip(tests, row) if b) for row in hit]


def rhythm_findings(df, cfg: WindowsConfig) -> list[str]:
    """';'-joined rhythm findings of each window (``''`` when none): reported, never graded.

    ``rate_out_of_range``: median heart rate outside ``hr_range_bpm``; ``long_rr``: longest RR
    above ``max_rr_s``; ``irregular_rr``: longest over shortest RR above ``max_rr_ratio``.
    """
    return _joined(df, RHYTHM_TESTS, cfg)


def grade_windows(df, cfg: WindowsConfig) -> tuple[list[str], list[str]]:
    """Grade each window from the noise tests of :data:`prep.quality.indices.NOISE_TESTS`;
    returns grades and the ';'-joined deciding tests (the unusable ones where any fails).
    Rhythm measures take no part (see :func:`rhythm_findings`). ``df``: a window table or a
    mapping of index name -> array."""
    unusable = _joined(df, [t for t in NOISE_TESTS if t.level == "unusable"], cfg)
    noisy = _joined(df, [t for t in NOISE_TESTS if t.level == "noisy"], cfg)
    grades = ["unusable" if u else "noisy" if n else "good" for u, n in zip(unusable, noisy)]
    return grades, [u or n for u, n in zip(unusable, noisy)]


def grade_codes(grades) -> np.ndarray:
    """good/noisy/unusable as 0/1/2."""
    return np.array([GRADES.index(g) for g in grades], dtype=np.int8)


_FAULT_ORDER = ["fault_fraction", "amplitude_mv", "bsqi", "tsqi", "ksqi", "bassqi", "psqi",
                "hf_share", "line_share", "hr_bpm", "max_rr_s", "rr_ratio"]


def main_fault(w) -> str:
    """The test that most often decided a lead's non-good windows ('' when all good); ties go to
    the more direct test, and a fault share is named by its kind (flat, clipped, missing).
    ``w``: a lead's window table or :func:`window_columns`."""
    bad = np.asarray(w["grade"], dtype=object) != "good"
    if not bad.any():
        return ""
    parts = [p for cell in np.asarray(w["decided_by"], dtype=object)[bad]
             for p in cell.split(";") if p]
    if not parts:
        return ""
    rank = {k: i for i, k in enumerate(_FAULT_ORDER)}
    top = min(set(parts), key=lambda k: (-parts.count(k), rank.get(k, 99)))
    if top == "fault_fraction":
        kinds = {k: float(np.asarray(w[f"{k}_fraction"])[bad].sum())
                 for k in ("flat", "clipped", "missing")}
        return max(kinds, key=kinds.get)
    return top
