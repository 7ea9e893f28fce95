"""Settings of the quality decisions: beat rules (quality) and window grades (windows)."""
from __future__ import annotations

from dataclasses import dataclass

from prep.config.declare import Items, setting as _f


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
    clean_lead_confirms: bool = _f(True, "A beat that a lead graded good there (in a window "
                                   "whose beats agree with their average) keeps, that every "
                                   "usable lead there saw and the second detector confirms, and "
                                   "that sits where a heartbeat can (its neighbours more than "
                                   "1.4 record-median RRs apart together and neither closer than "
                                   "min_rr_share_confirmed of it) is not excluded for an "
                                   "unusual QRS shape in a noisy window (unmatched_in_noise): a "
                                   "rare ectopic morphology matches few clean beats.",
                                   "design choice (issue: never take an abnormal beat for "
                                   "noise); measured on svdb and nstdb (docs/quality.md)")
    min_rr_share_confirmed: float = _f(0.5, "See clean_lead_confirms: the shortest interval to a "
                                       "neighbour, as a share of the record's median RR in clean "
                                       "windows, for a beat the clean lead confirms.",
                                       "chosen on nstdb 118e00 (0 dB): it removes the two "
                                       "non-beats the confirmation kept there; checked on svdb "
                                       "and mitdb",
                                       lo=0.0, hi=1.0)
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
