"""Settings of reference labels and patient-wise splits."""
from __future__ import annotations

from dataclasses import dataclass

from prep.config.declare import Items, setting as _f


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
