"""PyTorch adapter: ``BeatDataset(run_dir, split="train")`` over the memory-mapped tensor.

Needs the optional extra ``beatmill[torch]``. Items are ``(beat, lead_mask, label_index)``:
``beat`` a float32 tensor (n_leads, n_samples) that shares memory with the file (opened
copy-on-write, so nothing is copied unless a transform writes to it), ``lead_mask`` a bool tensor
(n_leads,), ``label_index`` an int into :attr:`BeatDataset.class_names`.

The file is opened lazily in each process, so a ``DataLoader`` with several workers maps it once
per worker instead of pickling arrays.
"""
from __future__ import annotations

import warnings
from pathlib import Path
from typing import Callable

import numpy as np

try:
    import torch as _torch
    from torch.utils.data import Dataset as _TorchDataset
except ImportError as exc:  # pragma: no cover - exercised where torch is absent
    raise ImportError("prep.torch needs PyTorch: pip install 'beatmill[torch]'") from exc

from prep.dataset.view import open_dataset
from prep.schema import BEATS_NPY, LEAD_MASK_NPY


class BeatDataset(_TorchDataset):
    """One split of a finished run as a map-style PyTorch dataset."""

    def __init__(self, run_dir: str | Path, split: str = "train",
                 transform: Callable | None = None):
        ds = open_dataset(run_dir)
        _, rows = ds.split(split)
        self.run_dir = Path(run_dir)
        self.split_name = split
        self.transform = transform
        self.class_names = ds.class_names
        self._start, self._stop = ds.manifest["splits"][split]["rows"]
        index = {c: i for i, c in enumerate(self.class_names)}
        self.labels = np.array([index.get(c, len(self.class_names) - 1) for c in rows["beat_class"]],
                               dtype=np.int64)
        self.beat_ids = rows["beat_id"].tolist()
        self._beats = None
        self._mask = None

    def _open(self) -> None:
        self._beats = np.load(self.run_dir / BEATS_NPY, mmap_mode="c")[self._start:self._stop]
        self._mask = np.load(self.run_dir / LEAD_MASK_NPY, mmap_mode="c")[self._start:self._stop]

    def __len__(self) -> int:
        return self._stop - self._start

    def __getitem__(self, i: int):
        if self._beats is None:
            self._open()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            beat = _torch.from_numpy(self._beats[i])
            mask = _torch.from_numpy(self._mask[i])
        if self.transform is not None:
            beat = self.transform(beat)
        return beat, mask, int(self.labels[i])

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_beats"] = state["_mask"] = None  # each worker maps the file itself
        return state
