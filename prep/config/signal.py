"""Settings of reading and of the signal stages: leads, powerline, band-pass, baseline,
R peaks, segmentation, resampling, normalization, chunks."""
from __future__ import annotations

from dataclasses import dataclass

from prep.config.declare import Items, setting as _f


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
    median_rate_hz: float = _f(100.0, "Rate the two medians run at: they take every "
                               "floor(fs / median_rate_hz)-th sample and the baseline is "
                               "interpolated back to full rate (linearly). 0, or a rate above half "
                               "of fs, runs them on every sample.", "design choice for speed: the "
                               "baseline they keep lies below about 2 Hz; 100 rather than 50 Hz "
                               "because at 50 Hz more false beats were kept under electrode-motion "
                               "noise (MIT-BIH 100/119 with NSTDB 'em'; docs/stages.md)",
                               lo=0.0, hi=1000.0)


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
