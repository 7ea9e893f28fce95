"""Figures (matplotlib, headless). Only the CLI and the report import this module."""
from __future__ import annotations

from pathlib import Path

import numpy as np


GRADE_COLOURS = {"good": None, "noisy": "#f2c14e", "unusable": "#d1495b"}  # amber, red
KEPT, EXCLUDED, CUT = "#2e7d32", "#c62828", "#1565c0"  # green, red, blue


def plot_beat_context(ds, beat_id: str, out: str | Path, seconds: float = 3.0) -> Path:
    """Draw a beat in context: every lead for +-``seconds``, R marks (kept green, excluded red,
    with a cross), the cut window shaded blue, noisy (amber) and unusable (red) stretches shaded.
    """
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from prep.config import ReadConfig
    from prep.io.sources import Source, find_sources, read_source

    info = ds.explain(beat_id)
    rec_name = info["record"]
    found, problems = find_sources([ds.source_of(rec_name)])
    if not found:
        from prep.errors import BeatmillError
        raise BeatmillError(f"{rec_name}: its record file is not where the dataset was made "
                            f"from ({'; '.join(problems)}); the figure needs the signal")
    src = found[0]
    rec = read_source(Source(src.kind, src.path, rec_name),
                      ReadConfig(**ds.manifest["config"]["read"]))
    fs = rec.fs
    r = info["r_sample"]
    a, b = max(0, int(r - seconds * fs)), min(rec.n_samples, int(r + seconds * fs))
    t = np.arange(a, b) / fs
    table = ds.table
    near = table[(table["record"] == rec_name) & (table["r_sample"] >= a) & (table["r_sample"] < b)]
    seg = ds.manifest["config"]["segment"]
    w = ds.windows
    n = len(rec.leads)
    fig, axes = plt.subplots(n, 1, figsize=(10, 1.8 * n + 0.8), sharex=True, squeeze=False)
    for j, ax in enumerate(axes[:, 0]):
        x = rec.signals[j, a:b]
        ax.plot(t, x - np.nanmedian(x), color="#222222", lw=0.8)
        if w is not None:
            lw = w[(w["record"] == rec_name) & (w["lead"] == rec.leads[j]) & (w["end"] > a) &
                   (w["start"] < b)]
            for row in lw.itertuples():
                colour = GRADE_COLOURS.get(row.grade)
                if colour:
                    ax.axvspan(max(row.start, a) / fs, min(row.end, b) / fs, color=colour,
                               alpha=0.25, lw=0, label=f"{row.grade} window")
        if seg["mode"] == "fixed":
            ax.axvspan((r - seg["before_ms"] * fs / 1000) / fs, (r + seg["after_ms"] * fs / 1000) / fs,
                       color=CUT, alpha=0.12, lw=0, label="cut window")
        for row in near.itertuples():
            ax.axvline(row.r_sample / fs, color=KEPT if row.included else EXCLUDED, lw=1.0,
                       ls="-" if row.included else "--",
                       label="R of a kept beat" if row.included else "R of an excluded row")
        ax.set_ylabel(f"{rec.leads[j]} (mV)")
        ax.grid(alpha=0.2)
    axes[-1, 0].set_xlabel("time in record (s)")
    status = "kept" if info["included"] else "excluded: " + ", ".join(x["code"] for x in info["reasons"])
    fig.suptitle(f"{beat_id}  label {info['label'] or '-'}  ({status})", fontsize=10)
    handles, labels = axes[0, 0].get_legend_handles_labels()
    uniq = dict(zip(labels, handles))
    if uniq:
        axes[0, 0].legend(uniq.values(), uniq.keys(), loc="upper right", fontsize=7)
    fig.tight_layout()
    out = Path(out)
    fig.savefig(out, dpi=110)
    plt.close(fig)
    return out
