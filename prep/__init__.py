"""beatmill: ECG records in, clean normalized beat tensors with provenance out."""
__version__ = "0.1.0"
