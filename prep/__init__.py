"""beatmill: ECG records in, clean normalized beat tensors with provenance out.

Public API (heavy modules load on first use, so the command line starts fast):

- :func:`process` - the whole pipeline on in-memory arrays
- :func:`run` - what ``beatmill run`` does
- :func:`open_dataset` / :class:`Dataset` - a read-only view of a finished run
- :class:`Config` - the typed configuration
- :class:`BeatmillError`, :class:`ConfigError`, :class:`RecordError`
- ``prep.torch.BeatDataset`` - a PyTorch adapter (optional extra ``beatmill[torch]``)

Research use only: not a medical device, not for diagnosis.
"""
from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["process", "run", "open_dataset", "Dataset", "Config", "BeatmillError", "ConfigError",
           "RecordError", "__version__"]

_WHERE = {"process": "dataset.view", "open_dataset": "dataset.view", "Dataset": "dataset.view",
          "run": "dataset.run",
          "Config": "config", "BeatmillError": "errors", "ConfigError": "errors",
          "RecordError": "errors"}


def __getattr__(name: str):
    if name in _WHERE:
        import importlib
        return getattr(importlib.import_module(f".{_WHERE[name]}", __name__), name)
    raise AttributeError(f"module 'prep' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
