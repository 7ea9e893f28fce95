"""Worked example: prepare the demo records, train a tiny reconstruction model on normal training
beats, and list the most anomalous test beats with their beat_ids.

Run from the repository root:  python docs/examples/anomaly_demo.py [OUT_DIR]

The model is a linear autoencoder (principal components, fitted with numpy's SVD): it learns to
rebuild normal beats from 8 numbers, so beats it rebuilds badly are unlike the training beats.
"""
import sys
import tempfile
from pathlib import Path

import numpy as np

import prep

out = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp()) / "demo_run"
# a fixed split: the ectopic night (night02) and a clean night are the test patients
cfg = prep.Config().replace(
    labels={"train_classes": ["N"]},
    split={"train_patients": ["night03", "night04", "night05", "night06"],
           "val_patients": ["night07"], "test_patients": ["night01", "night02"]})
prep.run(["demo_records"], out, config=cfg, overwrite=True)

ds = prep.open_dataset(out)
train, _ = ds.split("train")
test, test_rows = ds.split("test")
X = np.asarray(train).reshape(len(train), -1)        # (beats, leads * samples)
mean = X.mean(axis=0)
_, _, vt = np.linalg.svd(X - mean, full_matrices=False)
basis = vt[:8]                                        # 8 components


def reconstruction_error(beats):
    Z = np.asarray(beats).reshape(len(beats), -1) - mean
    return ((Z - (Z @ basis.T) @ basis) ** 2).mean(axis=1)


err = reconstruction_error(test)
top = np.argsort(-err)[:10]
print(f"trained on {len(train)} normal beats; scored {len(test)} test beats")
print(f"{'beat_id':<18}{'class':>7}{'error':>9}")
for i in top:
    print(f"{test_rows.beat_id[i]:<18}{test_rows.beat_class[i]:>7}{err[i]:>9.3f}")
TOP_CLASSES = test_rows.beat_class.to_numpy()[top]
