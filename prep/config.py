"""Typed, frozen configuration for every stage, with documented defaults and their sources.

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

from prep.errors import ConfigError


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


def _f(default, doc: str, source: str, *, choices=None, lo=None, hi=None, lo_open=False,
       items: Items | None = None, factory=None):
    meta = {"doc": doc, "source": source, "choices": choices, "lo": lo, "hi": hi,
            "lo_open": lo_open, "items": items}
    if factory is not None:
        return field(default_factory=factory, metadata=meta)
    return field(default=default, metadata=meta)


@dataclass(frozen=True)
class ReadConfig:
    csv_fs_hz: float = _f(0.0, "Sampling rate of CSV inputs in Hz; 0 means take it from the sidecar "
                          "JSON (same name, .json) and fail the record if there is none.",
                          "no default rate can be guessed safely", lo=0.0)
    annotation_extension: str = _f("atr", "WFDB annotation file extension read as the reference "
                                   "beat labels (record.EXT). Missing file: no labels.",
                                   "WFDB convention: .atr holds reference annotations")


@dataclass(frozen=True)
class LeadsConfig:
    select: list = _f(None, "Lead axis of the dataset, in order (canonical or alias names, "
                      "case-insensitive, e.g. [\"II\", \"V5\"]). Empty: the ECG leads every record "
                      "shares (see docs/leads.md for the order).",
                      "design choice: a fixed lead axis per dataset",
                      items=Items("name", "a list of distinct lead names", distinct=True),
                      factory=list)
    drop_incomplete_beats: bool = _f(False, "Exclude beats that miss a lead of the axis (reason "
                                     "lead_missing) instead of keeping them zero-filled with "
                                     "lead_mask False.", "design choice")


@dataclass(frozen=True)
class PowerlineConfig:
    enabled: bool = _f(True, "Detect the mains frequency and notch it and its harmonics.",
                       "design choice")
    candidates_hz: list = _f(None, "Mains frequencies to test, in Hz.",
                             "IEC 60038 nominal mains frequencies (50 and 60 Hz)",
                             items=Items("number", "a list of at least one frequency between 1 and 1000 Hz",
                                         lo=1.0, hi=1000.0, nonempty=True),
                             factory=lambda: [50.0, 60.0])
    min_peak_db: float = _f(6.0, "A candidate counts as present when its spectral peak stands at "
                            "least this many dB above the neighbouring spectrum (2 to 5 Hz away).",
                            "common practice, no source", lo=0.0, hi=60.0)
    quality_factor: float = _f(30.0, "Notch quality factor Q (bandwidth = f0 / Q).",
                               "common practice, no source (scipy.signal.iirnotch example uses 30)",
                               lo=1.0, hi=200.0)
    harmonics: bool = _f(True, "Also notch every harmonic below 0.95 x Nyquist.", "design choice")


@dataclass(frozen=True)
class BandpassConfig:
    enabled: bool = _f(True, "Apply the zero-phase Butterworth band-pass.", "design choice")
    low_hz: float = _f(0.67, "Lower edge in Hz, where the delivered zero-phase response is 3 dB "
                       "down.", "AHA/ACC/HRS 2007 (Kligfield et al.): 0.67 Hz allowed for "
                       "zero-phase digital filters; monitoring standards ask -3 dB at 0.67 Hz",
                       lo=0.0, lo_open=True, hi=10.0)
    high_hz: float = _f(40.0, "Upper edge in Hz, where the delivered zero-phase response is 3 dB "
                        "down; lowered to 0.45 x fs on records whose Nyquist is below it (recorded).",
                        "monitoring-mode bandwidth 0.67-40 Hz (IEC 60601-2-27, from memory); "
                        "40 Hz is also common in beat-classification work",
                        lo=1.0, hi=500.0)
    order: int = _f(2, "Butterworth order of each edge (applied forward and backward, so the "
                    "delivered roll-off is twice as steep).", "common practice, no source",
                    lo=1, hi=8)


@dataclass(frozen=True)
class BaselineConfig:
    method: str = _f("median", "Baseline-wander removal: 'median' (two-stage median filter), "
                     "'highpass' (extra zero-phase Butterworth high-pass) or 'none'.",
                     "de Chazal, O'Dwyer & Reilly 2004 (IEEE TBME 51:1196) use the two-stage median",
                     choices=["median", "highpass", "none"])
    first_window_ms: float = _f(200.0, "First median window in ms (removes QRS and P).",
                                "de Chazal et al. 2004: 200 ms", lo=20.0, hi=2000.0)
    second_window_ms: float = _f(600.0, "Second median window in ms (removes T).",
                                 "de Chazal et al. 2004: 600 ms", lo=20.0, hi=5000.0)
    highpass_hz: float = _f(0.5, "Corner of the 'highpass' method in Hz (3 dB down, zero-phase).",
                            "common practice, no source", lo=0.01, hi=5.0)


@dataclass(frozen=True)
class RpeaksConfig:
    refractory_ms: float = _f(250.0, "Refractory period: two beats in one lead are never closer.",
                              "physiological refractory period ~200-250 ms (Pan & Tompkins 1985 use 200 ms)",
                              lo=100.0, hi=600.0)
    threshold: float = _f(0.6, "A candidate QRS is accepted when its energy-envelope peak exceeds "
                          "this fraction of the local reference peak height.",
                          "tuned on synthetic records and MIT-BIH 100/105/119 (docs/rpeaks.md)",
                          lo=0.05, hi=1.0)
    searchback_threshold: float = _f(0.2, "Lower fraction used when searching back in an RR gap "
                                     "longer than searchback_rr x the local median RR.",
                                     "Pan & Tompkins 1985 search-back idea; value tuned as above",
                                     lo=0.01, hi=1.0)
    searchback_rr: float = _f(1.6, "RR gap, as a multiple of the local median RR, that triggers a "
                              "search back.", "Pan & Tompkins 1985 use 166% of the RR average",
                              lo=1.1, hi=4.0)
    fuse_window_ms: float = _f(100.0, "Detections in different leads closer than this are one beat.",
                               "common practice, no source", lo=10.0, hi=150.0)
    refine_window_ms: float = _f(60.0, "R is moved to the lead's QRS extremum within +- this many ms.",
                                 "common practice, no source", lo=0.0, hi=150.0)
    min_lead_template_corr: float = _f(0.5, "A lead counts as locally good for one-lead beats when "
                                       "its beats' median correlation with the lead's QRS template "
                                       "in the surrounding 10 s window reaches this.",
                                       "template-matching SQI, Orphanidou et al. 2015 (IEEE JBHI)",
                                       lo=-1.0, hi=1.0)


@dataclass(frozen=True)
class SegmentConfig:
    mode: str = _f("fixed", "'fixed': before_ms / after_ms around R; 'rr': before_rr x previous RR "
                   "and after_rr x next RR.", "design choice", choices=["fixed", "rr"])
    before_ms: float = _f(250.0, "Window start before R in ms (mode 'fixed').",
                          "common practice, no source (covers the P wave at rest)", lo=20.0, hi=2000.0)
    after_ms: float = _f(400.0, "Window end after R in ms (mode 'fixed').",
                         "common practice, no source (covers the T wave at rest)", lo=20.0, hi=3000.0)
    before_rr: float = _f(0.35, "Window start before R as a fraction of the previous RR (mode 'rr').",
                          "common practice, no source", lo=0.05, hi=1.0)
    after_rr: float = _f(0.6, "Window end after R as a fraction of the next RR (mode 'rr').",
                         "common practice, no source", lo=0.05, hi=1.5)


@dataclass(frozen=True)
class ResampleConfig:
    n_samples: int = _f(256, "Samples per beat and lead in the tensor.",
                        "common practice, no source (a power of two suits convolutional models)",
                        lo=8, hi=8192)


@dataclass(frozen=True)
class NormalizeConfig:
    method: str = _f("zscore", "'zscore' (mean/std), 'minmax' (to [0, 1]), 'robust' (median/IQR) "
                     "or 'none'.", "design choice", choices=["zscore", "minmax", "robust", "none"])
    scope: str = _f("beat", "Statistics per 'beat' (and lead), per 'record' (and lead), or over the "
                    "whole 'dataset' (per lead).", "design choice",
                    choices=["beat", "record", "dataset"])


@dataclass(frozen=True)
class QualityConfig:
    flat_ms: float = _f(1000.0, "A run of identical samples at least this long counts as flat "
                        "(lead-off).", "common practice, no source; shorter runs occur on clean "
                        "10-bit 128 Hz records (svdb 803: 13 % of a lead in runs of 100 ms) "
                        "between beats", lo=5.0, hi=10000.0)
    clip_run_samples: int = _f(3, "A run of at least this many samples at the lead's extreme value "
                               "counts as clipped.", "common practice, no source", lo=2, hi=1000)
    max_bad_fraction_in_beat: float = _f(0.02, "A beat is excluded when more than this fraction of "
                                         "its window is flat or clipped in a used lead.",
                                         "common practice, no source", lo=0.0, hi=1.0)
    max_hf_ratio: float = _f(0.1, "A beat is excluded when the RMS of its >40 Hz residual exceeds "
                             "this fraction of its peak-to-peak amplitude (median over leads).",
                             "common practice, no source; MIT-BIH 105 (very noisy) has 99.9% of "
                             "beats below 0.05 here, 100 (clean) below 0.03", lo=0.0, lo_open=True, hi=10.0)
    flag_template_corr: float = _f(0.6, "A kept beat whose correlation with the running median beat "
                                   "is below this gets the flag unlike_neighbours.",
                                   "common practice, no source", lo=-1.0, hi=1.0)
    exclude_template_corr: float = _f(-1.0, "A beat whose correlation with the running median beat is "
                                      "below this is excluded (unlike_neighbours). -1 (the default) "
                                      "never excludes: ectopic beats are unlike their neighbours "
                                      "(an inverted PVC correlates negatively) and must stay.",
                                      "common practice, no source", lo=-1.0, hi=1.0)
    template_beats: int = _f(31, "Beats in the running median template (odd).",
                             "common practice, no source", lo=3, hi=1001)
    min_usable_fraction: float = _f(0.5, "A lead is rejected for a record when less than this "
                                    "share of its windows is usable (not graded unusable).",
                                    "common practice, no source", lo=0.0, hi=1.0)
    max_amplitude_z: float = _f(10.0, "A beat is excluded (amplitude_outlier) when the robust "
                                "z-score of its log peak-to-peak amplitude exceeds this; the MAD "
                                "is floored at 0.1, so the threshold is never tighter than a "
                                "factor e = 2.7 (ectopic beats of double amplitude stay).",
                                "common practice, no source", lo=1.0, hi=100.0)
    min_rr_s: float = _f(0.2, "A beat closer than this to the previous beat is excluded "
                         "(rr_too_short).", "absolute refractory period ~200 ms (Pan & Tompkins "
                         "1985 use 200 ms)", lo=0.05, hi=1.0)
    long_pause_s: float = _f(3.0, "A beat next to an RR longer than this gets the flag long_pause.",
                             "Orphanidou et al. 2015: longest plausible RR 3 s", lo=0.5, hi=30.0)
    exclude_long_pause: bool = _f(False, "Exclude beats next to a long pause instead of flagging "
                                  "them (a true pause is a finding, not noise).", "design choice")
    exclude_detector_disagreement: bool = _f(True, "Exclude weak beats that neurokit2's detector "
                                             "does not find within 150 ms in any used lead "
                                             "(detector_disagreement); strong beats seen in "
                                             "every lead are only flagged.", "design choice: two "
                                             "independent detectors agreeing is the bSQI idea "
                                             "(Li et al. 2008)")
    lone_lead_min_qrs_match: float = _f(0.99, "In a record with two or more usable leads, a beat "
                                        "in noise (every lead it keeps graded noisy by a noise "
                                        "test) where only one lead is usable must have qrs_match "
                                        "at least this, else it is excluded (weak_in_noise): no "
                                        "second lead confirms it. Above 1 excludes every such "
                                        "beat; -1 turns the rule off.",
                                        "measured on the noise-stress benchmark (tuned on it): at "
                                        "-6 dB electrode-motion noise the false beats still kept "
                                        "were all in such stretches (docs/quality.md)",
                                        lo=-1.0, hi=2.0)
    missed_min_qrs_match: float = _f(0.95, "A beat in a noisy window (by any test) that a lead "
                                     "usable there missed must have qrs_match at least this, "
                                     "else it is excluded (weak_in_noise).",
                                     "measured on the noise-stress "
                                     "benchmark (tuned on it): at 0 and 6 dB electrode-motion "
                                     "noise the last false beats kept were seen by one of two "
                                     "leads, qrs_match 0.73-0.93 (docs/quality.md)",
                                     lo=-1.0, hi=1.0)
    noise_min_qrs_match: float = _f(0.9, "A beat in a window a noise test grades noisy in a "
                                    "lead it keeps, whose QRS (R +- qrs_half_ms on all usable "
                                    "leads together) correlates at least this much with fewer than "
                                    "qrs_match_k of the record's clean beats (every usable lead "
                                    "graded good by the noise tests), is excluded "
                                    "(unmatched_in_noise). -1 turns it off.",
                                    "measured on the noise-stress benchmark, so tuned on it: "
                                    "false beats from the electrode-motion record (which holds a "
                                    "periodic QRS-like component) median 0.73, true beats in "
                                    "noisy windows 0.997 (docs/quality.md); held-out check on "
                                    "the nstdb 118e* records", lo=-1.0, hi=1.0)
    qrs_half_ms: float = _f(50.0, "Half-width of the QRS segment compared by qrs_match.",
                            "common practice, no source: a normal QRS lasts about 80-100 ms "
                            "(from memory)", lo=10.0, hi=200.0)
    qrs_match_k: int = _f(3, "A beat must match this many clean beats (the k-th best "
                          "correlation is its score).", "design choice", lo=1, hi=50)
    qrs_library_beats: int = _f(1000, "At most this many good-window beats, evenly spread over the "
                                "record, are compared.", "design choice (cost: beats x library x "
                                "segment)", lo=10, hi=100000)
    noise_min_template_corr: float = _f(0.5, "In a window that noise tests grade noisy in every lead "
                                        "a beat keeps, the beat must be seen by every lead usable "
                                        "there, and, where the record has too few clean beats for "
                                        "qrs_match, correlate at least this much with the running "
                                        "template, else it is excluded (weak_in_noise).",
                                        "measured: at 0 dB em/ma noise, false beats had median "
                                        "correlation 0.31, true beats 0.97 (docs/quality.md)",
                                        lo=-1.0, hi=1.0)
    exclude_overlapping: bool = _f(False, "Exclude beats whose window holds a neighbour's R "
                                   "(overlaps_neighbour) instead of flagging them.", "design choice")


@dataclass(frozen=True)
class LabelsConfig:
    window_ms: float = _f(150.0, "A reference beat annotation labels a beat when it lies within "
                          "this many ms of the beat's R (the nearest one wins).",
                          "AAMI EC57 beat-matching window (150 ms)", lo=1.0, hi=1000.0)
    mapping_file: str = _f("", "Extra symbol -> class table: a TOML file with a [classes] table "
                           "(\"symbol\" = \"class\") or a CSV with columns symbol,class. Its entries "
                           "override the AAMI EC57 table; its contents are part of the config hash.",
                           "design choice")
    train_classes: list = _f(None, "Classes kept in the training split (e.g. [\"N\"]); beats of "
                             "training patients in other classes are excluded (not_train_class). "
                             "Empty: every class. 'unlabeled' names beats without a reference label.",
                             "design choice", items=Items("name", "a list of non-empty names"),
                             factory=list)
    exclude_annotated_noise: bool = _f(True, "Exclude beats inside stretches the annotator marked "
                                       "as noisy or unreadable in a used lead (annotated_noise).",
                                       "design choice")


@dataclass(frozen=True)
class SplitConfig:
    patient_map: str = _f("", "CSV with columns record,patient. Records not in it fall back to "
                          "patient_pattern, then to their own name. Contents are part of the hash.",
                          "design choice")
    patient_pattern: str = _f("", "Regular expression with one group, searched in the header "
                              "comments, that gives the patient (e.g. \"patient[: ]+(\\\\w+)\"). "
                              "Empty: not used.", "design choice")
    ratios: list = _f(None, "Train, validation, test shares of kept beats, met as closely as whole "
                      "patients allow.", "common practice, no source",
                      items=Items("number", "three non-negative shares with a positive sum", lo=0.0,
                                  length=3, positive_sum=True),
                      factory=lambda: [0.7, 0.15, 0.15])
    seed: int = _f(0, "Seed of the patient assignment (same seed, same split).", "design choice",
                   lo=0, hi=2**32 - 1)
    train_patients: list = _f(None, "Fixed training patients. When any fixed list is given, "
                              "patients in none of them are excluded (not_in_split_lists).",
                              "design choice (reproducing a published split)", items=Items("name", "a list of non-empty names"),
                              factory=list)
    val_patients: list = _f(None, "Fixed validation patients (see train_patients).",
                            "design choice", items=Items("name", "a list of non-empty names"),
                            factory=list)
    test_patients: list = _f(None, "Fixed test patients (see train_patients).", "design choice",
                             items=Items("name", "a list of non-empty names"),
                             factory=list)


@dataclass(frozen=True)
class WindowsConfig:
    enabled: bool = _f(True, "Grade lead windows and run the second detector. Off: every window "
                       "counts as good and no beat is checked against the second detector "
                       "(faster; for comparison).", "design choice")
    window_s: float = _f(10.0, "Length of the lead-quality windows in s.",
                         "10 s windows as in Li, Mark & Clifford 2008 and Orphanidou et al. 2015",
                         lo=2.0, hi=600.0)
    unusable_fault_fraction: float = _f(0.5, "A window is unusable when more than this share is "
                                        "flat, clipped or missing.", "common practice, no source",
                                        lo=0.0, hi=1.0)
    noisy_fault_fraction: float = _f(0.01, "A window is noisy when more than this share is flat, "
                                     "clipped or missing (a few clipped R peaks are enough).",
                                     "common practice, no source",
                                     lo=0.0, hi=1.0)
    amplitude_range_mv: list = _f(None, "Plausible range of the window's robust amplitude (99th "
                                  "minus 1st percentile of the filtered lead), mV; outside: "
                                  "unusable.", "common practice, no source",
                                  items=Items("number", "[low, high] with 0 <= low < high", lo=0.0, length=2, ascending=True),
                                  factory=lambda: [0.05, 10.0])
    min_ksqi: float = _f(5.0, "kSQI (kurtosis) below this: noisy.",
                         "Li, Mark & Clifford 2008 (Physiol Meas 29:15), kSQI > 5 for good "
                         "ECG, from memory", lo=0.0, hi=100.0)
    psqi_range: list = _f(None, "pSQI (power 5-15 Hz / 5-40 Hz) outside this range: noisy.",
                          "Li et al. 2008 used 0.5-0.8 for good ECG (from memory); widened here: "
                          "clean MIT-BIH, svdb and nstdb windows measured 0.50 to 0.93 (5th-95th "
                          "percentiles, docs/quality.md)", items=Items("number", "[low, high] with 0 <= low < high", lo=0.0, length=2, ascending=True),
                          factory=lambda: [0.4, 0.95])
    min_bassqi: float = _f(0.5, "basSQI (1 - power 0-1 Hz / 0-40 Hz, before baseline removal) "
                           "below this: noisy.", "Li et al. 2008 / Clifford et al. 2012 use 0.95 "
                           "(from memory); lowered because wander is removed downstream and clean "
                           "MIT-BIH 100 and nstdb 118 windows measured 0.58-0.75 at their 5th "
                           "percentile", lo=0.0, hi=1.0)
    bsqi_noisy: float = _f(0.8, "bSQI (agreement of our detector with neurokit2's within 150 ms, "
                           "matched / union) below this: noisy.",
                           "Li et al. 2008 (bSQI > 0.8 for good ECG, from memory)", lo=0.0, hi=1.0)
    bsqi_unusable: float = _f(0.5, "bSQI below this: unusable.", "common practice, no source",
                              lo=0.0, hi=1.0)
    tsqi_noisy: float = _f(0.66, "tSQI (mean over the window's beats of each beat's 3rd best "
                           "correlation with the other beats of its lead) below this: noisy. "
                           "Also the least tsqi_average (correlation with the window's average "
                           "beat) of a window whose beats enter the qrs_match library.", "Orphanidou et al. 2015 (IEEE JBHI 19:832), 0.66",
                           lo=-1.0, hi=1.0)
    tsqi_unusable: float = _f(0.3, "Template correlation below this: unusable.",
                              "common practice, no source", lo=-1.0, hi=1.0)
    hr_range_bpm: list = _f(None, "Heart rate outside this range: rhythm finding "
                            "rate_out_of_range (reported, never part of the grade).",
                            "Orphanidou et al. 2015: 40-180 bpm", items=Items("number", "[low, high] with 0 <= low < high", lo=0.0, length=2, ascending=True),
                            factory=lambda: [40.0, 180.0])
    max_rr_s: float = _f(3.0, "Longest RR above this: rhythm finding long_rr (reported, never "
                         "part of the grade).", "Orphanidou et al. 2015: 3 s",
                         lo=0.5, hi=30.0)
    max_rr_ratio: float = _f(2.2, "Longest over shortest RR above this: rhythm finding "
                             "irregular_rr (reported, never part of the grade).",
                             "Orphanidou et al. 2015: 2.2", lo=1.0, hi=20.0)
    max_line_share: float = _f(0.1, "Share of power within 1 Hz of the mains frequency and its "
                               "harmonics, after the notch, above this: noisy.",
                               "common practice, no source", lo=0.0, hi=1.0)
    max_hf_share: float = _f(0.2, "Share of power above 40 Hz (muscle) above this: noisy.",
                             "common practice, no source", lo=0.0, hi=1.0)
    exclude_noisy: bool = _f(False, "Exclude beats in noisy windows (reason noisy_window) instead "
                             "of keeping them with the flag noisy_window.", "design choice")


@dataclass(frozen=True)
class ChunksConfig:
    chunk_minutes: float = _f(60.0, "WFDB and EDF/EDF+C records longer than this are processed "
                              "in chunks of this "
                              "length (rounded to whole quality windows), so memory stays bounded.",
                              "design choice: an hour of 12-lead 1 kHz signal is ~350 MB in float64",
                              lo=1.0, hi=10000.0)
    overlap_s: float = _f(60.0, "Signal read on each side of a chunk (rounded up to whole quality "
                          "windows) and then dropped: longer than the filters' settling (about "
                          "5 s), the detector's reference (16 beats) and the 31-beat template.",
                          "design choice", lo=10.0, hi=3600.0)


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
                        and type(_default(known[k])) is float):
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
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise ConfigError(f"config file {path} is not valid TOML ({exc}); compare with "
                              "'beatmill config'") from None
        return cls.from_dict(data, origin=f"config file {path}")

    def replace(self, **changes: dict[str, Any]) -> "Config":
        """Return a validated copy with some keys of some sections changed.

        ``cfg.replace(bandpass={"high_hz": 35.0})``
        """
        data = self.to_dict()
        for section, values in changes.items():
            if section not in SECTIONS:
                raise ConfigError(f"unknown section '{section}'; known sections: {', '.join(SECTIONS)}")
            if not isinstance(values, dict):
                raise ConfigError(f"replace({section}=...) takes a dict of keys to change")
            data[section] = {**data[section], **values}
        return Config.from_dict(data, origin="Config.replace")

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
                    lines.append(f"# {f.metadata['doc']}")
                    allowed = f.metadata.get("choices")
                    if allowed:
                        lines.append(f"# allowed: {', '.join(allowed)}")
                    lines.append(f"# default source: {f.metadata['source']}")
                lines.append(f"{f.name} = {_toml_value(getattr(section, f.name))}")
            lines.append("")
        return "\n".join(lines)


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


def _default(f: dataclasses.Field) -> Any:
    return f.default if f.default is not dataclasses.MISSING else f.default_factory()


def _check_field(origin: str, section: str, f: dataclasses.Field, value: Any) -> list[str]:
    where = f"{origin}: The '{f.name}' parameter of [{section}]"
    meta = f.metadata
    kind = type(_default(f))
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
