"""Signal stages: pure functions over (..., n_samples) arrays in mV, each returning its output
and a StageLog (powerline, bandpass, baseline, rpeaks, segment, resample, labels, normalize).
They import only the core (config, model, errors) and their shared helpers here."""
